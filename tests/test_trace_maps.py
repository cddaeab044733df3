"""Trace maps with the indicator's decay removed (map2d.traces): the decay estimate, the inverse
filter and its gaps, maps on simulated imaging sessions against the unfiltered ones, spikes left
alone, and the ``--trace-decay`` option."""

from __future__ import annotations

import csv

import numpy as np
import pytest
from scipy import signal

from map2d.analysis import analyze_session
from map2d.cli import main
from map2d.contract import Traces, write_session
from map2d.maps import compute_maps, frame_responses
from map2d.simulate import simulate_session
from map2d.traces import decay_corrected, estimate_trace_decay, parse_trace_decay, remove_decay

FS = 30.0


def _ar1_trace(tau_s, n=30000, rate=0.3, noise_sd=0.3, rng=0, offset=0.0):
    """Poisson kicks through a first-order decay ``x_k = a x_{k-1} + kick_k`` plus white noise: the
    autoregressive calcium model of Vogelstein et al. (2010, J Neurophysiol 104:3691)."""
    rng = np.random.default_rng(rng)
    kicks = rng.poisson(rate, n).astype(float)
    x = signal.lfilter([1.0], [1.0, -np.exp(-1 / FS / tau_s)], kicks)
    return x + offset + rng.normal(0, noise_sd, n), kicks


# ----------------------------------------------------------------------------------------------
# the estimate and the filter
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("tau", [0.3, 0.6, 1.5])
def test_estimate_recovers_known_ar1_coefficient(tau):
    # the autocovariance of an AR(1) process plus white noise obeys g(k+1) = a g(k) for k >= 1
    # (Box, Jenkins & Reinsel 2008, Time Series Analysis, section 6.3): a is recovered, not the
    # lag-1 autocorrelation that the white noise biases low
    x, _ = _ar1_trace(tau, rng=int(tau * 10))
    t = np.arange(x.size) / FS
    est = estimate_trace_decay(Traces(values=x[None], times_s=t))[0]
    a_true, a_est = np.exp(-1 / FS / tau), np.exp(-1 / FS / est)
    assert abs(a_est - a_true) < 0.004
    assert abs(est / tau - 1) < 0.1
    lag1 = np.corrcoef(x[1:], x[:-1])[0, 1]
    assert a_true - lag1 > 2 * abs(a_est - a_true)      # the naive estimate is biased low


def test_estimate_is_nan_for_pure_noise_and_constant():
    rng = np.random.default_rng(1)
    t = np.arange(20000) / FS
    vals = np.vstack([rng.normal(0, 1, t.size), np.zeros(t.size)])
    tau = estimate_trace_decay(Traces(values=vals, times_s=t))
    assert np.all(np.isnan(tau))


def test_remove_decay_inverts_the_filter_exactly():
    x, kicks = _ar1_trace(0.5, n=3000, noise_sd=0.0)
    t = np.arange(x.size) / FS
    d = remove_decay(Traces(values=x[None], times_s=t), 0.5)
    a = np.exp(-1 / FS / 0.5)
    np.testing.assert_allclose(d.values[0, 1:] * (1 - a), kicks[1:], atol=1e-4)
    assert np.isnan(d.values[0, 0])
    np.testing.assert_allclose(d.times_s[1:], t[1:] - 0.5 / FS)      # the middle of each interval
    # a constant trace keeps its level (the division by 1 - a keeps the trace's scale)
    c = remove_decay(Traces(values=np.full((1, 50), 2.0), times_s=t[:50]), 0.5)
    np.testing.assert_allclose(c.values[0, 1:], 2.0, rtol=1e-5)


