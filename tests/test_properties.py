"""Property-based tests (hypothesis): random valid sessions round-trip through the session folder, random
small defects only ever raise BadInput, and the map estimator behaves as geometry and symmetry demand."""

from __future__ import annotations

import dataclasses
import json
import math
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from map2d.contract import (GRATING_COLUMNS, GratingTable, InputWarning, Session, SparseNoise, Spikes, Traces,
                            load_session, write_session)
from map2d.errors import BadInput
from map2d.geometry import Grid
from map2d.maps import compute_maps, map_centroid_deg
from map2d.stimuli import make_sparse_noise

FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
FEW = settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])

finite = dict(allow_nan=False, allow_infinity=False)


# ------------------------------------------------------------------------------------------------
# random valid sessions
# ------------------------------------------------------------------------------------------------
@st.composite
def grids(draw):
    return Grid(ny=draw(st.integers(1, 5)), nx=draw(st.integers(1, 5)),
                center_x_deg=draw(st.floats(-60, 60, **finite)), center_y_deg=draw(st.floats(-40, 40, **finite)),
                dx_deg=draw(st.floats(0.05, 20, **finite)), dy_deg=draw(st.floats(0.05, 20, **finite)))


@st.composite
def increasing_times(draw, n, start=0.0):
    """``n`` strictly increasing float64 times (irregular steps)."""
    steps = draw(hnp.arrays(np.float64, n, elements=st.floats(1e-3, 0.5, **finite)))
    t = start + np.cumsum(steps)
    assert np.all(np.diff(t) > 0)
    return t


@st.composite
def sparse_noises(draw):
    grid = draw(grids())
    n = draw(st.integers(2, 30))
    frames = draw(hnp.arrays(np.int8, (n, grid.ny, grid.nx), elements=st.sampled_from([-1, 0, 1])))
    return SparseNoise(frames=frames, times_s=draw(increasing_times(n)), grid=grid)


@st.composite
def grating_tables(draw):
    n = draw(st.integers(1, 8))
    onset = draw(increasing_times(n, start=draw(st.floats(-5, 5, **finite))))
    dur = draw(hnp.arrays(np.float64, n, elements=st.floats(1e-3, 2.0, **finite)))
    contrast = draw(hnp.arrays(np.float64, n, elements=st.sampled_from([0.0, 0.25, 1.0])))
    sf = draw(hnp.arrays(np.float64, n, elements=st.floats(1e-3, 2.0, **finite)))
    cols = dict(onset_s=onset, offset_s=onset + dur,
                orientation_deg=draw(hnp.arrays(np.float64, n, elements=st.floats(0, 360, **finite))),
                sf_cpd=np.where(contrast > 0, sf, draw(st.sampled_from([0.0, 0.1]))),
                phase_deg=draw(hnp.arrays(np.float64, n, elements=st.floats(-180, 360, **finite))),
                contrast=contrast,
                tf_hz=draw(hnp.arrays(np.float64, n, elements=st.sampled_from([0.0, 1.0, 2.5]))))
    origin = (draw(st.floats(-30, 30, **finite)), draw(st.floats(-30, 30, **finite)))
    return GratingTable.from_columns(phase_origin_deg=origin, **cols)


@st.composite
def responses(draw):
    if draw(st.booleans()):
        n = draw(st.integers(0, 40))
        t = np.sort(draw(hnp.arrays(np.float64, n, elements=st.floats(-2, 20, **finite))))
        cell = draw(hnp.arrays(np.int64, n, elements=st.integers(0, 6)))
        ids = np.union1d(cell, draw(st.lists(st.integers(0, 9), min_size=0 if n else 1, max_size=3)))
        return Spikes(time_s=t, cell=cell, cell_ids=ids)
    n = draw(st.integers(2, 40))
    values = draw(hnp.arrays(np.float32, (draw(st.integers(1, 3)), n),
                             elements=st.floats(-10, 10, width=32) | st.just(np.nan)))
    return Traces(values=values, times_s=draw(increasing_times(n)))


