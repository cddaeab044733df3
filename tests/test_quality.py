"""Map quality: split-half reliability (Spearman-Brown) and cross-validated LN prediction."""

from __future__ import annotations

import numpy as np
import pytest

from map2d.quality import FIT_FRAMES, QUALITY_COLUMNS, _design, block_sums, map_quality, spearman_brown
from map2d.simulate import default_grid, make_cells, simulate_responses, stimulus_rates
from map2d.stimuli.sparse_noise import make_sparse_noise

GRID = default_grid()


def _session(cells, minutes, seed):
    noise = make_sparse_noise(GRID, minutes * 60.0, rate_hz=20.0, spots_per_frame=4, start_s=1.0, rng=seed)
    return noise, simulate_responses(cells, noise, rng=seed + 1000)


@pytest.fixture(scope="module")
def mixed():
    """16 linear cells of graded gain, 6 complex and 10 unresponsive, seen in two independent 6-min
    sessions (same cells, different noise and spikes)."""
    kinds = ["simple"] * 10 + ["on_dog"] * 3 + ["off_dog"] * 3 + ["complex"] * 6 + ["unresponsive"] * 10
    cells = make_cells(len(kinds), GRID, 0.05, cell_types=kinds, peak_rate_hz=(30.0, 250.0), rng=3)
    return cells, [_session(cells, 6.0, s) for s in (11, 12)]


def test_spearman_brown_matches_the_formula_for_k_halves():
    # Spearman (1910), Brown (1910): r_k = k r / (1 + (k - 1) r); halves -> whole is k = 2
    assert spearman_brown(0.6) == pytest.approx(1.2 / 1.6)
    assert spearman_brown(0.25, k=4) == pytest.approx(1.0 / 1.75)
    assert spearman_brown(-0.2) == pytest.approx(-0.4 / 0.8)


def test_unresponsive_cells_reliability_and_prediction_centred_on_zero(mixed):
    cells, sessions = mixed
    noise, resp = sessions[0]
    q = map_quality(resp, noise, 0.2)
    null = np.array([c.kind == "unresponsive" for c in cells])
    rel = q["map_reliability"][null]
    # 320 pixels x 5 lags of independent noise: sd of r ~ 1/sqrt(1600) = 0.025, of 2r/(1+r) ~ 0.05;
    # the mean of 10 cells has sd ~ 0.016
    assert abs(np.mean(rel)) < 0.05
    assert np.all(np.abs(rel) < 0.2)
    # the interval covers 0 for (nearly) every null cell (95 % intervals)
    covers = (q["map_reliability_ci_low"][null] <= 0) & (q["map_reliability_ci_high"][null] >= 0)
    assert covers.mean() >= 0.8
    pr = q["prediction_r"][null]
    assert abs(np.mean(pr)) < 0.02 and np.all(np.abs(pr) < 0.05)
    # responsive cells rank above every unresponsive one on both statistics
    strong = np.array([c.kind in ("on_dog", "off_dog") for c in cells])
    assert np.min(q["map_reliability"][strong]) > np.max(rel)
    assert np.min(q["prediction_r"][strong]) > np.max(pr)


def test_reliability_predicts_the_correlation_with_an_independent_repeat(mixed):
    """Spearman-Brown's claim, checked directly: the corrected split-half reliability of session 1
    estimates the correlation between the whole-session maps of two independent sessions."""
    cells, sessions = mixed
    use_onoff = np.array([c.kind == "complex" for c in cells])
    rel = map_quality(sessions[0][1], sessions[0][0], 0.2, use_onoff=use_onoff)["map_reliability"]
    full = []
    for noise, resp in sessions:
        from map2d.maps import frame_responses, map_lags
        lags = map_lags(noise.frame_interval_s, 0.2)
        B, P, _ = _design(noise, int(lags[-1]))
        R = frame_responses(resp, noise).T.astype(float)
        X = R - R.mean(0)
        bs = block_sums(X, np.ones_like(X), B, lags, 2)
        on, off = bs.maps([0, 1])
        full.append(np.where(use_onoff, on + off, on - off).reshape(-1, len(cells)))
    a, b = full
    a, b = a - a.mean(0), b - b.mean(0)
    cross = (a * b).sum(0) / np.sqrt((a * a).sum(0) * (b * b).sum(0))
    live = np.array([c.kind != "unresponsive" for c in cells])
    # per cell: the two differ by the sampling error of two correlations (sd ~ 0.03-0.05 here)
    assert np.mean(np.abs(rel[live] - cross[live])) < 0.06
    assert np.mean(rel[live] - cross[live]) == pytest.approx(0.0, abs=0.04)
    assert np.corrcoef(rel[live], cross[live])[0, 1] > 0.9
    # and the uncorrected half-session correlation would be too low (so the correction matters)
    r_half = rel / (2 - rel)
    assert np.mean(cross[live] - r_half[live]) > 0.05


