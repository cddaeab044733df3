"""Reverse-correlation engine: correctness against a slow reference, geometry, polarity, lag, null
statistics, dense (white and correlated) noise, traces, and the ``map2d maps`` command.

The generator below is a small linear-nonlinear-Poisson model written for these tests: rate =
baseline + gain * max(drive, 0) (or rectified linear), drive = the spatial kernel applied to the frame
``latency`` frames earlier.
"""

from __future__ import annotations

import csv

import numpy as np
import pytest
from scipy import ndimage, stats

from map2d.cli import main
from map2d.contract import Session, SparseNoise, Spikes, write_session
from map2d.geometry import Grid
from map2d.maps import (compute_maps, dense_sta, frame_responses, map_centroid_deg, map_lags,
                        whitened_sta)
from map2d.models import gaussian2d
from map2d.stimuli.sparse_noise import make_sparse_noise

from _lnp import spikes_from_rates, traces_from_rates


# ----------------------------------------------------------------------------------------------
# small LNP generator
# ----------------------------------------------------------------------------------------------
def _kernel(grid, x0, y0, sigma, sign):
    xg, yg = grid.mesh_deg()
    return sign * gaussian2d(xg, yg, x0, y0, sigma, sigma)


def _rates(noise, kernels, latency, base=5.0, gain=40.0):
    """Per-frame rates (cells, F): base + gain * drive, rectified; drive at frame t from frame t - latency."""
    F = noise.n_frames
    S = noise.frames.reshape(F, -1).astype(float)
    K = np.array([k.ravel() for k in kernels]) if len(kernels) else np.zeros((0, S.shape[1]))
    drive = K @ S.T                                       # (cells, F)
    lagged = np.zeros_like(drive)
    lagged[:, latency:] = drive[:, :F - latency]
    return np.maximum(base + gain * lagged, 0.0)


_spikes_from_rates = spikes_from_rates


def _traces_from_rates(noise, rates, rng, fs=30.0, tau_s=1.0, noise_sd=0.05, amp=0.02):
    return traces_from_rates(noise, rates, rng, fs, tau_s, noise_sd, amp)


GRID = Grid(ny=9, nx=11, center_x_deg=10.0, center_y_deg=-4.0, dx_deg=2.0, dy_deg=2.0)


@pytest.fixture(scope="module")
def noise():
    return make_sparse_noise(GRID, duration_s=240.0, rate_hz=20.0, spots_per_frame=4, min_distance_deg=4.0,
                             rng=11)


# ----------------------------------------------------------------------------------------------
# fast path == slow reference
# ----------------------------------------------------------------------------------------------
def _slow_maps(R, frames, lags):
    """Explicit loops: mean response l frames after each bright/dark spot, minus the cell's mean."""
    C, F = R.shape
    ny, nx = frames.shape[1:]
    out = np.full((3, C, len(lags), ny, nx), np.nan)
    for c in range(C):
        ok = np.isfinite(R[c])
        mean = R[c][ok].mean()
        for li, lag in enumerate(lags):
            for i in range(ny):
                for j in range(nx):
                    for kind, val in ((0, 1), (1, -1)):
                        vals = [R[c, t + lag] for t in range(F - lag)
                                if frames[t, i, j] == val and np.isfinite(R[c, t + lag])]
                        if vals:
                            out[kind, c, li, i, j] = np.mean(vals) - mean
            out[2, c, li] = out[0, c, li] - out[1, c, li]
    return out


