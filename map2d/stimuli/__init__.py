"""Seeded stimulus generators (sparse noise, flashed and drifting gratings) and a renderer.

Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people. Follow
local guidance and your local animal-care approvals when presenting these stimuli.
"""

from .gratings import combine_tables, make_drifting_gratings, make_flashed_gratings
from .sparse_noise import make_sparse_noise

__all__ = ["make_sparse_noise", "make_flashed_gratings", "make_drifting_gratings", "combine_tables"]