def test_prediction_r_approaches_the_true_model_and_never_beats_it(mixed):
    """The held-out LN prediction cannot correlate with the spikes better than the cell's true rate
    does (common practice: the true model is the ceiling); for strongly driven cells it comes close."""
    cells, sessions = mixed
    noise, resp = sessions[0]
    q = map_quality(resp, noise, 0.2, use_onoff=np.array([c.kind == "complex" for c in cells]))
    from map2d.maps import frame_responses
    R = frame_responses(resp, noise).T.astype(float)
    edges, rates = next(iter(stimulus_rates(cells, noise)))
    true_r = np.array([np.corrcoef(rates[:noise.n_frames, c], R[:, c])[0, 1]
                       if np.std(rates[:noise.n_frames, c]) > 0 else np.nan for c in range(len(cells))])
    live = np.array([c.kind != "unresponsive" for c in cells])
    assert np.all(q["prediction_r"][live] <= true_r[live] + 0.02)
    # it ranks the cells as the true model does (in 6 minutes the map's noise costs a share of the
    # ceiling: measured 0.4-0.8 of it here, 0.7-0.9 in 24 minutes)
    from scipy.stats import spearmanr
    assert spearmanr(q["prediction_r"][live], true_r[live])[0] > 0.8
    dog = np.array([c.kind in ("on_dog", "off_dog") for c in cells])
    assert np.mean(q["prediction_r"][dog] / true_r[dog]) > 0.45


def test_quality_columns_in_the_cells_table(small_spikes_session):
    from map2d.analysis import analyze_session
    session, truth = small_spikes_session
    an = analyze_session(session, rng=0, n_shuffles=100)
    for k in QUALITY_COLUMNS:
        assert k in an.cells and len(an.cells[k]) == len(an.cell_ids)
    rel = np.asarray(an.cells["map_reliability"], float)
    lo, hi = (np.asarray(an.cells[k], float) for k in ("map_reliability_ci_low", "map_reliability_ci_high"))
    assert np.all((lo <= rel) & (rel <= hi))
    kinds = {c["cell_id"]: c["kind"] for c in truth["cells"]}
    un = np.array([kinds[int(i)] == "unresponsive" for i in an.cell_ids])
    assert np.all(rel[~un] > np.max(rel[un]))


def test_all_cells_at_once_nonlinearity_equals_the_per_cell_one():
    # the vectorised decile nonlinearity (every cell at once) against the per-cell reference kept in
    # map2d.quality (_fit_nonlinearity + numpy.interp), on generators with ties, a constant column, and
    # test values outside the training range
    from map2d.quality import _fit_nonlinearity, _nonlinearity_predict

    rng = np.random.default_rng(4)
    g = rng.standard_normal((400, 6))
    g[:, 1] = np.round(g[:, 1])                        # heavy ties: repeated decile edges
    g[:, 2] = 0.0                                      # constant: fewer than 3 distinct edges
    g[:300, 3] = 0.0                                   # mostly zero, as a shrunk sparse generator
    y = g + rng.standard_normal(g.shape)
    te = 1.5 * rng.standard_normal((150, 6))
    got = _nonlinearity_predict(g, y, te)
    for c in range(g.shape[1]):
        xc, yc = _fit_nonlinearity(g[:, c], y[:, c])
        ref = np.interp(te[:, c], xc, yc) if xc.size > 1 else np.full(te.shape[0], yc[0])
        np.testing.assert_allclose(got[:, c], ref, rtol=1e-12, atol=1e-12)


def test_quality_same_frames_path_equals_the_per_cell_path(mixed):
    # when every cell is valid in the same frames, counts are shared and the nonlinearity is fitted for all
    # cells at once; a cell added with one missing frame sends both down the per-cell path; the other
    # cells' values must not change
    from map2d.maps import frame_responses, map_lags
    from map2d.quality import map_reliability, prediction_r

    cells, sessions = mixed
    noise, resp = sessions[0]
    lags = map_lags(noise.frame_interval_s, 0.2)
    B, _, layout = _design(noise, int(lags[-1]))
    assert layout is None
    R = np.asarray(frame_responses(resp, noise), float).T[:, :8]          # (frames, 8 cells)
    X = R - R.mean(0)
    V = np.ones_like(X)
    Vx = np.column_stack([V, V[:, :1]])
    Vx[5, -1] = 0.0                                                      # the added cell misses a frame
    Xx = np.column_stack([X, np.where(Vx[:, -1:] > 0, X[:, :1], 0.0)])
    fast, slow = block_sums(X, V, B, lags, 16), block_sums(Xx, Vx, B, lags, 16)
    assert fast.counts.shape[-1] == 1 and slow.counts.shape[-1] == 9
    onoff = np.arange(8) % 2 == 0
    for a, b in zip(map_reliability(fast, onoff), map_reliability(slow, np.append(onoff, False))):
        np.testing.assert_allclose(a, b[:8], rtol=1e-9, atol=1e-12)
    # (the held-out sums are float32 within blocks of frames: the two paths round differently)
    np.testing.assert_allclose(prediction_r(fast, B, X, V), prediction_r(slow, B, Xx, Vx)[:8], rtol=1e-6,
                               atol=1e-9)