@pytest.mark.parametrize("kind", ["spikes", "traces"])
def test_fast_maps_equal_slow_reference(kind):
    grid = Grid(ny=5, nx=7, dx_deg=3.0, dy_deg=2.5)        # odd, non-square grid
    sn = make_sparse_noise(grid, duration_s=30.0, rate_hz=15.0, spots_per_frame=2, min_distance_deg=0.0, rng=3)
    rng = np.random.default_rng(4)
    kernels = [_kernel(grid, 3.0, 2.5, 3.0, 1), _kernel(grid, -6.0, -2.5, 3.0, -1), 0 * _kernel(grid, 0, 0, 1, 1)]
    rates = _rates(sn, kernels, latency=1)
    rates[2] = 0.0                                          # a cell with no spikes at all
    if kind == "spikes":
        resp = _spikes_from_rates(sn, rates, rng)
    else:
        resp = _traces_from_rates(sn, rates, rng, fs=40.0)
        resp.values[1, 100:160] = np.nan                    # a gap of NaN samples in one cell
    R = frame_responses(resp, sn).astype(np.float64)
    if kind == "traces":
        assert np.isnan(R[1]).any() and not np.isnan(R[0]).any()
    res = compute_maps(resp, sn, max_lag_s=0.2, n_shuffles=30, alpha=0.05, rng=0)
    lags = map_lags(sn.frame_interval_s, 0.2)
    assert lags.tolist() == [0, 1, 2, 3]
    slow = _slow_maps(R, sn.frames, lags)
    for k, name in enumerate(("on", "off", "linear")):
        fast = res.maps(name)
        assert fast.dtype == np.float32 and fast.shape == (3, 4, 5, 7)
        scale = np.nanmax(np.abs(slow[k])) + 1e-12
        np.testing.assert_array_equal(np.isnan(fast), np.isnan(slow[k]))
        np.testing.assert_allclose(fast, slow[k], rtol=0, atol=2e-5 * scale)  # float32 tolerance
    # the silent cell has flat zero maps, no z, and is not called responsive
    if kind == "spikes":
        assert np.all(res.on[2] == 0) and np.all(np.isnan(res.on_z[2]))
        assert not res.responsive[2] and np.isnan(res.p_value[2]) and np.isnan(res.peak_lag_s[2])


# ----------------------------------------------------------------------------------------------
# geometry, polarity, lag
# ----------------------------------------------------------------------------------------------
def test_position_polarity_and_lag_spikes(noise):
    # cells centred on pixel centres: (row 1, col 2) near the top left, (row 7, col 8) low right
    x_a, y_a = GRID.point_of(1, 2)
    x_b, y_b = GRID.point_of(7, 8)
    kernels = [_kernel(GRID, x_a, y_a, 2.0, +1), _kernel(GRID, x_b, y_b, 2.0, -1)]
    rates = _rates(noise, kernels, latency=3)
    res = compute_maps(_spikes_from_rates(noise, rates, 5), noise, max_lag_s=0.25, n_shuffles=100, rng=1)
    assert res.responsive.all()
    assert res.polarity.tolist() == ["ON-centre", "OFF-centre"]
    # peak lag = simulated latency (3 frames) within one frame
    assert np.all(np.abs(res.peak_lag_index - 3) <= 1)
    np.testing.assert_allclose(res.peak_lag_s, res.lags_s[res.peak_lag_index])
    # row 0 is the top (contract): the ON cell's peak lies in row 1, and its centre comes out in degrees
    li = res.peak_lag_index[0]
    i, j = np.unravel_index(np.nanargmax(res.linear[0, li]), GRID.shape)
    assert (i, j) == (1, 2)
    assert y_a > GRID.center_y_deg                          # elevation above the centre: top rows
    for c, (x, y) in enumerate([(x_a, y_a), (x_b, y_b)]):
        cx, cy = map_centroid_deg(res, c)
        assert abs(cx - x) < 0.5 and abs(cy - y) < 0.5      # issue 3: centres within 0.5 deg
    # the OFF cell's linear map is negative at its centre and its OFF map is excitatory there
    i, j = 7, 8
    assert res.linear[1, res.peak_lag_index[1], i, j] < 0 < res.off[1, res.peak_lag_index[1], i, j]
    assert np.all(res.snr > 5)


def test_mixed_polarity_for_on_off_cell(noise):
    # rectified ON and OFF drives at the same place: responds to both polarities (ON-OFF cell)
    x0, y0 = GRID.point_of(4, 5)
    k = _kernel(GRID, x0, y0, 2.0, +1).ravel()
    S = noise.frames.reshape(noise.n_frames, -1).astype(float)
    drive = np.abs(S @ k)
    lagged = np.r_[np.zeros(2), drive[:-2]]
    rates = (5 + 40 * lagged)[None]
    res = compute_maps(_spikes_from_rates(noise, rates, 6), noise, max_lag_s=0.15, n_shuffles=100, rng=2)
    assert res.responsive[0]
    assert res.polarity[0] == "ON-OFF"                     # the ON + OFF map carries it (issue 13)
    assert res.onoff_overlap[0] > 0.7                      # same pixels excite for bright and dark