@st.composite
def sessions(draw):
    sn = draw(st.none() | sparse_noises())
    gr = draw(st.none() | grating_tables())
    r = draw(responses())
    # responses that share no time with the stimuli are refused (another clock): keep some overlap
    starts = [a[0] for a in (sn and sn.times_s, gr and gr.onset_s) if a is not None]
    if starts:
        t0 = min(starts)
        if isinstance(r, Spikes) and r.time_s.size:
            moved = np.maximum(r.time_s + (t0 - r.time_s[0]), t0)          # sorted, none before t0
            r = Spikes(time_s=np.r_[t0, moved], cell=np.r_[r.cell[0], r.cell],
                       cell_ids=r.cell_ids)
        elif isinstance(r, Traces):
            r = Traces(values=r.values, times_s=r.times_s + (t0 - r.times_s[0]))
    return Session(responses=r, sparse_noise=sn, gratings=gr, name="prop")


def _quiet_load(folder):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return load_session(folder)


@FAST
@given(sessions())
def test_random_valid_sessions_round_trip(s):
    with tempfile.TemporaryDirectory() as tmp:
        write_session(Path(tmp) / "s", s)
        back = _quiet_load(Path(tmp) / "s")
    r, b = s.responses, back.responses
    assert type(r) is type(b)
    if isinstance(r, Spikes):
        assert np.array_equal(b.time_s, r.time_s) and np.array_equal(b.cell, r.cell)
        assert np.array_equal(b.cell_ids, r.cell_ids)
    else:
        assert np.array_equal(b.values, r.values, equal_nan=True) and np.array_equal(b.times_s, r.times_s)
    if s.sparse_noise is None:
        assert back.sparse_noise is None
    else:
        assert np.array_equal(back.sparse_noise.frames, s.sparse_noise.frames)
        assert np.array_equal(back.sparse_noise.times_s, s.sparse_noise.times_s)
        assert back.sparse_noise.grid == s.sparse_noise.grid
    if s.gratings is None:
        assert back.gratings is None
    else:
        for c in GRATING_COLUMNS:
            assert np.array_equal(getattr(back.gratings, c), getattr(s.gratings, c)), c
        assert tuple(back.gratings.phase_origin_deg) == tuple(s.gratings.phase_origin_deg)


# ------------------------------------------------------------------------------------------------
# random small defects: BadInput or a consistent session, never another exception
# ------------------------------------------------------------------------------------------------
json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-10**20, 10**20) | st.floats() | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3),
    max_leaves=6)

MANIFEST_PATHS = [("responses",), ("responses", "kind"), ("responses", "file"), ("responses", "cell_ids"),
                  ("sparse_noise",), ("sparse_noise", "frames"), ("sparse_noise", "times"),
                  ("sparse_noise", "grid"), ("sparse_noise", "grid", "center_deg"),
                  ("sparse_noise", "grid", "spacing_deg"), ("sparse_noise", "exclude_gaps"),
                  ("gratings",), ("gratings", "table"), ("gratings", "phase_origin_deg"), ("display",),
                  ("rois",), ("name",)]

ARRAY_FILES = ["sparse_noise.npy", "sparse_noise_times.npy", "traces.npy", "trace_times.npy"]

random_arrays = hnp.arrays(
    dtype=st.sampled_from([np.int8, np.uint8, np.int64, np.float32, np.float64, np.bool_, np.complex64,
                           np.dtype("U3")]),
    shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=4))


def _base_session(kind):
    grid = Grid(ny=3, nx=4, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=2.0)
    sn = make_sparse_noise(grid, duration_s=2.0, rate_hz=10.0, spots_per_frame=1, min_distance_deg=1.0, rng=0)
    g = GratingTable.from_columns(onset_s=[3.0, 4.0], offset_s=[3.5, 4.5], orientation_deg=[0, 90],
                                  sf_cpd=[0.1, 0.2], phase_deg=[0, 90], contrast=[1, 0.5], tf_hz=[0, 2])
    if kind == "spikes":
        resp = Spikes(time_s=np.array([0.1, 0.5, 1.2, 3.2]), cell=np.array([0, 1, 0, 2]))
    else:
        resp = Traces(values=np.ones((2, 6), np.float32), times_s=np.arange(6) * 0.5)
    return Session(responses=resp, sparse_noise=sn, gratings=g)


