"""The all-cells-at-once code of the maps stage gives what the per-cell code it replaced gave.

``choose_maps`` and ``spike_latency`` (map2d.maps) and ``space_time`` (map2d.spacetime) used to loop over
cells (the latency also over each cell's spikes, lag by lag); they now work on blocks of cells. The old
implementations are kept, unchanged, in ``tests/reference_percell.py``; here both run on the same small
sessions and must agree to floating-point rounding (the sums are taken in another order, and the
first singular vector comes from the Gram matrix instead of an SVD: common practice, e.g. Golub & Van
Loan, Matrix Computations, 4th ed., section 8.6). Decisions (map kind, window, number of components,
direction) must be identical.
"""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest

from map2d.contract import Spikes
from map2d.maps import choose_maps, compute_maps, spike_latency
from map2d.spacetime import space_time

sys.path.insert(0, str(Path(__file__).parent))
import reference_percell as ref  # noqa: E402
import test_spacetime as st_cases  # noqa: E402


@pytest.fixture(scope="module")
def small_maps(small_spikes_session):
    session, _ = small_spikes_session
    maps = compute_maps(session.responses, session.sparse_noise, max_lag_s=0.2, n_shuffles=100, rng=0)
    assert maps.responsive.sum() >= 6            # enough responsive cells for the comparison to mean anything
    return session, maps


def _close(a, b, rtol=1e-9):
    a, b = np.asarray(a, float), np.asarray(b, float)
    assert np.array_equal(np.isnan(a), np.isnan(b))
    if np.isfinite(a).any():
        scale = np.nanmax(np.abs(a))
        assert np.nanmax(np.abs(a - b)) <= rtol * max(scale, 1e-300)


def _same_choice(a, b):
    assert np.array_equal(a.kind, b.kind)
    assert a.threshold_z == b.threshold_z
    for f in ("linear_share", "spatial", "linear_spatial", "peak", "z", "noise_sd"):
        _close(getattr(a, f), getattr(b, f))


def test_choose_maps_matches_the_per_cell_code(small_maps):
    _, maps = small_maps
    _same_choice(ref.choose_maps(maps), choose_maps(maps))
    # a result without the stored ON + OFF maps (their z from the ON and OFF sds), at another level
    no_both = dataclasses.replace(maps, both=None, both_z=None)
    _same_choice(ref.choose_maps(no_both, alpha=0.2), choose_maps(no_both, alpha=0.2))


def test_choose_maps_takes_on_plus_off_cells_like_the_per_cell_code(small_maps):
    # make every other responsive cell a complex-like cell (ON ~ OFF): both kinds must be exercised
    _, maps = small_maps
    resp = np.flatnonzero(maps.responsive)[::2]
    on, off, on_z, off_z = (np.array(getattr(maps, k)) for k in ("on", "off", "on_z", "off_z"))
    on[resp], on_z[resp] = off[resp] + 0.1 * on[resp], off_z[resp] + 0.1 * on_z[resp]
    both, both_z = on + off, (on_z + off_z) / np.sqrt(2)
    mixed = dataclasses.replace(maps, on=on, on_z=on_z, both=both, both_z=both_z)
    a, b = ref.choose_maps(mixed), choose_maps(mixed)
    assert (a.kind == "on+off").any() and (a.kind == "linear").any()
    _same_choice(a, b)


def test_spike_latency_matches_the_per_cell_code(small_maps):
    session, maps = small_maps
    old = ref.spike_latency(session.responses, session.sparse_noise, maps)
    new = spike_latency(session.responses, session.sparse_noise, maps)
    assert np.isfinite(old).sum() >= 6
    _close(old, new, rtol=1e-9)
    # coarser bins and another z floor; spikes handed over out of time order (sorted inside)
    sp = session.responses
    order = np.random.default_rng(0).permutation(sp.time_s.size)
    shuffled = Spikes(time_s=sp.time_s[order], cell=sp.cell[order], cell_ids=sp.cell_ids)
    _close(ref.spike_latency(sp, session.sparse_noise, maps, bins_per_frame=4, z_min=3.0),
           spike_latency(shuffled, session.sparse_noise, maps, bins_per_frame=4, z_min=3.0), rtol=1e-9)


def _same_space_time(a, b):
    for f in ("inseparable", "n_components", "direction_deg", "speed_deg_s", "axis_deg"):
        assert np.array_equal(np.asarray(getattr(a, f), float), np.asarray(getattr(b, f), float),
                              equal_nan=True), f
    for f in ("separability", "dsi", "denoised", "slice_across", "slice_along", "components",
              "time_courses"):
        _close(getattr(a, f), getattr(b, f), rtol=1e-9)


def test_space_time_matches_the_per_cell_code_on_a_session(small_maps):
    _, maps = small_maps
    ch = choose_maps(maps)
    C = maps.n_cells
    rng = np.random.default_rng(3)
    centres = np.where(rng.random((C, 1)) < 0.5, np.nan, rng.uniform(-5, 5, (C, 2)))   # NaN: peak pixel
    sizes = np.where(rng.random(C) < 0.5, np.nan, rng.uniform(1.0, 6.0, C))
    for kind in (ch.kind, np.full(C, "on+off")):
        _same_space_time(ref.space_time(maps, kind, centres, sizes), space_time(maps, kind, centres, sizes))


def test_space_time_matches_the_per_cell_code_on_tilted_fields():
    # Gabor fields drifting at several speeds and directions (tests/test_spacetime.py) in unit noise:
    # separable and inseparable maps, one and two components, windows of many sizes
    rng = np.random.default_rng(1)
    n = 30
    z = np.stack([st_cases._field(rng.uniform(0, 360), rng.uniform(0.05, 0.2), rng.choice([0.0, 2.0, 4.0]),
                                  rng.uniform(4, 12)) for _ in range(n)])
    z = z + rng.standard_normal(z.shape)
    maps = st_cases._maps(z)
    # ON and OFF maps for the 'on+off' cells: the field rectified either way, in their own noise
    maps.on = (np.maximum(z, 0) + rng.standard_normal(z.shape)).astype(np.float32)
    maps.off = (np.maximum(-z, 0) + rng.standard_normal(z.shape)).astype(np.float32)
    maps.on_z, maps.off_z = 1.5 * maps.on, 1.5 * maps.off
    kind = np.where(rng.random(n) < 0.3, "on+off", "linear")
    centres = np.where(rng.random((n, 1)) < 0.3, np.nan, rng.uniform(-4, 4, (n, 2)))
    sizes = np.where(rng.random(n) < 0.3, np.nan, rng.uniform(1, 5, n))
    a, b = ref.space_time(maps, kind, centres, sizes), space_time(maps, kind, centres, sizes)
    assert a.inseparable.sum() >= 3 and (a.n_components == 1).sum() >= 3
    _same_space_time(a, b)