def test_on_off_cell_found_by_the_either_polarity_map(noise):
    # an ON-OFF cell too weak for the ON or the OFF map alone: neither reaches the max-statistic's
    # critical value, the ON + OFF map (excitation by either contrast, the fourth kind) does
    x0, y0 = GRID.point_of(4, 5)
    k = _kernel(GRID, x0, y0, 2.0, +1).ravel()
    S = noise.frames.reshape(noise.n_frames, -1).astype(float)
    lagged = np.r_[np.zeros(2), np.abs(S @ k)[:-2]]
    res = compute_maps(_spikes_from_rates(noise, (5 + 8 * lagged)[None], 6), noise, max_lag_s=0.15,
                       n_shuffles=100, rng=2)
    assert res.responsive[0] and res.polarity[0] == "ON-OFF"
    assert max(np.nanmax(res.on_z[0]), np.nanmax(res.off_z[0])) < res.z_critical[0]    # measured 4.58 < 4.82
    assert np.nanmax(res.both_z[0]) >= res.z_critical[0]                              # measured 6.42
    li = res.peak_lag_index[0]
    i, j = np.unravel_index(np.nanargmax(res.both_z[0, li]), GRID.shape)
    assert abs(i - 4) <= 1 and abs(j - 5) <= 1


def test_traces_position_and_polarity(noise):
    x_a, y_a = GRID.point_of(2, 8)
    kernels = [_kernel(GRID, x_a, y_a, 2.0, -1), _kernel(GRID, x_a, y_a, 2.0, 0)]
    rates = _rates(noise, kernels, latency=2, base=2.0, gain=30.0)
    tr = _traces_from_rates(noise, rates, 7, fs=30.0, tau_s=0.8)
    res = compute_maps(tr, noise, max_lag_s=0.5, n_shuffles=100, rng=3)
    assert res.unit == "trace units"
    assert res.responsive.tolist() == [True, False]
    assert res.polarity[0] == "OFF-centre"
    cx, cy = map_centroid_deg(res, 0)
    assert abs(cx - x_a) < 0.5 and abs(cy - y_a) < 0.5
    # calcium decay delays the peak: it is at or after the simulated latency
    assert res.peak_lag_index[0] >= 2


# ----------------------------------------------------------------------------------------------
# null statistics (Chichilnisky 2001, Network 12:199; max-statistic: Nichols & Holmes 2002)
# ----------------------------------------------------------------------------------------------
def _null_check(res, alpha):
    z = np.concatenate([res.on_z.ravel(), res.off_z.ravel(), res.linear_z.ravel(), res.both_z.ravel()])
    z = z[np.isfinite(z)]
    assert abs(z.std() - 1) < 0.05                         # issue 3: null z sd 1 +- 0.05
    assert abs(z.mean()) < 0.05
    n = res.n_cells
    # false positives: at most alpha on average; allow binomial sampling error (99.9 % point)
    k = int(res.responsive.sum())
    assert k <= stats.binom.ppf(0.999, n, alpha), (k, n)
    return k


def test_null_spikes_z_sd_one_and_false_positives(noise):
    rates = np.full((150, noise.n_frames), 4.0)
    spk = _spikes_from_rates(noise, rates, 8)
    res = compute_maps(spk, noise, max_lag_s=0.2, n_shuffles=100, alpha=0.05, rng=4)
    k = _null_check(res, 0.05)
    assert k / 150 <= 0.05 + 0.03
    # p-values of null cells are roughly uniform: about half above 0.5
    p = res.p_value
    assert 0.3 < np.mean(p > 0.5) < 0.7
    assert np.all(res.peak_lag_index == -1) == (k == 0)


def test_null_traces_z_sd_one_and_false_positives(noise):
    rates = np.full((120, noise.n_frames), 3.0)
    tr = _traces_from_rates(noise, rates, 9, fs=30.0, tau_s=1.5, noise_sd=0.02)
    res = compute_maps(tr, noise, max_lag_s=0.3, n_shuffles=100, alpha=0.05, rng=5)
    _null_check(res, 0.05)