def test_no_difference_across_gaps_or_missing_samples():
    t = np.concatenate([np.arange(100), 200 + np.arange(100)]) / FS     # a gap of 100 samples
    x = np.concatenate([np.full(100, 5.0), np.full(100, -5.0)])         # unrelated levels
    x[30] = np.nan
    d = remove_decay(Traces(values=x[None], times_s=t), 0.5).values[0]
    assert np.isnan(d[0]) and np.isnan(d[100])          # first sample, first sample after the gap
    assert np.isnan(d[30]) and np.isnan(d[31])          # the missing sample and the one after it
    finite = np.isfinite(d)
    assert finite.sum() == 200 - 4
    np.testing.assert_allclose(d[finite], np.where(np.arange(200) < 100, 5.0, -5.0)[finite], rtol=1e-5)
    # the estimate: two recordings of one AR(1) process at different baselines, joined at a gap
    y1, _ = _ar1_trace(0.5, n=15000, rng=3)
    y2, _ = _ar1_trace(0.5, n=15000, rng=4, offset=4.0)
    tt = np.concatenate([np.arange(15000), 20000 + np.arange(15000)]) / FS
    est = estimate_trace_decay(Traces(values=np.concatenate([y1, y2])[None], times_s=tt))[0]
    assert abs(est / 0.5 - 1) < 0.1


def test_resmoothing_follows_the_imaging_noise():
    # the filter (1 - aB) / (1 - rB): r near 0 when the indicator's own fluctuations dominate, r near a
    # (no filter) when white imaging noise does (derived in map2d.traces._residual_smoothing)
    t = np.arange(30000) / FS
    rows = [_ar1_trace(0.5, rng=7, noise_sd=ns)[0] for ns in (0.0, 0.3, 3.0)]
    _, info = decay_corrected(Traces(values=np.vstack(rows), times_s=t), 0.5)
    r_over_a = np.exp(-1 / FS / info.resmooth_s) / np.exp(-1 / FS / 0.5)
    assert r_over_a[0] < 0.15 and r_over_a[0] < r_over_a[1] < r_over_a[2]
    assert r_over_a[2] > 0.8
    d, _ = decay_corrected(Traces(values=np.vstack(rows), times_s=t), 0.5)
    for i in range(3):                                   # the steady level is kept
        assert abs(np.nanmean(d.values[i]) / np.mean(rows[i]) - 1) < 0.01


def test_invalid_frames_stay_invalid_after_the_filter():
    s, _ = simulate_session(n_cells=4, minutes=1.0, responses="traces", flashed_minutes=0, repeats=0, seed=2)
    sn = s.sparse_noise
    valid = np.ones(sn.n_frames, dtype=bool)
    valid[[100, 101, 500]] = False
    sn.valid = valid
    tr, _ = decay_corrected(s.responses, 0.4)
    r = frame_responses(tr, sn)
    assert np.all(np.isnan(r[:, ~valid])) and np.all(np.isfinite(r[:, 1:][:, valid[1:]]))


def test_parse_trace_decay():
    assert parse_trace_decay("Auto") == "auto" and parse_trace_decay("off") == "off"
    assert parse_trace_decay("0.7") == 0.7 and parse_trace_decay(1) == 1.0
    for bad in ("fast", "-1", "0", "nan"):
        with pytest.raises(ValueError):
            parse_trace_decay(bad)


# ----------------------------------------------------------------------------------------------
# maps on simulated imaging sessions
# ----------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def short_traces():
    # 16 cells (2 unresponsive), 5 minutes of sparse noise, a 0.6-s indicator at 30 Hz
    return simulate_session(n_cells=16, minutes=5.0, responses="traces", calcium_tau_s=0.6,
                            flashed_minutes=0, repeats=0, seed=3)