def _check_loaded(s):
    if s.sparse_noise is not None:
        sn = s.sparse_noise
        assert sn.frames.ndim == 3 and sn.times_s.shape == (sn.frames.shape[0],)
        assert np.all(np.diff(sn.times_s) > 0) and sn.frames.shape[1:] == sn.grid.shape
        assert math.isfinite(sn.grid.dx_deg) and sn.grid.dx_deg > 0 and sn.grid.dy_deg > 0
    r = s.responses
    if isinstance(r, Traces):
        assert r.values.ndim == 2 and r.times_s.shape == (r.values.shape[1],)
    else:
        assert r.cell_ids.size >= 1 and np.isin(r.cell, r.cell_ids).all()


def _load_or_refuse(folder):
    try:
        s = _quiet_load(folder)
    except BadInput as exc:
        assert "\n" not in str(exc)
        event("refused")
        return None
    _check_loaded(s)
    event("loaded")
    return s


@FAST
@given(kind=st.sampled_from(["spikes", "traces"]), path=st.sampled_from(MANIFEST_PATHS), value=json_values,
       delete=st.booleans())
def test_random_manifest_values_raise_only_bad_input(kind, path, value, delete):
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_session(Path(tmp) / "s", _base_session(kind))
        m = json.loads((folder / "session.json").read_text())
        node = m
        for key in path[:-1]:
            node = node.setdefault(key, {}) if isinstance(node.get(key), dict) or key not in node else node[key]
        if not isinstance(node, dict):
            return
        if delete:
            node.pop(path[-1], None)
        else:
            node[path[-1]] = value
        (folder / "session.json").write_text(json.dumps(m))
        _load_or_refuse(folder)


@FAST
@given(kind=st.sampled_from(["spikes", "traces"]), name=st.sampled_from(ARRAY_FILES), arr=random_arrays)
def test_random_arrays_in_place_of_a_file_raise_only_bad_input(kind, name, arr):
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_session(Path(tmp) / "s", _base_session(kind))
        np.save(folder / name, arr)
        _load_or_refuse(folder)


@FAST
@given(arrays=st.dictionaries(st.sampled_from(["time_s", "cell", "other"]), random_arrays, max_size=3))
def test_random_spike_archives_raise_only_bad_input(arrays):
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_session(Path(tmp) / "s", _base_session("spikes"))
        np.savez(folder / "spikes.npz", **arrays)
        _load_or_refuse(folder)


@FAST
@given(row=st.integers(0, 2), col=st.integers(0, 7), text=st.text(max_size=10))
def test_random_csv_cells_raise_only_bad_input(row, col, text):
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_session(Path(tmp) / "s", _base_session("spikes"))
        lines = (folder / "gratings.csv").read_text().splitlines()
        fields = lines[row].split(",")
        if col < len(fields):
            fields[col] = text
        else:
            fields.append(text)
        lines[row] = ",".join(fields)
        (folder / "gratings.csv").write_text("\n".join(lines) + "\n", encoding="utf-8", errors="surrogatepass")
        s = _load_or_refuse(folder)
        if s is not None:
            g = s.gratings
            assert all(np.isfinite(getattr(g, c)).all() for c in GRATING_COLUMNS)
            assert np.all(g.offset_s > g.onset_s)


# ------------------------------------------------------------------------------------------------
# the estimator: geometry and symmetry
# ------------------------------------------------------------------------------------------------
MAP_GRID = Grid(ny=6, nx=7, center_x_deg=0.0, center_y_deg=0.0, dx_deg=2.0, dy_deg=1.5)


@pytest.fixture(scope="module")
def lnp():
    """Sparse noise and three linear-nonlinear-Poisson cells: an ON cell at pixel (2, 3), an OFF cell
    at (4, 1), both one frame after the spot, and an unresponsive cell (Chichilnisky 2001 for the
    model; 400 frames at 20 Hz)."""
    sn = make_sparse_noise(MAP_GRID, duration_s=20.0, rate_hz=20.0, spots_per_frame=2, min_distance_deg=3.0,
                           rng=11)
    rng = np.random.default_rng(12)
    F, dt = sn.n_frames, 1 / 20.0
    drive = np.zeros((3, F))
    drive[0, 1:] = sn.frames[:-1, 2, 3] == 1
    drive[1, 1:] = sn.frames[:-1, 4, 1] == -1
    counts = rng.poisson((5.0 + 80.0 * drive) * dt)
    cell = np.repeat(np.repeat(np.arange(3), F), counts.ravel())
    t = np.repeat(np.tile(sn.times_s, 3), counts.ravel()) + rng.uniform(0, dt, counts.sum())
    order = np.argsort(t)
    return sn, Spikes(time_s=t[order], cell=cell[order])