def test_null_held_frames_need_shuffle_scale():
    # each pattern held for 3 frames: events of a pixel come in runs, so the analytic sd is too small
    # for autocorrelated responses; the shuffle calibration must bring the z sd back to 1
    grid = Grid(ny=6, nx=6, dx_deg=5.0, dy_deg=5.0)
    base = make_sparse_noise(grid, duration_s=200.0, rate_hz=20.0 / 3, spots_per_frame=3,
                             min_distance_deg=0.0, rng=12)
    frames = np.repeat(base.frames, 3, axis=0)
    times = np.arange(frames.shape[0]) / 20.0
    sn = SparseNoise(frames=frames, times_s=times, grid=grid)
    tr = _traces_from_rates(sn, np.full((60, sn.n_frames), 3.0), 13, fs=30.0, tau_s=1.0, noise_sd=0.02)
    res = compute_maps(tr, sn, max_lag_s=0.2, n_shuffles=100, alpha=0.05, rng=6)
    assert np.nanmedian(res.null_scale) > 1.3                # the analytic sd alone would be wrong
    _null_check(res, 0.05)


# ----------------------------------------------------------------------------------------------
# dense noise
# ----------------------------------------------------------------------------------------------
def _correlated_gaussian(F, shape, width, rng):
    rng = np.random.default_rng(rng)
    s = ndimage.gaussian_filter(rng.standard_normal((F,) + shape), sigma=(0, width, width), mode="wrap")
    return (s / s.std()).astype(np.float32)


def test_correlated_noise_sta_is_covariance_times_kernel_and_whitening_recovers_kernel():
    rng = np.random.default_rng(20)
    shape = (8, 9)
    F = 6000
    frames = _correlated_gaussian(F, shape, 1.0, rng)
    grid = Grid(ny=8, nx=9)
    xg, yg = grid.mesh_deg()
    # an oriented Gabor-like kernel with fine structure that the stimulus correlation blurs
    k = np.exp(-((xg - 0.5) ** 2 + (yg + 0.5) ** 2) / 4.0) * np.cos(2 * np.pi * 0.2 * xg)
    S = frames.reshape(F, -1).astype(float)
    lat = 1
    r = np.zeros(F)
    r[lat:] = S[:-lat] @ k.ravel()
    r = (r + 0.5 * rng.standard_normal(F))[None]
    sta = dense_sta(r, frames, [0, 1, 2])
    Sc = S - S.mean(0)
    cov = Sc.T @ Sc / F
    predicted = (cov @ k.ravel()).reshape(shape)            # derived: E[s r] = E[s s^T] k
    cos = lambda a, b: float(a.ravel() @ b.ravel() / np.linalg.norm(a) / np.linalg.norm(b))
    assert cos(sta[0, 1], predicted) > 0.98
    assert abs(np.linalg.norm(sta[0, 1]) / np.linalg.norm(predicted) - 1) < 0.1
    assert cos(sta[0, 1], k) < 0.85                         # the raw STA is blurred by the correlation
    w, lam = whitened_sta(r, frames, [0, 1, 2], return_lambda=True)
    assert cos(w[0, 1], k) > 0.95                           # issue 3 (least squares / whitening, derived)
    assert np.linalg.norm(w[0, 0]) < 0.3 * np.linalg.norm(w[0, 1])
    assert lam.shape == (1,) and lam[0] > 0
    # compute_maps routes correlated real-valued noise to the whitened estimate
    sn = SparseNoise(frames=frames, times_s=np.arange(F) * 0.05, grid=grid)
    res = compute_maps(r, sn, max_lag_s=0.1, n_shuffles=100, rng=0)
    assert res.method == "whitened" and res.stimulus == "dense"
    assert res.responsive[0] and res.peak_lag_index[0] == 1
    assert cos(res.linear[0, 1], k) > 0.95
    assert np.all(np.isnan(res.on))