def test_filtered_maps_detect_more_cells_at_the_true_latency(short_traces):
    s, truth = short_traces
    sn = s.sparse_noise
    kinds = np.array([c["kind"] for c in truth["cells"]])
    lat = np.array([np.nan if c["latency_s"] is None else c["latency_s"] for c in truth["cells"]])
    unr = kinds == "unresponsive"
    raw = compute_maps(s.responses, sn, rng=0)
    tr, info = decay_corrected(s.responses, "auto", skip_s=sn.frame_interval_s)
    new = compute_maps(tr, sn, rng=0)
    assert np.all(info.source == "cell")
    assert abs(np.median(info.tau_s) / 0.6 - 1) < 0.1                 # the simulator's indicator
    # measured: 6 -> 12 of 14 responsive cells, median peak z x 1.5
    assert new.responsive[~unr].sum() >= raw.responsive[~unr].sum() + 3
    assert np.median(new.max_abs_z[~unr] / raw.max_abs_z[~unr]) > 1.3
    assert not new.responsive[unr].any()
    # the simulator's traces rise at the latency (instant rise): the filtered maps peak there, the
    # frame averages one frame or more later (see map2d.simulate, module docstring)
    got = new.responsive
    np.testing.assert_allclose(new.peak_lag_s[got], lat[got], atol=1e-6)
    assert np.all(raw.peak_lag_s[raw.responsive] > lat[raw.responsive] + 0.5 * sn.frame_interval_s)


def test_sample_level_beats_frame_level_filter(short_traces):
    # the design choice of map2d.traces: the same decay removed from the frame averages,
    # u_t = r_t - a r_{t-1}, splits a response over its latency and the next frame
    s, truth = short_traces
    sn = s.sparse_noise
    unr = np.array([c["kind"] == "unresponsive" for c in truth["cells"]])
    tr, info = decay_corrected(s.responses, "auto", skip_s=sn.frame_interval_s)
    R = frame_responses(s.responses, sn).astype(float)
    a = np.exp(-sn.frame_interval_s / info.tau_s)[:, None]
    U = np.full_like(R, np.nan)
    U[:, 1:] = R[:, 1:] - a * R[:, :-1]
    frame_level = compute_maps(U.astype(np.float32), sn, rng=0)
    sample_level = compute_maps(tr, sn, rng=0)
    assert np.median(sample_level.max_abs_z[~unr]) > 1.1 * np.median(frame_level.max_abs_z[~unr])


def test_null_stays_calibrated_on_spontaneous_calcium():
    # cells that ignore the stimulus (spontaneous spikes through the indicator), filtered with their
    # own estimate, and white imaging noise filtered with a forced time constant: no cell responsive
    s, _ = simulate_session(n_cells=40, minutes=4.0, responses="traces", calcium_tau_s=0.8,
                            flashed_minutes=0, repeats=0, seed=5, cell_types=["unresponsive"] * 40)
    sn = s.sparse_noise
    tr, info = decay_corrected(s.responses, "auto", skip_s=sn.frame_interval_s)
    assert abs(np.median(info.tau_s) / 0.8 - 1) < 0.1
    res = compute_maps(tr, sn, rng=1)
    noise = Traces(values=np.random.default_rng(2).normal(0, 0.03, s.responses.values.shape).astype(np.float32),
                   times_s=s.responses.times_s)
    res_n = compute_maps(remove_decay(noise, 0.8), sn, rng=1)
    p = np.concatenate([res.p_value, res_n.p_value])
    assert np.all(np.isfinite(p))
    assert np.sum(p <= 0.01) <= 1                              # 80 null cells at alpha = 0.01
    assert np.mean(p <= 0.2) < 0.3                             # no gross excess in the tail


def test_analysis_uses_the_filter_for_traces_only():
    s, _ = simulate_session(n_cells=6, minutes=2.0, responses="traces", calcium_tau_s=0.5,
                            flashed_minutes=0, repeats=0, seed=4)
    an = analyze_session(s, n_jobs=1)
    assert an.trace_decay is not None and an.trace_decay.mode == "auto"
    assert np.all(np.isfinite(an.cells["trace_decay_tau_s"]))
    assert any(n.startswith("trace maps: indicator decay removed") for n in an.notes)
    sp, _ = simulate_session(n_cells=6, minutes=2.0, responses="spikes", flashed_minutes=0, repeats=0, seed=4)
    a1 = analyze_session(sp, n_jobs=1, trace_decay=0.5)
    a2 = analyze_session(sp, n_jobs=1, trace_decay="off")
    assert a1.trace_decay is None and "trace_decay_tau_s" not in a1.cells
    for k in ("on", "off", "linear", "on_z", "off_z", "linear_z"):
        assert np.array_equal(getattr(a1.maps, k), getattr(a2.maps, k), equal_nan=True)


