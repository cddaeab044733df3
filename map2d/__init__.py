"""map2d: two-dimensional receptive fields from sparse noise and gratings, and a check that they agree.

The public API is listed here; submodules are imported on first use so ``import map2d`` stays fast.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_LAZY = {
    "load_session": "contract", "write_session": "contract", "Session": "contract",
    "SparseNoise": "contract", "GratingTable": "contract", "Spikes": "contract", "Traces": "contract",
    "Grid": "geometry", "Display": "geometry", "grating_image": "geometry", "wave_vector": "geometry",
    "BadInput": "errors",
    "interval_responses": "align",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    if name in _LAZY:
        module = importlib.import_module(f".{_LAZY[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'map2d' has no attribute {name!r}")


def __dir__():
    return __all__