def _maps(spikes, sn):
    return compute_maps(spikes, sn, max_lag_s=0.1, n_shuffles=20, alpha=0.05, rng=5)


def test_lnp_cells_are_found_where_they_were_put(lnp):
    sn, spikes = lnp
    res = _maps(spikes, sn)
    assert res.responsive.tolist() == [True, True, False]
    assert res.peak_lag_index[:2].tolist() == [1, 1]
    # pixel (row 2, col 3): x = 0 + (3 - 3) * 2 = 0, y = 0 - (2 - 2.5) * 1.5 = 0.75 (contract formula)
    assert map_centroid_deg(res, 0) == pytest.approx((0.0, 0.75), abs=0.3)
    # pixel (row 4, col 1): x = (1 - 3) * 2 = -4, y = -(4 - 2.5) * 1.5 = -2.25
    assert map_centroid_deg(res, 1) == pytest.approx((-4.0, -2.25), abs=0.3)


@FEW
@given(shift_x=st.floats(-40, 40, **finite), shift_y=st.floats(-40, 40, **finite))
def test_shifting_the_grid_centre_shifts_every_estimated_centre(lnp, shift_x, shift_y):
    sn, spikes = lnp
    base = _maps(spikes, sn)
    moved_grid = dataclasses.replace(sn.grid, center_x_deg=sn.grid.center_x_deg + shift_x,
                                     center_y_deg=sn.grid.center_y_deg + shift_y)
    moved = _maps(spikes, SparseNoise(frames=sn.frames, times_s=sn.times_s, grid=moved_grid))
    assert np.array_equal(moved.responsive, base.responsive)
    for c in range(base.n_cells):
        x0, y0 = map_centroid_deg(base, c)
        x1, y1 = map_centroid_deg(moved, c)
        if not base.responsive[c]:
            assert math.isnan(x1) and math.isnan(y1)
            continue
        assert x1 == pytest.approx(x0 + shift_x, abs=1e-9) and y1 == pytest.approx(y0 + shift_y, abs=1e-9)


def test_flipping_spot_polarity_flips_the_linear_map(lnp):
    sn, spikes = lnp
    base = _maps(spikes, sn)
    flipped = _maps(spikes, SparseNoise(frames=(-sn.frames).astype(np.int8), times_s=sn.times_s, grid=sn.grid))
    np.testing.assert_allclose(flipped.linear, -base.linear, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(flipped.on, base.off, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(flipped.linear_z, -base.linear_z, rtol=1e-4, atol=1e-4)
    assert flipped.polarity.tolist()[:2] == ["OFF-centre", "ON-centre"]


@FEW
@given(perm=st.permutations([0, 1, 2]), offset=st.integers(0, 50))
def test_permuting_cell_ids_permutes_the_rows(lnp, perm, offset):
    sn, spikes = lnp
    base = _maps(spikes, sn)
    new_id = np.asarray(perm) + offset                   # cell k becomes cell new_id[k]
    relabelled = Spikes(time_s=spikes.time_s, cell=new_id[spikes.cell])
    res = _maps(relabelled, sn)
    assert res.cell_ids.tolist() == sorted(new_id.tolist())
    for old in range(3):
        row = int(np.flatnonzero(res.cell_ids == new_id[old])[0])
        np.testing.assert_array_equal(res.linear[row], base.linear[old])
        np.testing.assert_array_equal(res.linear_z[row], base.linear_z[old])
        assert res.responsive[row] == base.responsive[old]
        assert res.peak_lag_index[row] == base.peak_lag_index[old]
        assert res.p_value[row] == base.p_value[old] or (np.isnan(res.p_value[row]) and np.isnan(base.p_value[old]))