def test_white_dense_noise_uses_plain_sta_with_unit_null():
    rng = np.random.default_rng(21)
    F, shape = 5000, (6, 7)
    frames = rng.choice(np.array([-1.0, 1.0], np.float32), size=(F,) + shape)   # dense binary noise
    grid = Grid(ny=6, nx=7)
    k = np.zeros(shape)
    k[2, 3], k[2, 4] = 1.0, -0.5
    S = frames.reshape(F, -1)
    drive = np.r_[0.0, (S @ k.ravel())[:-1]]
    resp = rng.poisson(np.maximum(2 + 1.5 * drive, 0))[None].astype(float)
    null = rng.poisson(2.0, size=(40, F)).astype(float)
    R = np.vstack([resp, null])
    sn = SparseNoise(frames=frames, times_s=np.arange(F) * 0.02, grid=grid)
    res = compute_maps(R, sn, max_lag_s=0.06, n_shuffles=100, alpha=0.05, rng=1)
    assert res.method == "sta"
    assert res.responsive[0] and res.peak_lag_index[0] == 1
    # in response units per unit stimulus the white-noise map is the kernel (x 1.5 gain)
    np.testing.assert_allclose(res.linear[0, 1, 2, 3], 1.5, atol=0.15)
    np.testing.assert_allclose(res.linear[0, 1, 2, 4], -0.75, atol=0.15)
    z = res.linear_z[1:][np.isfinite(res.linear_z[1:])]
    assert abs(z.std() - 1) < 0.05
    assert res.responsive[1:].sum() <= stats.binom.ppf(0.999, 40, 0.05)


def test_dense_sta_streams_memory_mapped_frames(tmp_path):
    rng = np.random.default_rng(22)
    frames = rng.standard_normal((3000, 4, 5)).astype(np.float32)
    np.save(tmp_path / "f.npy", frames)
    mm = np.load(tmp_path / "f.npy", mmap_mode="r")
    r = rng.standard_normal((2, 3000))
    a = dense_sta(r, mm, [0, 2], chunk=700)
    b = dense_sta(r, frames, [0, 2], chunk=5000)
    np.testing.assert_allclose(a, b, rtol=1e-4, atol=1e-6)
    # and equals the direct definition (explicit loop over lags)
    for li, lag in enumerate([0, 2]):
        s = frames[: 3000 - lag].reshape(3000 - lag, -1).astype(float)
        x = r[:, lag:] - r.mean(axis=1, keepdims=True)
        direct = ((s - frames.reshape(3000, -1).mean(0)).T @ x.T / (3000 - lag)).T.reshape(2, 4, 5)
        np.testing.assert_allclose(a[:, li], direct, rtol=1e-3, atol=1e-5)


# ----------------------------------------------------------------------------------------------
# input checks and the command
# ----------------------------------------------------------------------------------------------
def test_arguments_are_checked(noise):
    R = np.zeros((2, noise.n_frames))
    with pytest.raises(ValueError, match="responses"):
        compute_maps(R[:, :10], noise)
    with pytest.raises(ValueError, match="alpha"):
        compute_maps(R, noise, alpha=1.5)
    with pytest.raises(ValueError, match="cannot reach alpha"):
        compute_maps(R, noise, alpha=0.01, n_shuffles=50)
    with pytest.raises(ValueError, match="max_lag_s"):
        map_lags(0.05, -1)