# ----------------------------------------------------------------------------------------------
# command line
# ----------------------------------------------------------------------------------------------
def _read(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_cli_trace_decay_option(tmp_path):
    s, _ = simulate_session(n_cells=6, minutes=2.0, responses="traces", calcium_tau_s=0.5,
                            flashed_minutes=0, repeats=0, seed=6)
    write_session(tmp_path / "s", s)
    outs = {}
    for opt in ("auto", "off", "0.5"):
        out = tmp_path / f"o_{opt}"
        assert main(["maps", str(tmp_path / "s"), "--out", str(out), "--no-fits", "--quiet",
                     "--trace-decay", opt]) == 0
        outs[opt] = out
    auto = _read(outs["auto"] / "cells.csv")
    taus = np.array([float(r["trace_decay_tau_s"]) for r in auto])
    assert abs(np.median(taus) / 0.5 - 1) < 0.1 and np.all(np.abs(taus / 0.5 - 1) < 0.3)   # 2 minutes
    assert all(r["trace_decay_tau_s"] == "" for r in _read(outs["off"] / "cells.csv"))     # not estimated
    assert all(float(r["trace_decay_tau_s"]) == 0.5 for r in _read(outs["0.5"] / "cells.csv"))
    with np.load(outs["auto"] / "maps.npz") as a, np.load(outs["off"] / "maps.npz") as b:
        assert not np.array_equal(a["on"], b["on"], equal_nan=True)
    assert main(["maps", str(tmp_path / "s"), "--out", str(tmp_path / "bad"), "--no-fits", "--quiet",
                 "--trace-decay", "fast"]) == 2
    assert not (tmp_path / "bad").exists()
    assert main(["analyze", str(tmp_path / "s"), "--out", str(tmp_path / "bad2"), "--quiet",
                 "--trace-decay", "-3"]) == 2


def test_a_cell_without_data_shows_no_decay_constant():
    """An all-NaN trace row has nothing estimated or removed: its time constant is NaN (not the session
    median), with auto and with a given value."""
    from scipy.signal import lfilter

    from map2d.traces import decay_corrected
    rng = np.random.default_rng(0)
    t = np.arange(0.0, 120.0, 1 / 30)
    x = lfilter([1.0], [1.0, -np.exp(-1 / 30 / 0.4)], rng.poisson(0.5, (3, t.size)).astype(float), axis=1) * 0.1
    x = x + rng.normal(0.0, 0.02, x.shape)
    x[2] = np.nan
    for mode in ("auto", 0.5):
        tr, d = decay_corrected(Traces(values=x, times_s=t), mode)
        assert np.all(np.isfinite(d.tau_s[:2])) and np.isnan(d.tau_s[2]) and d.source[2] == "none"
        assert not np.isfinite(tr.values[2]).any()


def test_python_api_gives_the_cli_maps_for_traces(simulated, tmp_path):
    """compute_maps(..., trace_decay="auto") gives the maps `map2d maps` writes (the CLI removes the
    indicator decay by default); without it the maps differ."""
    from map2d.contract import write_session
    from map2d.maps import compute_maps
    from map2d.pipeline import run_maps

    session, _ = simulated(responses="traces", minutes=3.0, n_cells=4, calcium_tau_s=0.4, flashed_minutes=0.0,
                           repeats=0)
    write_session(tmp_path / "s", session)
    run_maps(tmp_path / "s", tmp_path / "o", fits=False, quiet=True, seed=0)
    cli = np.load(tmp_path / "o" / "maps.npz")
    api = compute_maps(session.responses, session.sparse_noise, rng=0, trace_decay="auto")
    np.testing.assert_allclose(api.linear, cli["linear"], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(api.linear_z, cli["linear_z"], rtol=1e-4, atol=1e-5)
    raw = compute_maps(session.responses, session.sparse_noise, rng=0)
    assert not np.allclose(raw.linear, cli["linear"], rtol=1e-3, atol=1e-6)
