"""The benchmark runs in a tiny configuration (no timing assertions: timing lives in the benchmark),
and the fast paths added for speed equal slow reference computations written here.

Covered: map2d and both benchmark peers agree (spikes, several lags, odd grid, a cell without
spikes); frame-major spike rates; the word-wise event scan; the products streamed over blocks of
frames (observed and circularly shifted); the forked first shuffle stage equals the serial one; the Gumbel fit against scipy's; the
connected region against scipy.ndimage; chunked validation of memory-mapped dense frames.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage, stats

from map2d.align import _spike_rates, interval_responses
from map2d.contract import Session, SparseNoise, Spikes, Traces, load_session, write_session
from map2d.errors import BadInput
from map2d.geometry import Grid
from map2d.maps import (_component, _correlate, _DenseRows, _flatnonzero_int8, _gumbel_fit, _SparseCorrelator,
                        compute_maps)
from map2d.stimuli.sparse_noise import make_sparse_noise

BENCH = Path(__file__).resolve().parent.parent / "benchmarks" / "bench_maps.py"


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("bench_maps", BENCH)
    mod = importlib.util.module_from_spec(spec)
    sys.modules["bench_maps"] = mod
    spec.loader.exec_module(mod)
    return mod


def test_benchmark_tiny_run_peers_and_map2d_agree(bench, tmp_path, capsys):
    res = bench.main(["--minutes", "1", "--rate-hz", "30", "--cells", "6", "--grid", "5", "7", "--lags", "3",
                      "--repeats", "1", "--dense-gb", "0.002", "--workdir", str(tmp_path),
                      "--population", "all-responsive"])
    # compare_maps raises when map2d and a peer differ by more than float32 tolerance
    assert res["dense_vs_map2d_max_rel_diff"] < 1e-4
    assert res["per_cell_vs_map2d_max_rel_diff"] < 1e-4
    # the dense-movie part ran map2d on a memory-mapped float movie and measured its peak memory
    assert res["dense_frames"] > 0 and 0 < res["dense_peak_rss_gb"] < 1.5
    assert not (tmp_path / "dense_session").exists()              # the movie is deleted afterwards
    out = capsys.readouterr().out
    assert "dense float32 product" in out and "per-cell numpy STA" in out and "peer / default" in out
    # the default command (fits on) and its fit stage are timed, not only --no-fits
    assert res["map2d_with_fits"] > 0 and res["fit_stage"] > 0 and "fit stage alone" in out


def test_peers_equal_map2d_with_a_silent_cell_and_odd_grid(bench):
    s = bench.make_session(minutes=0.5, rate_hz=30.0, ny=5, nx=7, n_cells=4, rng=3)
    sp = s.responses
    keep = sp.cell != 2                                              # cell 2 has no spikes at all
    spikes = Spikes(time_s=sp.time_s[keep], cell=sp.cell[keep], cell_ids=np.arange(4))
    lags = [0, 1, 2, 3]
    res = compute_maps(spikes, s.sparse_noise, max_lag_s=3.5 / 30, n_shuffles=30, alpha=0.05, rng=0)
    assert res.lag_frames.tolist() == lags
    for peer in (bench.peer_per_cell, bench.peer_dense):
        maps = peer(s.sparse_noise, spikes, lags)
        for got, ref in zip((res.on, res.off, res.linear), maps):
            ref = ref.reshape(got.shape)
            np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
            np.testing.assert_allclose(got, ref, rtol=0, atol=2e-5 * np.nanmax(np.abs(ref)))  # float32
    assert np.all(res.on[2] == 0) and not res.responsive[2]


# ----------------------------------------------------------------------------------------------
# fast paths == slow references
# ----------------------------------------------------------------------------------------------
def test_frame_major_spike_rates_equal_the_slow_loop():
    rng = np.random.default_rng(0)
    starts = np.arange(50) * 0.1
    ends = starts + 0.1
    t = np.sort(rng.uniform(-0.5, 5.5, 400))                      # some before and after the frames
    cell = rng.integers(3, 7, t.size)                              # ids 3..6 (consecutive, offset)
    spikes = Spikes(time_s=t, cell=cell, cell_ids=np.arange(3, 8))  # cell 7 never fires
    slow = np.zeros((5, 50))
    for ti, ci in zip(t, cell):
        for k in range(50):
            if starts[k] <= ti < ends[k]:
                slow[ci - 3, k] += 1 / (ends[k] - starts[k])
    np.testing.assert_allclose(_spike_rates(spikes, starts, ends, frame_major=True), slow.T, rtol=1e-6)
    np.testing.assert_allclose(interval_responses(spikes, starts, ends), slow, rtol=1e-6)
    # intervals with gaps and non-consecutive ids take the general path
    ends2 = starts + 0.05
    ids = np.array([3, 4, 5, 6, 9])
    spikes2 = Spikes(time_s=t, cell=np.where(cell == 6, 9, cell), cell_ids=ids)
    slow2 = np.zeros((5, 50))
    for ti, ci in zip(t, spikes2.cell):
        for k in range(50):
            if starts[k] <= ti < ends2[k]:
                slow2[int(np.flatnonzero(ids == ci)[0]), k] += 1 / 0.05
    np.testing.assert_allclose(interval_responses(spikes2, starts, ends2), slow2, rtol=1e-6)


@pytest.mark.parametrize("n", [0, 7, 64, 1001])
def test_wordwise_event_scan_equals_flatnonzero(n):
    rng = np.random.default_rng(n)
    a = (rng.random(n) < 0.05).astype(np.int8) * rng.choice(np.array([-1, 1], np.int8), n)
    np.testing.assert_array_equal(_flatnonzero_int8(a), np.flatnonzero(a))


def test_stimulus_matrix_and_streamed_products_equal_dense_products():
    grid = Grid(ny=3, nx=5, dx_deg=1.0, dy_deg=1.0)
    sn = make_sparse_noise(grid, duration_s=4.0, rate_hz=10.0, spots_per_frame=2, min_distance_deg=0.0, rng=2)
    cor = _SparseCorrelator(sn.frames)
    dense = cor.B.toarray()
    flat = sn.frames.reshape(40, -1)
    np.testing.assert_array_equal(dense, np.concatenate([flat > 0, flat < 0], axis=1).astype(np.float32))
    X = np.random.default_rng(3).standard_normal((40, 4)).astype(np.float32)
    prov = _DenseRows(X)
    lags = np.array([0, 1, 3])
    for size in (7, 40):                                            # blocks of frames, or one block
        for shift in (0, 5, 39, 93):
            Y = _correlate(cor.chunks(size), prov, shift, lags, circular=True)
            for li, lag in enumerate(lags):
                ref = dense.T.astype(np.float64) @ np.roll(X, -(lag + shift), axis=0)   # X[t + lag + shift]
                np.testing.assert_allclose(Y[li], ref, rtol=1e-5, atol=1e-5)
        Y = _correlate(cor.chunks(size), prov, 0, lags, circular=False)
        for li, lag in enumerate(lags):
            ref = dense[:40 - lag].T.astype(np.float64) @ X[lag:]
            np.testing.assert_allclose(Y[li], ref, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("kind", ["spikes", "traces"])
def test_forked_first_shuffles_equal_serial(kind):
    grid = Grid(ny=5, nx=6, dx_deg=2.0, dy_deg=2.0)
    sn = make_sparse_noise(grid, duration_s=120.0, rate_hz=20.0, spots_per_frame=2, min_distance_deg=0.0, rng=4)
    rng = np.random.default_rng(5)
    if kind == "spikes":
        t = np.sort(rng.uniform(0, 120, 3000))
        resp = Spikes(time_s=t, cell=rng.integers(0, 5, t.size), cell_ids=np.arange(5))
    else:
        times = np.arange(0, 120, 1 / 15)
        resp = Traces(values=rng.standard_normal((4, times.size)).astype(np.float32), times_s=times)
    a = compute_maps(resp, sn, max_lag_s=0.15, n_shuffles=40, alpha=0.05, rng=1, n_jobs=1)
    b = compute_maps(resp, sn, max_lag_s=0.15, n_shuffles=40, alpha=0.05, rng=1, n_jobs=2)
    for name in ("on_z", "off_z", "linear_z", "p_value", "z_critical", "null_scale"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_gumbel_fit_equals_scipy_maximum_likelihood():
    rng = np.random.default_rng(7)
    x = stats.gumbel_r.rvs(loc=4.0, scale=0.3, size=(3, 200), random_state=rng)
    w = np.ones_like(x)
    w[2, 150:] = 0                                                  # a row with fewer samples
    mu, beta = _gumbel_fit(np.where(w > 0, x, 0.0), w)
    for r in range(3):
        ref = stats.gumbel_r.fit(x[r, w[r] > 0])                    # scipy.stats as reference library
        np.testing.assert_allclose([mu[r], beta[r]], ref, rtol=1e-4)


def test_connected_region_equals_ndimage_label():
    rng = np.random.default_rng(8)
    for _ in range(20):
        mask = rng.random((7, 9)) < 0.45
        i, j = np.argwhere(mask)[0]
        lab, _ = ndimage.label(mask, structure=np.ones((3, 3), bool))   # scipy.ndimage as reference
        np.testing.assert_array_equal(_component(mask, i, j), lab == lab[i, j])


def test_dense_frames_are_memory_mapped_and_checked_in_chunks(tmp_path):
    grid = Grid(ny=4, nx=4, dx_deg=1.0, dy_deg=1.0)
    F = 300
    frames = np.random.default_rng(9).standard_normal((F, 4, 4)).astype(np.float32)
    sn = SparseNoise(frames=frames, times_s=np.arange(F) / 30.0, grid=grid)
    spikes = Spikes(time_s=np.array([1.0, 2.0]), cell=np.array([0, 0]))
    write_session(tmp_path / "s", Session(responses=spikes, sparse_noise=sn))
    loaded = load_session(tmp_path / "s").sparse_noise.frames
    assert isinstance(loaded, np.memmap) and not loaded.flags.writeable
    np.testing.assert_array_equal(loaded, frames)
    bad = np.lib.format.open_memmap(tmp_path / "s" / "sparse_noise.npy", mode="r+")
    bad[257, 1, 2] = np.nan
    bad.flush()
    del bad
    with pytest.raises(BadInput, match="row 257"):
        load_session(tmp_path / "s")