def test_cli_maps_writes_npz_and_cells_csv(tmp_path, noise):
    x_a, y_a = GRID.point_of(3, 3)
    rates = _rates(noise, [_kernel(GRID, x_a, y_a, 2.0, 1), 0 * _kernel(GRID, 0, 0, 1, 1)], latency=2)
    rates[1] = 4.0
    spk = _spikes_from_rates(noise, rates, 30)
    spk = Spikes(time_s=spk.time_s, cell=np.where(spk.cell == 0, 7, 3), cell_ids=np.array([3, 7]))
    write_session(tmp_path / "s", Session(responses=spk, sparse_noise=noise))
    out = tmp_path / "out"
    assert main(["maps", str(tmp_path / "s"), "--out", str(out), "--max-lag", "0.15", "--quiet"]) == 0
    with np.load(out / "maps.npz") as z:
        assert z["linear"].shape == (2, 4, 9, 11) and z["cell_ids"].tolist() == [3, 7]
        assert z["lags_s"].tolist() == pytest.approx([0, 0.05, 0.1, 0.15])
        assert z["grid_shape"].tolist() == [9, 11]
    with open(out / "cells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["cell"] for r in rows] == ["3", "7"]
    assert rows[1]["responsive"] == "true" and rows[0]["responsive"] == "false"
    assert rows[0]["center_x_deg"] == "" and rows[0]["peak_lag_s"] == ""   # not invented
    assert abs(float(rows[1]["center_x_deg"]) - x_a) < 0.5 and abs(float(rows[1]["center_y_deg"]) - y_a) < 0.5
    assert float(rows[1]["peak_lag_s"]) == pytest.approx(0.1)
    assert rows[1]["polarity"] == "ON-centre"
    # a session without sparse noise is refused with exit code 2 and nothing written
    write_session(tmp_path / "g", Session(responses=spk))
    assert main(["maps", str(tmp_path / "g"), "--out", str(tmp_path / "o2"), "--quiet"]) == 2
    assert not (tmp_path / "o2").exists()


# ----------------------------------------------------------------------------------------------
# integration with the shared simulator (tests/conftest.py)
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("which", ["small_spikes_session", "small_traces_session"])
def test_simulated_session_calls_polarity_and_lag(which, request):
    session, truth = request.getfixturevalue(which)
    res = compute_maps(session.responses, session.sparse_noise, rng=0)
    cells = truth["cells"]
    assert [c["cell_id"] for c in cells] == res.cell_ids.tolist()
    expected = np.array([c["kind"] != "unresponsive" for c in cells])
    np.testing.assert_array_equal(res.responsive, expected)   # every model cell found, no unresponsive one
    frame = session.sparse_noise.frame_interval_s
    for i, c in enumerate(cells):
        if c["kind"] == "unresponsive":
            continue
        # peak lag = simulated latency within one frame (issue 3)
        assert abs(res.peak_lag_s[i] - c["latency_s"]) <= frame + 1e-9
        if c["kind"] in ("on_dog", "off_dog"):
            assert res.polarity[i] == ("ON-centre" if c["kind"] == "on_dog" else "OFF-centre")
            # model-free centroid of the map that carries the cell (the fitted centre replaces it
            # downstream): under a third of the 2-deg pixel (the 0.5 deg of issue 3 is for the fitted
            # centre); measured 0.61 deg at most, on the linear map (0.51 on the stronger OFF map alone)
            cx, cy = map_centroid_deg(res, i)
            assert np.hypot(cx - c["center_x_deg"], cy - c["center_y_deg"]) < 2.0 / 3


def test_maps_command_without_fits_writes_centroid_centres(tmp_path):
    """`map2d maps --no-fits`: maps and significance only; centres are the model-free centroid."""
    import csv

    from map2d.cli import main
    from map2d.contract import write_session
    from map2d.simulate import simulate_session
    session, truth = simulate_session(n_cells=5, minutes=4.0, flashed_minutes=0, repeats=0, seed=4,
                                      cell_types=["on_dog", "off_dog", "on_dog", "unresponsive", "off_dog"])
    write_session(tmp_path / "s", session)
    assert main(["maps", str(tmp_path / "s"), "--out", str(tmp_path / "o"), "--no-fits", "--quiet"]) == 0
    rows = list(csv.DictReader(open(tmp_path / "o" / "cells.csv", encoding="utf-8")))
    assert "model" not in rows[0]
    for r, t in zip(rows, truth["cells"]):
        if t["kind"] == "unresponsive":
            assert r["responsive"] == "false" and r["center_x_deg"] == ""
        elif r["responsive"] == "true":
            err = np.hypot(float(r["center_x_deg"]) - t["center_x_deg"], float(r["center_y_deg"]) - t["center_y_deg"])
            assert err < 1.0


def test_lags_do_not_depend_on_microseconds_of_frame_timing():
    """A median frame interval a few microseconds off nominal (photodiode-timed onsets) gives the same
    lags for ``max_lag_s = 0.2`` at 10 Hz (found by the held-out trace-map check)."""
    from map2d.maps import map_lags
    for frame in (0.099997, 0.1, 0.100003):
        np.testing.assert_array_equal(map_lags(frame, 0.2), [0, 1, 2])
    np.testing.assert_array_equal(map_lags(0.1, 0.189), [0, 1])          # a real shortfall still counts