def test_lag_design_is_every_lag_of_the_spot_matrix(mixed):
    """One sparse product over the lag-stacked design equals the per-lag products it replaces (the
    definitions in the module docstring, written out lag by lag)."""
    from map2d.maps import frame_responses, map_lags
    from map2d.quality import lag_design
    _, sessions = mixed
    noise, resp = sessions[0]
    lags = map_lags(noise.frame_interval_s, 0.2)
    B, _, _ = _design(noise, int(lags[-1]))
    R = frame_responses(resp, noise).T.astype(float)
    X = R - R.mean(0)
    D = lag_design(B, lags)
    F, P2 = B.shape
    a, e = 100, F - 50                                   # a block of response rows
    got = (D[a:e].T @ X[a:e]).reshape(lags.size, P2, -1)
    W = np.random.default_rng(0).standard_normal((lags.size, P2, X.shape[1]))
    gen = D @ W.reshape(-1, X.shape[1])
    ref_gen = np.zeros((F, X.shape[1]))
    for i, lag in enumerate(lags):
        rows = np.arange(max(a, lag), e)
        assert np.allclose(got[i], B[rows - lag].T @ X[rows], atol=1e-4), lag
        y = B @ W[i]
        ref_gen[lag:] += y[:F - lag]
    assert np.allclose(gen, ref_gen, atol=1e-4)


def test_streamed_pass_equals_the_reference_pass(mixed):
    """The pass of map2d.quality (cells in chunks, frames streamed, float32 sums, all lags of a block
    in per-lag products) against the pass as first written, kept as tests/_quality_reference.py, on
    spikes, on spikes with dropped frames (the gap-padded timeline) and on traces with missing samples
    in some cells (each cell its own valid frames). Sessions shorter than map2d.quality.FIT_FRAMES fit
    the nonlinearity on every training frame, as the reference does, so the values must agree to
    float32 rounding."""
    import dataclasses

    import _quality_reference as reference
    from map2d.simulate import simulate_responses

    cells, sessions = mixed
    noise, resp = sessions[0]
    assert noise.n_frames < FIT_FRAMES
    onoff = np.array([c.kind == "complex" for c in cells])
    valid = np.ones(noise.n_frames, bool)
    valid[[40, 41, 900, 3000, 3001, 3002, 6000]] = False
    gappy = dataclasses.replace(noise, valid=valid)
    traces = simulate_responses(cells[:12], noise, responses="traces", rng=5)
    values = traces.values.copy()
    values[2, 300:420] = np.nan                   # two cells lose samples (their own invalid frames)
    values[7, 5000:5030] = np.nan
    traces = dataclasses.replace(traces, values=values)
    for r, n, oo in ((resp, noise, onoff), (resp, gappy, onoff), (traces, noise, onoff[:12])):
        got = map_quality(r, n, 0.2, use_onoff=oo)
        ref = reference.map_quality(r, n, 0.2, use_onoff=oo)
        for k in QUALITY_COLUMNS:
            assert np.array_equal(np.isnan(got[k]), np.isnan(ref[k])), k
            np.testing.assert_allclose(got[k], ref[k], rtol=0, atol=2e-5, err_msg=k)


def test_in_place_products_equal_scipys_public_products(mixed, monkeypatch):
    """The block sums and the held-out generator accumulate with scipy's compiled csr kernels in place;
    without them (map2d.quality._kernels = None) the public sparse products give the same values."""
    import map2d.quality as quality

    cells, sessions = mixed
    noise, resp = sessions[0]
    onoff = np.array([c.kind == "complex" for c in cells])
    B, _, _ = _design(noise, 4)
    assert quality._fits_kernel(B, np.zeros((B.shape[1], 2), np.float32), np.zeros((B.shape[0], 2), np.float32))
    fast = map_quality(resp, noise, 0.2, use_onoff=onoff)
    monkeypatch.setattr(quality, "_kernels", None)
    slow = map_quality(resp, noise, 0.2, use_onoff=onoff)
    for k in QUALITY_COLUMNS:
        np.testing.assert_allclose(fast[k], slow[k], rtol=0, atol=1e-6, err_msg=k)
