"""Flashed (subspace) and drifting grating analysis: conventions, F1/F0, simple and complex cells.

A small generator lives here: Gabor kernels on a fine grid (map2d.models.gabor2d), stimuli rendered with
map2d.geometry.grating_image, the kernel's Fourier component computed by a direct sum, and Poisson spikes
or exponentially smoothed traces.
"""

from __future__ import annotations

import csv

import numpy as np
import pytest
from scipy.signal import lfilter

from map2d.contract import GratingTable, Session, Spikes, SparseNoise, Traces, write_session
from map2d.errors import BadInput
from map2d.fit.tuning import grating_tuning_columns
from map2d.geometry import Grid, grating_image, wave_vector
from map2d.gratings import analyze_drifting, analyze_flashed, fold_static
from map2d.models import gabor2d
from map2d.stimuli.gratings import combine_tables, make_drifting_gratings, make_flashed_gratings

ORIGIN = (1.0, -0.5)                       # phase origin away from (0, 0) on purpose
STEP = 0.25
XS = np.arange(-12.0, 12.0 + STEP / 2, STEP)
X, Y = np.meshgrid(XS, XS[::-1])
ORIS = np.arange(0.0, 180.0, 15.0)
SFS = np.geomspace(0.06, 0.6, 7)
PHASES = np.array([0.0, 90.0, 180.0, 270.0])
GABOR = dict(x0=2.0, y0=1.0, sigma_u_deg=2.5, sigma_v_deg=3.0, theta_deg=30.0, sf_cpd=0.2, phase_deg=60.0)
FRAME = 0.1


def kernel(**over):
    p = dict(GABOR, **over)
    return gabor2d(X, Y, p["x0"], p["y0"], p["sigma_u_deg"], p["sigma_v_deg"], p["theta_deg"], p["sf_cpd"],
                   p["phase_deg"])


def kernel_fourier(k, oris=ORIS, sfs=SFS):
    """H(kx, ky) = sum k exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dA, by direct sum (geometry convention)."""
    kx, ky = wave_vector(oris[:, None], sfs[None, :])
    arg = 2 * np.pi * (kx[..., None, None] * (X - ORIGIN[0]) + ky[..., None, None] * (Y - ORIGIN[1]))
    return np.sum(k * np.exp(1j * arg), axis=(-2, -1)) * STEP * STEP


def static_drive(k, ori, sf, phase):
    """Linear response of kernel k to rendered static gratings (any equal-shape condition arrays)."""
    ori, sf, phase = (np.atleast_1d(np.asarray(a, float)) for a in (ori, sf, phase))
    out = np.empty(ori.shape)
    for i, (o, s, p) in enumerate(zip(ori.ravel(), sf.ravel(), phase.ravel())):
        out.flat[i] = np.sum(k * grating_image(X, Y, o, s, p, origin_deg=ORIGIN)) * STEP * STEP
    return out


def flashed_drives(table, kernels):
    """Per-presentation drive (kernels, n) of each kernel; blanks give 0. Rendered once per condition."""
    stim = table.contrast > 0
    keys = np.stack([table.orientation_deg, table.sf_cpd, table.phase_deg], axis=1)
    uniq, inv = np.unique(keys[stim], axis=0, return_inverse=True)
    out = np.zeros((len(kernels), len(table)))
    for j, k in enumerate(kernels):
        d = static_drive(k, uniq[:, 0], uniq[:, 1], uniq[:, 2])
        out[j, stim] = d[inv.ravel()] * table.contrast[stim]
    return out


def cell_rates_flashed(table, kind, rng):
    """Frame rates (cells, n) for [simple, complex, unresponsive], responding one frame late."""
    even, odd = kernel(), kernel(phase_deg=GABOR["phase_deg"] + 90.0)
    d = flashed_drives(table, [even, odd])
    peak = np.abs(kernel_fourier(even)).max()
    simple = np.maximum(0.0, 2.0 + 80.0 * d[0] / peak)
    energy = 2.0 + 40.0 * np.hypot(d[0], d[1]) / peak
    flat = np.full(d.shape[1], 8.0)
    rates = np.stack([simple, energy, flat])
    return np.concatenate([np.full((3, 1), [[2.0], [2.0], [8.0]]), rates[:, :-1]], axis=1)  # 1-frame latency


def spikes_from_frame_rates(onset, dur, rates, rng):
    counts = rng.poisson(rates * dur[None, :])
    cell = np.repeat(np.repeat(np.arange(rates.shape[0]), rates.shape[1]), counts.ravel())
    frame = np.repeat(np.tile(np.arange(rates.shape[1]), rates.shape[0]), counts.ravel())
    t = onset[frame] + rng.random(frame.size) * dur[frame]
    order = np.argsort(t)
    return Spikes(time_s=t[order], cell=cell[order], cell_ids=np.arange(rates.shape[0]))


def traces_from_rate(t_fine, rate_fine, tau_s, sample_hz, noise, rng):
    """Exponentially smoothed rate (calcium-like), sampled at sample_hz, plus Gaussian noise."""
    dt = t_fine[1] - t_fine[0]
    kt = np.arange(0, 6 * tau_s, dt)
    ker = np.exp(-kt / tau_s)
    ker /= ker.sum()
    sm = np.stack([np.convolve(r, ker)[: r.size] for r in rate_fine])
    step = int(round(1.0 / (sample_hz * dt)))
    times = t_fine[::step]
    vals = sm[:, ::step] + noise * rng.standard_normal((sm.shape[0], times.size))
    return Traces(values=vals.astype(np.float32), times_s=times)


@pytest.fixture(scope="module")
def flashed_table():
    return make_flashed_gratings(ORIS, SFS, PHASES, duration_s=260.0, rate_hz=1 / FRAME, blank_fraction=0.1,
                                 phase_origin_deg=ORIGIN, rng=1)


@pytest.fixture(scope="module")
def flashed_spikes(flashed_table):
    rng = np.random.default_rng(2)
    rates = cell_rates_flashed(flashed_table, "spikes", rng)
    sp = spikes_from_frame_rates(flashed_table.onset_s, flashed_table.offset_s - flashed_table.onset_s, rates, rng)
    return sp, analyze_flashed(sp, flashed_table, max_lag_s=0.2, rng=3)


# ----------------------------------------------------------------------------------------------
# F1 / F0 of known waveforms
# ----------------------------------------------------------------------------------------------
WAVEFORMS = [
    # F1/F0 from the Fourier series of each waveform; the criterion value 1 is Skottun et al. 1991
    (lambda th: np.maximum(0.0, np.cos(th)), np.pi / 2, True),        # half-wave rectified: (1/2)/(1/pi)
    (lambda th: np.maximum(0.0, np.cos(th) - 0.5), 1.7936, True),     # (pi/3 - sqrt3/4)/(sqrt3/2 - pi/6), /pi
    (lambda th: np.abs(np.cos(th)), 0.0, False),                      # full-wave rectified: even harmonics only
]


def _drifting_single(tf=2.0, trial_s=2.25, n=4, gap=1.0):
    on = np.arange(n) * (trial_s + gap) + 0.5
    return GratingTable.from_columns(onset_s=on, offset_s=on + trial_s, orientation_deg=np.full(n, 30.0),
                                     sf_cpd=np.full(n, 0.1), phase_deg=np.zeros(n), contrast=np.ones(n),
                                     tf_hz=np.full(n, tf))


def _rate_on_grid(table, wave, dt, scale):
    t = np.arange(0.0, table.offset_s[-1] + 1.0, dt)
    k = np.searchsorted(table.onset_s, t, side="right") - 1
    inside = (k >= 0) & (t < table.offset_s[np.maximum(k, 0)])
    th = 2 * np.pi * table.tf_hz[0] * (t - table.onset_s[np.maximum(k, 0)])
    return t, np.where(inside, scale * wave(th), 0.0)


@pytest.mark.parametrize("wave,expected,is_simple", WAVEFORMS)
def test_f1_f0_of_rectified_sinusoids_from_spike_trains(wave, expected, is_simple):
    # trial of 2.25 s at 2 Hz: 4 whole cycles from the exact onset, of which the first (the onset
    # transient) is left out by default: 1.5 s analysed
    table = _drifting_single()
    t, r = _rate_on_grid(table, wave, 1e-5, 400.0)
    cum = np.cumsum(r) * 1e-5
    # deterministic spikes where the integrated rate crosses n + 1/2 (time rescaling, no noise)
    spike_t = t[np.searchsorted(cum, np.arange(0.5, cum[-1], 1.0))]
    dr = analyze_drifting(Spikes(time_s=spike_t, cell=np.zeros(spike_t.size, int)), table)
    assert dr.spontaneous_source == "gaps" and dr.spontaneous[0] == 0.0
    np.testing.assert_allclose(dr.trial_window_s, 1.5)
    if expected == 0.0:
        assert dr.f1_f0[0] < 0.01
    else:
        assert dr.f1_f0[0] == pytest.approx(expected, rel=0.01)
    assert bool(dr.simple[0]) is is_simple        # simple if F1/F0 > 1 (Skottun et al. 1991)


@pytest.mark.parametrize("wave,expected,is_simple", WAVEFORMS)
def test_f1_f0_of_rectified_sinusoids_from_sampled_traces(wave, expected, is_simple):
    table = _drifting_single(tf=1.5, trial_s=2.9)   # 4 whole cycles of the 2.9 s trial, the first skipped
    t, r = _rate_on_grid(table, wave, 1e-3, 1.0)
    step = 33                                       # ~30 Hz sampling, not locked to the stimulus
    tr = Traces(values=r[None, ::step], times_s=t[::step])
    dr = analyze_drifting(tr, table)
    np.testing.assert_allclose(dr.trial_window_s, 3 / 1.5)
    if expected == 0.0:
        assert dr.f1_f0[0] < 0.01
    else:
        assert dr.f1_f0[0] == pytest.approx(expected, rel=0.02)
    assert bool(dr.simple[0]) is is_simple


def test_f1_phase_follows_the_rate_from_the_exact_onset():
    # r(t) = 10 + 6 cos(theta - 40 deg) gives F1 = 6 exp(-i 40 deg) (module convention), F0 = 10
    table = _drifting_single(tf=2.0, trial_s=2.0)
    t = np.arange(0.0, table.offset_s[-1] + 1.0, 0.004)
    k = np.clip(np.searchsorted(table.onset_s, t, side="right") - 1, 0, None)
    inside = (t >= table.onset_s[k]) & (t < table.offset_s[k])
    th = 2 * np.pi * 2.0 * (t - table.onset_s[k])
    r = np.where(inside, 10 + 6 * np.cos(th - np.deg2rad(40.0)), 0.0)
    dr = analyze_drifting(Traces(values=r[None], times_s=t), table)
    f1 = dr.f1_mean[0].ravel()[0]
    assert abs(f1) == pytest.approx(6.0, rel=1e-3)
    assert np.degrees(np.angle(f1)) == pytest.approx(-40.0, abs=0.2)
    assert dr.f0_mean[0].ravel()[0] == pytest.approx(10.0, rel=1e-3)


# ----------------------------------------------------------------------------------------------
# flashed gratings: linear Gabor cell, complex cell, unresponsive cell
# ----------------------------------------------------------------------------------------------
def test_static_orientation_folding_is_the_same_stimulus():
    # contract formula: cos(2 pi sf u(ori + 180) + phi) = cos(2 pi sf u(ori) - phi)
    o, p = fold_static([210.0, 359.0, 180.0], [30.0, 0.0, 90.0])
    np.testing.assert_allclose(o, [30.0, 179.0, 0.0])
    np.testing.assert_allclose(p, [330.0, 0.0, 270.0])
    a = grating_image(X, Y, 210.0, 0.2, 30.0, origin_deg=ORIGIN)
    b = grating_image(X, Y, o[0], 0.2, p[0], origin_deg=ORIGIN)
    np.testing.assert_allclose(a, b, atol=1e-9)


def test_linear_gabor_cell_surface_matches_kernel_fourier_transform(flashed_spikes):
    _, fl = flashed_spikes
    assert fl.frame_s == pytest.approx(FRAME)
    assert fl.peak_lag_s[0] == pytest.approx(FRAME)              # simulated one-frame latency
    h = fl.harmonic_at_peak[0]
    hk = kernel_fourier(kernel())
    mag, magk = np.abs(h), np.abs(hk)
    assert np.corrcoef(mag.ravel(), magk.ravel())[0, 1] > 0.95   # issue 4 tolerance
    big = magk > 0.5 * magk.max()
    dphi = np.degrees(np.angle(h[big] * np.conj(hk[big])))
    assert np.all(np.abs(dphi) < 20.0)                           # phase convention of geometry.py
    kx, ky = wave_vector(fl.orientations_deg[:, None], fl.sfs_cpd[None, :])
    np.testing.assert_allclose(fl.kx_cpd, kx)
    np.testing.assert_allclose(fl.ky_cpd, ky)
    fkx, fky, fv = fl.full_plane()
    assert fv.shape == (3, 2 * ORIS.size, SFS.size)
    np.testing.assert_allclose(fv[:, ORIS.size:], np.conj(fv[:, :ORIS.size]))
    np.testing.assert_allclose(fkx[ORIS.size:], -fkx[:ORIS.size])


def test_flashed_tuning_columns_recover_gabor_and_complex_cells(flashed_spikes):
    _, fl = flashed_spikes
    assert fl.responsive.tolist() == [True, True, False]
    cols = grating_tuning_columns(flashed=fl)
    assert cols["cell"] == [0, 1, 2]
    for c in (0, 1):
        assert cols["tuning_source"][c] == "flashed"
        d = abs((cols["pref_orientation_deg"][c] - GABOR["theta_deg"] + 90) % 180 - 90)
        assert d < 5.0                                              # issue 4 tolerance
    assert cols["pref_sf_cpd"][0] == pytest.approx(GABOR["sf_cpd"], rel=0.10)  # issue 4 tolerance
    assert 0 < cols["circular_variance"][0] < 1 and 0 < cols["osi"][0] <= 1
    assert cols["pref_orientation_ci_halfwidth_deg"][0] < 10
    # the unresponsive cell gets empty values, never invented ones
    assert cols["grating_responsive"][2] is False
    for k in ("pref_orientation_deg", "pref_sf_cpd", "circular_variance", "osi", "flashed_peak_lag_s"):
        assert np.isnan(cols[k][2])


def test_complex_cell_response_is_phase_invariant(flashed_spikes):
    _, fl = flashed_spikes
    pm = fl.phase_mean_at_peak
    mod = fl.condition_contrast[None] * np.abs(fl.harmonic_at_peak)
    # the simple cell's phase modulation dominates; the complex cell's is at the noise level
    assert np.nanmax(mod[1]) < 0.3 * np.nanmax(pm[1])
    assert np.nanmax(mod[0]) > np.nanmax(pm[0])


def test_orientations_beyond_180_are_folded_to_the_same_result(flashed_spikes, flashed_table):
    sp, fl = flashed_spikes
    t = flashed_table
    flip = (np.arange(len(t)) % 2 == 1) & (t.contrast > 0)
    t2 = GratingTable.from_columns(onset_s=t.onset_s, offset_s=t.offset_s,
                                   orientation_deg=np.where(flip, t.orientation_deg + 180.0, t.orientation_deg),
                                   sf_cpd=t.sf_cpd, phase_deg=np.where(flip, -t.phase_deg, t.phase_deg),
                                   contrast=t.contrast, tf_hz=t.tf_hz, phase_origin_deg=t.phase_origin_deg)
    fl2 = analyze_flashed(sp, t2, max_lag_s=0.2, n_shuffles=0)
    np.testing.assert_allclose(fl2.orientations_deg, fl.orientations_deg)
    np.testing.assert_allclose(fl2.harmonic, fl.harmonic, atol=1e-9)


def test_gaps_in_the_sequence_never_pair_unrelated_frames():
    a = make_flashed_gratings([0, 90], [0.1], [0, 180], duration_s=2.0, rate_hz=10, rng=0)
    b = make_flashed_gratings([0, 90], [0.1], [0, 180], duration_s=2.0, rate_hz=10, start_s=7.05, rng=1)
    t = combine_tables(a, b)
    sp = Spikes(time_s=np.array([0.05, 7.1]), cell=np.array([0, 0]))
    fl = analyze_flashed(sp, t, max_lag_s=0.2, n_shuffles=0)
    assert fl.frame_s == pytest.approx(0.1) and fl.lags_s.size == 3
    block = (t.onset_s > 5).astype(int)
    for lag in range(3):
        # brute force: presentation k pairs with k + lag only inside the same block
        expected = sum(1 for k in range(len(t) - lag) if block[k] == block[k + lag] and t.contrast[k] > 0)
        assert fl.count[0, ..., lag].sum() == expected


# ----------------------------------------------------------------------------------------------
# drifting gratings
# ----------------------------------------------------------------------------------------------
DIRS = np.arange(0.0, 360.0, 30.0)
DSFS = np.array([0.08, 0.2, 0.5])


def drifting_rates(table, t, tf, latency=0.04):
    """Rate at times t (cells, t) for [simple, complex] from rendered even/odd drives."""
    even, odd = kernel(), kernel(phase_deg=GABOR["phase_deg"] + 90.0)
    peak = np.abs(kernel_fourier(even)).max()
    n = len(table)
    # drive(t') = D(phase0) cos(2 pi tf t') + D(phase0 - 90) sin(2 pi tf t'), t' = t - onset (contract)
    dc = {}
    for name, k in (("e", even), ("o", odd)):
        dc[name + "c"] = static_drive(k, table.orientation_deg, table.sf_cpd, table.phase_deg)
        dc[name + "s"] = static_drive(k, table.orientation_deg, table.sf_cpd, table.phase_deg - 90.0)
    ts = t - latency
    k = np.searchsorted(table.onset_s, ts, side="right") - 1
    kk = np.clip(k, 0, n - 1)
    inside = (k >= 0) & (ts < table.offset_s[kk])
    b = 2 * np.pi * tf * (ts - table.onset_s[kk])
    e = dc["ec"][kk] * np.cos(b) + dc["es"][kk] * np.sin(b)
    o = dc["oc"][kk] * np.cos(b) + dc["os"][kk] * np.sin(b)
    simple = np.where(inside, np.maximum(0.0, 1.0 + 60.0 * e / peak), 1.0)
    cx = np.where(inside, 2.0 + 30.0 * np.hypot(e, o) / peak, 2.0)
    flat = np.full(t.shape, 6.0)
    return np.stack([simple, cx, flat])


@pytest.fixture(scope="module")
def drifting_table():
    return make_drifting_gratings(DIRS, DSFS, tf_hz=1.0, trial_s=2.0, gap_s=1.0, repeats=3,
                                  phase_origin_deg=ORIGIN, rng=5)


def _poisson_spikes(t, rates, dt, rng):
    counts = rng.poisson(rates * dt)
    cell, idx = np.nonzero(counts)
    rep = counts[cell, idx]
    times = np.repeat(t[idx], rep) + rng.random(rep.sum()) * dt
    cells = np.repeat(cell, rep)
    o = np.argsort(times)
    return Spikes(time_s=times[o], cell=cells[o], cell_ids=np.arange(rates.shape[0]))


def _check_drifting(dr, cols):
    assert dr.responsive.tolist() == [True, True, False]
    assert dr.f1_f0[0] > 1 and dr.simple[0]                     # simple: F1/F0 > 1 (Skottun et al. 1991)
    assert dr.f1_f0[1] < 1 and not dr.simple[1]                 # complex: F1/F0 < 1
    assert cols["grating_class"][:2] == ["simple", "complex"]
    for c in (0, 1):
        d = abs((cols["pref_orientation_deg"][c] - GABOR["theta_deg"] + 90) % 180 - 90)
        assert d < 7.5                                          # 12 directions, 30 deg apart
    assert np.isnan(cols["f1_f0"][2]) and np.isnan(cols["pref_orientation_deg"][2])


def test_drifting_gratings_spikes_classify_simple_and_complex(drifting_table):
    rng = np.random.default_rng(6)
    dt = 0.002
    t = np.arange(0.0, drifting_table.offset_s[-1] + 1.0, dt)
    sp = _poisson_spikes(t, drifting_rates(drifting_table, t, 1.0), dt, rng)
    dr = analyze_drifting(sp, drifting_table)
    assert dr.spontaneous_source == "gaps"
    assert dr.spontaneous[2] == pytest.approx(6.0, rel=0.2)
    cols = grating_tuning_columns(drifting=dr)
    _check_drifting(dr, cols)
    assert cols["tuning_source"][:2] == ["drifting", "drifting"]
    # the even/odd Gabor pair is symmetric in direction: the DSI stays low
    assert dr.dsi[1] < 0.3
    assert dr.f0_sem.shape == dr.f0_mean.shape == (3, DIRS.size, DSFS.size, 1)


def test_drifting_gratings_traces_classify_simple_and_complex(drifting_table):
    rng = np.random.default_rng(7)
    dt = 0.005
    t = np.arange(0.0, drifting_table.offset_s[-1] + 1.0, dt)
    rates = drifting_rates(drifting_table, t, 1.0)
    tr = traces_from_rate(t, rates, tau_s=0.05, sample_hz=40.0, noise=2.0, rng=rng)
    dr = analyze_drifting(tr, drifting_table)
    _check_drifting(dr, grating_tuning_columns(drifting=dr))


def test_flashed_gratings_from_traces(flashed_table):
    rng = np.random.default_rng(8)
    rates = cell_rates_flashed(flashed_table, "traces", rng)
    dt = 0.01
    t = np.arange(0.0, flashed_table.offset_s[-1], dt)
    k = np.clip(np.searchsorted(flashed_table.onset_s, t, side="right") - 1, 0, None)
    tr = traces_from_rate(t, rates[:, k], tau_s=0.05, sample_hz=30.0, noise=3.0, rng=rng)
    fl = analyze_flashed(tr, flashed_table, max_lag_s=0.2, rng=9, n_shuffles=99, alpha=0.02)
    assert fl.responsive.tolist() == [True, True, False]
    cols = grating_tuning_columns(flashed=fl)
    for c in (0, 1):
        d = abs((cols["pref_orientation_deg"][c] - GABOR["theta_deg"] + 90) % 180 - 90)
        assert d < 5.0
    assert cols["pref_sf_cpd"][0] == pytest.approx(GABOR["sf_cpd"], rel=0.10)
    big = np.abs(kernel_fourier(kernel()))
    big = big > 0.5 * big.max()
    h = fl.harmonic_at_peak[0]
    hk = kernel_fourier(kernel())
    # smoothing delays the response by a fraction of a frame; the spatial phase is unchanged
    assert np.all(np.abs(np.degrees(np.angle(h[big] * np.conj(hk[big])))) < 20.0)


# ----------------------------------------------------------------------------------------------
# command
# ----------------------------------------------------------------------------------------------
def test_run_gratings_writes_surfaces_and_cells_csv(tmp_path, flashed_spikes, flashed_table):
    from map2d.pipeline import run_gratings

    sp, _ = flashed_spikes
    grid = Grid(ny=4, nx=4, center_x_deg=ORIGIN[0], center_y_deg=ORIGIN[1])
    sn = SparseNoise(frames=np.zeros((2, 4, 4), np.int8), times_s=np.array([1000.0, 1000.1]), grid=grid)
    session = Session(responses=sp, gratings=flashed_table, sparse_noise=sn)
    write_session(tmp_path / "s", session)
    assert run_gratings(tmp_path / "s", tmp_path / "out", max_lag_s=0.2, seed=0, quiet=True) == 0
    with open(tmp_path / "out" / "cells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["cell"] for r in rows] == ["0", "1", "2"]
    assert abs((float(rows[0]["pref_orientation_deg"]) - 30.0 + 90) % 180 - 90) < 5
    assert rows[2]["pref_orientation_deg"] == "" and rows[0]["f1_f0"] == ""
    z = np.load(tmp_path / "out" / "gratings.npz")
    assert z["flashed_harmonic"].shape == (3, ORIS.size, SFS.size)
    assert np.iscomplexobj(z["flashed_harmonic"])
    np.testing.assert_allclose(z["orientations_deg"], ORIS)

    write_session(tmp_path / "none", Session(responses=sp))
    with pytest.raises(BadInput):
        run_gratings(tmp_path / "none", tmp_path / "out2", quiet=True)
    assert not (tmp_path / "out2").exists()


# ----------------------------------------------------------------------------------------------
# integration with the project's simulator (map2d.simulate)
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind,ori_tol", [("spikes", 5.0), ("traces", 10.0)])
def test_simulated_session_tuning_and_class(kind, ori_tol):
    simulate = pytest.importorskip("map2d.simulate")
    # rates of 25-60 spikes/s: at much higher rates a centre-surround cell far from the phase origin shows
    # real but spurious orientation modulation (4 phases alias the 3rd and 5th harmonics of the rectified
    # response into the first, by an amount that depends on arg H, i.e. on orientation)
    # 4 repeats per drifting condition: with 3, the cross-validated F1/F0 (two folds of 2 and 1 trials)
    # left one simple cell in seeds 1-3 undecided (interval reaching 1) for spikes and one for traces
    s, truth = simulate.simulate_session(n_cells=12, minutes=0, flashed_minutes=5, repeats=4, responses=kind,
                                         seed=1, peak_rate_hz=(25.0, 60.0))
    fl = analyze_flashed(s.responses, s.gratings, rng=0)
    dr = analyze_drifting(s.responses, s.gratings)
    if kind == "traces":
        assert 0.1 < dr.trace_tau_s < 1.0      # simulated indicator decay 0.4 s
    cols = grating_tuning_columns(fl, dr)
    for i, tc in enumerate(truth["cells"]):
        if tc["kind"] in ("simple", "complex"):
            d = abs((cols["pref_orientation_deg"][i] - tc["pref_orientation_deg"] + 90) % 180 - 90)
            assert d < ori_tol, (i, tc["kind"])   # issue 4: 5 deg (spikes); calcium-smoothed traces looser
            assert cols["grating_class"][i] == tc["kind"]      # F1/F0 > 1 simple (Skottun et al. 1991)
        elif tc["kind"] == "unresponsive":
            assert cols["grating_responsive"][i] is False and np.isnan(cols["pref_orientation_deg"][i])
        else:                                   # centre-surround: responsive, linear, no orientation
            assert cols["grating_responsive"][i] is True
            assert np.isnan(cols["pref_orientation_deg"][i])
            assert cols["grating_class"][i] == "simple"


@pytest.mark.parametrize("kind,minutes,seed", [("spikes", 10, 1), ("spikes", 10, 2), ("traces", 8, 1),
                                                ("traces", 8, 2)])
def test_simulated_tuning_surfaces_within_issue_tolerances(kind, minutes, seed):
    """Issue 4 tolerances on the project's simulator, for spikes and for calcium-like traces (indicator
    decay 0.4 s): every simple cell's measured magnitude surface correlates > 0.95 with the magnitude of
    its kernel's Fourier transform and its phase is within 20 deg where the magnitude is above half its
    peak; every tuned cell's preferred SF is within 10 %, orientation within 5 deg, class right; and the
    95 % intervals of the preferred SF cover the truth about as often as they should.

    Design: 7 SFs half an octave apart (0.02-0.16 cycles/deg), 12 orientations, 4 phases, gains of
    150-250 spikes/s; 10 minutes of flashed gratings for spikes, 8 for traces. Measured on seeds 1-6 (or
    1-8): lowest surface correlation 0.970 (spikes) and 0.960 (traces), largest phase error 17.8 and
    12.1 deg; worst SF error 4.5 % and 4.2 %, orientation 1.7 and 2.2 deg. With 5 minutes the lowest
    correlations were 0.939 (spikes) and 0.923 (traces): the tolerance is then noise-limited.
    """
    simulate = pytest.importorskip("map2d.simulate")
    s, truth = simulate.simulate_session(n_cells=12, minutes=0, flashed_minutes=minutes, repeats=3, seed=seed,
                                         responses=kind, sfs_cpd=np.geomspace(0.02, 0.16, 7),
                                         peak_rate_hz=(150.0, 250.0))
    fl = analyze_flashed(s.responses, s.gratings, rng=0)
    dr = analyze_drifting(s.responses, s.gratings)
    cols = grating_tuning_columns(fl, dr)
    cells = simulate.cells_from_truth(truth)
    origin = truth["session"]["phase_origin_deg"]
    tuned = [i for i, tc in enumerate(truth["cells"]) if tc["kind"] in ("simple", "complex")]
    assert len(tuned) >= 6
    covered = 0
    for i in tuned:
        tc = truth["cells"][i]
        assert cols["pref_sf_cpd"][i] == pytest.approx(tc["pref_sf_cpd"], rel=0.10), i
        d = abs((cols["pref_orientation_deg"][i] - tc["pref_orientation_deg"] + 90) % 180 - 90)
        assert d < 5.0, i
        assert cols["grating_class"][i] == tc["kind"]      # F1/F0 > 1 simple (Skottun et al. 1991)
        covered += cols["pref_sf_ci_low_cpd"][i] <= tc["pref_sf_cpd"] <= cols["pref_sf_ci_high_cpd"][i]
        if tc["kind"] == "simple":
            hk = cells[i].spectra(fl.kx_cpd, fl.ky_cpd, origin)[0]       # analytic Gabor transform
            h = fl.harmonic_combined[i]
            assert np.corrcoef(np.abs(h).ravel(), np.abs(hk).ravel())[0, 1] > 0.95, i
            big = np.abs(hk) > 0.5 * np.abs(hk).max()
            assert np.all(np.abs(np.degrees(np.angle(h[big] * np.conj(hk[big])))) < 20.0), i
    # nominal 95 %: at most 2 of 8 misses (binomial probability of 3 or more at 95 %: about 0.6 %)
    assert covered >= len(tuned) - 2


def test_lag_weights_are_the_least_squares_combination():
    """Generalised least squares (Kay 1993, Estimation Theory, ch. 6): for a response only at lag 1 and
    noise of correlation rho between the lags, the best combination is ``r_1 - rho r_0``; with
    independent noise it is the profile over the variances."""
    from map2d.gratings import _lag_weights
    rho = 0.8
    w = _lag_weights(np.array([[0.0, 1.0]]), np.array([[[1.0, rho], [rho, 1.0]]]))
    np.testing.assert_allclose(w[0], [-rho, 1.0], atol=1e-5)
    w = _lag_weights(np.array([[0.5, 1.0]]), np.array([[[4.0, 0.0], [0.0, 1.0]]]))
    x = np.array([0.5 / 4.0, 1.0])
    np.testing.assert_allclose(w[0], x * 1.25 / (x @ [0.5, 1.0]), atol=1e-5)
    # a covariance that cannot be estimated leaves the profile
    np.testing.assert_allclose(_lag_weights(np.array([[0.5, 1.0]]), np.full((1, 2, 2), np.nan))[0], [0.5, 1.0])


def test_pooled_lags_of_traces_beat_the_peak_lag():
    """Calcium traces: the level left by earlier responses is correlated across lags, so the pooled
    surface is much closer to the kernel's transform than the surface at the peak lag."""
    simulate = pytest.importorskip("map2d.simulate")
    s, truth = simulate.simulate_session(n_cells=6, minutes=0, flashed_minutes=5, repeats=0, seed=3,
                                         responses="traces", cell_types=["simple"] * 6,
                                         sfs_cpd=np.geomspace(0.02, 0.16, 7), peak_rate_hz=(150.0, 250.0))
    fl = analyze_flashed(s.responses, s.gratings, n_shuffles=0)
    cells = simulate.cells_from_truth(truth)
    origin = truth["session"]["phase_origin_deg"]
    for i, cell in enumerate(cells):
        hk = np.abs(cell.spectra(fl.kx_cpd, fl.ky_cpd, origin)[0]).ravel()
        pooled = np.corrcoef(np.abs(fl.harmonic_combined[i]).ravel(), hk)[0, 1]
        peak = np.corrcoef(np.abs(fl.harmonic_at_peak[i]).ravel(), hk)[0, 1]
        assert pooled > peak, i
        assert fl.temporal_weights[i].min() < 0                # the earlier level is subtracted


# ----------------------------------------------------------------------------------------------
# traces: the indicator's decay in drifting trials
# ----------------------------------------------------------------------------------------------
def _first_order(t, drive, tau, r0):
    """Exact response of ``tau r' = u - r`` (a first-order low-pass, e.g. Oppenheim & Willsky, Signals
    and Systems, ch. 6) to a drive that is constant within each step of ``t``."""
    r = np.empty_like(drive)
    a = np.exp(-(t[1] - t[0]) / tau)
    prev = r0
    for i, u in enumerate(drive):
        prev = u + (prev - u) * a
        r[i] = prev
    return r


def test_trace_f0_f1_undo_the_indicator_rise_and_tail():
    """A drive ``F0 + |F1| cos(2 pi tf t + arg F1)`` switched on at the onset, seen through a first-order
    indicator that starts at another level: the fit with the indicator's transient returns the drive's
    F0 and F1; the plain fit reads F0 low (the rise) and F1 less than half (low-pass and transient)."""
    from map2d.gratings import _trace_f1
    tau, tf, f0, f1 = 0.4, 2.0, 3.0, 2.0 * np.exp(0.7j)
    t = np.arange(0.0, 2.0, 1e-4)
    u = f0 + np.real(f1 * np.exp(2j * np.pi * tf * t))
    r = _first_order(t, u, tau, r0=1.2)
    step = 333                                                  # ~30 Hz samples
    tr = Traces(values=r[None, ::step], times_s=t[::step] + 10.0)
    onset, end, tfs = np.array([10.0]), np.array([12.0]), np.array([tf])
    got0, got1 = _trace_f1(tr, onset, end, tfs, tau)
    assert got0[0, 0] == pytest.approx(f0, rel=2e-3)
    assert got1[0, 0] == pytest.approx(f1, rel=2e-3)
    plain0, plain1 = _trace_f1(tr, onset, end, tfs)
    assert plain0[0, 0] < 0.95 * f0
    assert abs(plain1[0, 0]) < 0.5 * abs(f1)


def test_decay_estimate_with_gaps_of_a_few_time_constants():
    """Trials 2 s on, 1.2 s off (3 decay constants): the late part of each gap still holds a few % of
    the decay, which must not be taken for the baseline."""
    from map2d.gratings import estimate_decay_tau
    tau = 0.4
    dt = 1e-3
    on = np.arange(20) * 3.2 + 1.0
    t = np.arange(0.0, on[-1] + 4.0, dt)
    drive = 0.5 + 4.0 * ((t[:, None] >= on[None]) & (t[:, None] < on[None] + 2.0)).any(axis=1)
    r = _first_order(t, drive, tau, r0=0.5)
    step = 33
    rng = np.random.default_rng(0)
    tr = Traces(values=(r[None, ::step] + 0.01 * rng.standard_normal((1, t[::step].size))), times_s=t[::step])
    est = estimate_decay_tau(tr, on + 2.0, np.append(on[1:], np.inf))
    assert est == pytest.approx(tau, rel=0.05)


def test_welch_test_matches_scipy():
    from scipy import stats
    from map2d.gratings import _welch_p
    rng = np.random.default_rng(1)
    a = rng.normal(1.0, 1.0, (4, 25))
    b = rng.normal(0.0, 2.0, (4, 9))
    a[0, :3] = np.nan
    want = [stats.ttest_ind(x[np.isfinite(x)], y, equal_var=False).pvalue for x, y in zip(a, b)]
    np.testing.assert_allclose(_welch_p(a, b), want, rtol=1e-10)      # scipy.stats as reference
    assert np.isnan(_welch_p(a[:, :1], b)).all()


def test_drifting_cell_driven_alike_by_every_condition_is_responsive(drifting_table):
    """A cell whose rate rises by the same amount in every trial, unmodulated, differs from neither
    condition to condition nor in F1: only the comparison with the spontaneous level finds it."""
    rng = np.random.default_rng(4)
    t = drifting_table
    edges = np.arange(0.0, float(t.offset_s.max()) + 2.0, 0.002)
    mid = edges[:-1] + 0.001
    inside = ((mid[:, None] >= t.onset_s[None]) & (mid[:, None] < t.offset_s[None])).any(axis=1)
    rate = np.where(inside, 40.0, 5.0)
    n = rng.poisson(rate * 0.002)
    times = np.repeat(mid, n) + rng.uniform(-0.001, 0.001, n.sum())
    sp = Spikes(time_s=np.sort(times), cell=np.zeros(n.sum(), int), cell_ids=np.array([0]))
    dr = analyze_drifting(sp, t)
    assert dr.responsive[0] and dr.f1_f0[0] < 1.0


@pytest.mark.parametrize("blanks", [True, False])
def test_drifting_responsive_call_is_calibrated_on_cells_that_ignore_the_stimulus(blanks):
    """Null calibration: 1500 Poisson cells at 0.5-10 spikes/s that do not respond; at alpha = 0.01 about
    1 % may be called responsive (binomial sd 0.26 %). Measured with 3000 cells per setting: 0.9-1.6 %
    for Poisson cells, 1.1-2.5 % for bursty ones (rate varying in 1-s blocks), whose counts are more
    variable than the tests assume."""
    from map2d import gratings as G
    rng = np.random.default_rng(11 if blanks else 12)
    rows, t = [], 1.0
    conds = [(d, s) for d in range(0, 360, 45) for s in (0.04, 0.08)] + ([(None, 0.04)] if blanks else [])
    for _ in range(10):
        for k in rng.permutation(len(conds)):
            d, s = conds[k]
            rows.append((t, t + 2.0, 0.0 if d is None else d, s, 90.0 * rng.integers(4), 0.0 if d is None else 1.0,
                         2.0))
            t += 3.0
    a = np.array(rows)
    table = GratingTable.from_columns(onset_s=a[:, 0], offset_s=a[:, 1], orientation_deg=a[:, 2], sf_cpd=a[:, 3],
                                      phase_deg=a[:, 4], contrast=a[:, 5], tf_hz=a[:, 6])
    n_cells = 1500
    rate = rng.uniform(0.5, 10.0, n_cells)
    counts = rng.poisson(rate * (t + 1.0))
    times = rng.uniform(0.0, t + 1.0, counts.sum())
    cell = np.repeat(np.arange(n_cells), counts)
    order = np.argsort(times)
    dr = G.analyze_drifting(Spikes(time_s=times[order], cell=cell[order], cell_ids=np.arange(n_cells)), table,
                            n_boot=0)
    assert dr.spontaneous_source == ("blanks" if blanks else "gaps")
    assert dr.responsive.mean() <= 0.02
    assert (dr.p_value < 0.05).mean() <= 0.08                     # nominal 5 %


def test_a_trace_without_data_gives_nan_quietly():
    """A cell whose trace is all NaN gets NaN spontaneous level and p value, and no RuntimeWarning
    reaches the user."""
    import warnings
    rows, t = [], 1.0
    for _ in range(3):
        for d in range(0, 360, 45):
            rows.append((t, t + 2.0, d, 0.04, 0.0, 1.0, 2.0))
            t += 3.0
    a = np.array(rows)
    table = GratingTable.from_columns(onset_s=a[:, 0], offset_s=a[:, 1], orientation_deg=a[:, 2], sf_cpd=a[:, 3],
                                      phase_deg=a[:, 4], contrast=a[:, 5], tf_hz=a[:, 6])
    tt = np.arange(0.0, t + 1.0, 1 / 30)
    rng = np.random.default_rng(3)
    x = rng.normal(0.0, 0.1, (2, tt.size))
    x[1] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        dr = analyze_drifting(Traces(values=x, times_s=tt), table)
    assert np.isfinite(dr.spontaneous[0]) and np.isnan(dr.spontaneous[1]) and np.isnan(dr.p_value[1])
    assert not dr.responsive[1]


def test_drifting_f1_f0_of_traces_uses_each_cells_own_indicator_decay():
    """Issue 14, effect 4: two cells with a true F1/F0 of 1.0 (rate 10 + 10 cos) seen through indicators
    of 0.4 s and 1.2 s decay. With one decay for the session (0.89 s) they read 2.07 and 0.80, so
    the simple / complex split follows the indicator; with each cell's own decay both read 1.000 (+-1 %)."""
    n, tf, trial_s, gap = 8, 1.0, 4.0, 4.0
    on = np.arange(n) * (trial_s + gap) + 1.0
    table = GratingTable.from_columns(onset_s=on, offset_s=on + trial_s, orientation_deg=np.zeros(n),
                                      sf_cpd=np.full(n, 0.1), phase_deg=np.zeros(n), contrast=np.ones(n),
                                      tf_hz=np.full(n, tf))
    dt = 0.002
    t = np.arange(0.0, on[-1] + trial_s + gap, dt)
    k = np.clip(np.searchsorted(on, t, side="right") - 1, 0, None)
    inside = (t >= on[k]) & (t < on[k] + trial_s)
    rate = np.where(inside, 10.0 + 10.0 * np.cos(2 * np.pi * tf * (t - on[k])), 0.0)
    taus = np.array([0.4, 1.2])
    # first-order indicator: dc/dt = (rate - c) / tau, exact for piecewise-constant steps
    vals = np.zeros((2, t.size))
    for c, tau in enumerate(taus):
        a = np.exp(-dt / tau)
        vals[c] = lfilter([1 - a], [1, -a], rate)
    step = 33                                               # ~15 Hz sampling, not locked to the stimulus
    tr = Traces(values=vals[:, ::step], times_s=t[::step])
    one = analyze_drifting(tr, table, trace_tau_s=0.89, n_boot=0)
    own = analyze_drifting(tr, table, trace_tau_s=taus, n_boot=0)
    assert one.f1_f0[0] > 1.5 and one.f1_f0[1] < 0.95
    np.testing.assert_allclose(own.f1_f0, 1.0, rtol=0.01)
    np.testing.assert_allclose(own.cell_tau_s, taus)


def _two_indicator_cells(n=8, noise_sd=0.0, seed=3):
    """Drifting trials (4 s at 1 Hz, 4-s gaps) and two cells with a true F1/F0 of 1.0 (rate 10 + 10 cos)
    seen through first-order indicators of 0.4 and 1.2 s, sampled at ~15 Hz (not locked to the
    stimulus), plus Gaussian imaging noise."""
    tf, trial_s, gap = 1.0, 4.0, 4.0
    on = np.arange(n) * (trial_s + gap) + 1.0
    table = GratingTable.from_columns(onset_s=on, offset_s=on + trial_s, orientation_deg=np.zeros(n),
                                      sf_cpd=np.full(n, 0.1), phase_deg=np.zeros(n), contrast=np.ones(n),
                                      tf_hz=np.full(n, tf))
    dt = 0.002
    t = np.arange(0.0, on[-1] + trial_s + gap, dt)
    k = np.clip(np.searchsorted(on, t, side="right") - 1, 0, None)
    inside = (t >= on[k]) & (t < on[k] + trial_s)
    rate = np.where(inside, 10.0 + 10.0 * np.cos(2 * np.pi * tf * (t - on[k])), 0.0)
    taus = np.array([0.4, 1.2])
    vals = np.zeros((2, t.size))
    for c, tau in enumerate(taus):      # dc/dt = (rate - c) / tau, exact for piecewise-constant steps
        a = np.exp(-dt / tau)
        vals[c] = lfilter([1 - a], [1, -a], rate)
    step = 33
    v = vals[:, ::step] + np.random.default_rng(seed).normal(0.0, noise_sd, vals[:, ::step].shape)
    return Traces(values=v, times_s=t[::step]), table, taus


def test_drifting_decay_of_each_cell_from_its_own_offsets():
    """Issue 14, item 4, without a map stage (``map2d gratings``, or ``map2d analyze`` of a session
    with drifting gratings only): each cell's decay is fitted to its own trace after the trial
    offsets, A exp(-t / tau) + c as the pooled estimate (which reads one value for both, so the F1/F0
    read 2.07 and 0.80 as above). Both cells then read F1/F0 1.0 within 10 %."""
    from map2d.gratings import estimate_decay_tau

    tr, table, taus = _two_indicator_cells(n=12, noise_sd=0.1)
    pooled, own = estimate_decay_tau(tr, table.offset_s, np.append(table.onset_s[1:], np.inf), per_cell=True)
    np.testing.assert_allclose(own, taus, rtol=0.15)
    assert 0.45 < pooled < 1.15                        # one value between the two
    dr = analyze_drifting(tr, table, n_boot=0)
    np.testing.assert_allclose(dr.cell_tau_s, taus, rtol=0.15)
    np.testing.assert_allclose(dr.f1_f0, 1.0, rtol=0.1)
    # a silent cell has no offset response: it takes the pooled value
    silent = Traces(values=np.vstack([tr.values, np.random.default_rng(4).normal(0, 0.1, tr.values.shape[1])]),
                    times_s=tr.times_s)
    _, own3 = estimate_decay_tau(silent, table.offset_s, np.append(table.onset_s[1:], np.inf), per_cell=True)
    assert np.isnan(own3[2]) and np.isfinite(own3[:2]).all()


def test_map2d_gratings_on_traces_drifting_f1_f0_follows_each_cells_decay(tmp_path):
    """The same through ``map2d gratings`` on a written session folder (no sparse noise)."""
    from map2d.contract import read_table
    from map2d.pipeline import run_gratings

    tr, table, taus = _two_indicator_cells(n=12, noise_sd=0.1)
    write_session(tmp_path / "s", Session(responses=tr, gratings=table))
    assert run_gratings(tmp_path / "s", tmp_path / "out", quiet=True) == 0
    header, rows = read_table(tmp_path / "out" / "cells.csv")
    f = np.asarray([r[header.index("f1_f0")] for r in rows], float)
    np.testing.assert_allclose(f, 1.0, rtol=0.1)


def _drifting_trials(rng, repeats):
    """Drifting trials of 8 directions x 2 SFs (0.04, 0.08 cpd), ``repeats`` each in random order, 2 s
    at 2 Hz with 1-s gaps from t = 1 s. Returns the table, the onsets and the recording's length."""
    cond = [(d, s) for d in np.arange(8) * 45.0 for s in (0.04, 0.08)] * repeats
    order = rng.permutation(len(cond))
    n = len(cond)
    on = 1.0 + np.arange(n) * 3.0
    table = GratingTable.from_columns(onset_s=on, offset_s=on + 2.0, orientation_deg=[cond[i][0] for i in order],
                                      sf_cpd=[cond[i][1] for i in order], phase_deg=np.zeros(n),
                                      contrast=np.ones(n), tf_hz=np.full(n, 2.0))
    return table, on, on[-1] + 4.0


def _unmodulated_and_silent_spikes(seed=1, n_mod=60, n_un=40):
    """Drifting trials (8 directions x 2 SFs x 5 repeats, 2 s at 2 Hz, 1-s gaps) and Poisson spikes:
    ``n_mod`` cells driven alike by every grating without modulation (4 -> 8 spikes/s during trials,
    true F1/F0 = 0) and ``n_un`` cells that ignore the stimulus (4 spikes/s throughout)."""
    rng = np.random.default_rng(seed)
    table, on, total = _drifting_trials(rng, 5)
    times, cells = [], []
    for c in range(n_mod + n_un):
        t = rng.uniform(0, total, rng.poisson(4.0 * total))
        if c < n_mod:
            ex = rng.uniform(0, total, rng.poisson(4.0 * total))
            k = np.searchsorted(on, ex, side="right") - 1
            t = np.concatenate([t, ex[(k >= 0) & (ex < on[np.maximum(k, 0)] + 2.0)]])
        times.append(t)
        cells.append(np.full(t.size, c))
    t, c = np.concatenate(times), np.concatenate(cells)
    o = np.argsort(t)
    return Spikes(time_s=t[o], cell=c[o], cell_ids=np.arange(n_mod + n_un)), table


def test_unmodulated_and_unresponsive_cells_are_not_called_simple():
    """Issue 14, effect 6. Measured on this design (60 + 40 cells) before the first change: 7 of 60
    unmodulated cells (12 %) and 2 of 40 cells that ignore the stimulus (responsive by chance, F1/F0 up to
    1.76) were called simple; with the bootstrap interval required to exclude 1 but the preferred
    condition chosen and read on the same trials, 1 of 60. Now, with 300 + 300 cells: none of either
    (seeds 1-3), within alpha = 0.01 as the issue asks (before this change: 1.0 % and 0.3 %).

    The unmodulated cells' F1/F0 (truth 0): median 0.57 when the preferred condition (the largest of 16)
    was chosen on the trials F1 is read from, which lifts F1 whatever the noise correction; 0.00 (seeds
    1-3) with the condition chosen on the other fold (cross-validated)."""
    sp, table = _unmodulated_and_silent_spikes(n_mod=300, n_un=300)
    dr = analyze_drifting(sp, table)
    mod, un = slice(0, 300), slice(300, None)
    assert np.mean(dr.grating_class[mod] == "simple") <= 0.01
    assert np.mean(dr.grating_class[un] == "simple") <= 0.01
    assert np.nanmedian(dr.f1_f0[mod]) <= 0.1
    # a class is given only where the interval excludes 1
    lo, hi = dr.f1_f0_ci_low, dr.f1_f0_ci_high
    called = dr.grating_class != ""
    assert np.all((lo[called] > 1) | (hi[called] < 1))
    assert np.all(dr.responsive[called])
    assert np.all(np.isnan(lo[~dr.responsive]))          # intervals only where a class can be given
    # the point estimate's noise bias is removed: the ratio the interval surrounds
    fin = np.isfinite(dr.f1_f0) & np.isfinite(lo)
    assert np.all((lo[fin] <= dr.f1_f0[fin] + 1e-9) & (dr.f1_f0[fin] <= hi[fin] + 1e-9))


def _modulated_spikes(depths, n_each, repeats=5, seed=3):
    """Drifting trials (8 directions x 2 SFs, 2 s at 2 Hz, 1-s gaps, ``repeats`` per condition) and
    Poisson cells driven alike by every grating at ``4 + 4 (1 + m cos(2 pi 2 t))`` spikes/s over a
    spontaneous 4 spikes/s: F0 = 4, F1 = 4 m, so the true F1/F0 is the depth ``m`` (Fourier series).
    ``n_each`` cells per depth; times drawn by thinning a 24-spikes/s Poisson process."""
    rng = np.random.default_rng(seed)
    table, on, total = _drifting_trials(rng, repeats)
    m = np.repeat(np.asarray(depths, float), n_each)
    counts = rng.poisson(24.0 * total, m.size)
    cell = np.repeat(np.arange(m.size), counts)
    t = rng.uniform(0.0, total, counts.sum())
    k = np.searchsorted(on, t, side="right") - 1
    inside = (k >= 0) & (t < on[np.maximum(k, 0)] + 2.0)
    rate = 4.0 + np.where(inside, 4.0 * (1.0 + m[cell] * np.cos(2 * np.pi * 2.0 * (t - on[np.maximum(k, 0)]))), 0.0)
    keep = rng.random(t.size) < rate / 24.0
    o = np.argsort(t[keep])
    return Spikes(time_s=t[keep][o], cell=cell[keep][o], cell_ids=np.arange(m.size)), table


def test_f1_f0_test_is_calibrated_at_the_criterion():
    """Issue 14: the bootstrap of F1/F0 redoes the choice of the preferred condition in every resample,
    so its test of F1/F0 > 1 holds its level at the criterion itself. 150 cells with a true F1/F0 of
    exactly 1, driven alike by 16 conditions (5 repeats): before, with the condition chosen and read on
    the same trials and only its trials resampled, 29 % of them were called simple (23-29 % on seeds
    3-5; median F1/F0 1.18); now at most the one-sided 2.5 % of the 95 % interval, with sampling slack
    (measured 0 % on seeds 3-5, median 0.91-0.95). 75 cells at F1/F0 = 0 (Skottun et al. 1991: complex)
    are never called simple; their median F1/F0 was 0.50-0.62, now 0.00."""
    sp, table = _modulated_spikes([1.0, 0.0], (150, 75))
    dr = analyze_drifting(sp, table)
    one, zero = slice(0, 150), slice(150, None)
    assert dr.responsive.mean() > 0.95
    assert np.mean(dr.grating_class[one] == "simple") <= 0.04
    assert not np.any(dr.grating_class[zero] == "simple")
    assert 0.8 <= np.nanmedian(dr.f1_f0[one]) <= 1.1
    assert np.nanmedian(dr.f1_f0[zero]) <= 0.1


def _direction_selective_spikes(repeats, seed=4):
    """Drifting trials at 4 directions (2 s at 2 Hz, 1-s gaps, spontaneous 2 spikes/s) and one cell
    whose rate is [5 + 15 cos]+ at direction 0 and an unmodulated 5 spikes/s at the others: a simple
    response in one direction only (true DSI of F1 = 1)."""
    rng = np.random.default_rng(seed)
    dirs = np.tile([0.0, 90.0, 180.0, 270.0], repeats)
    n = dirs.size
    on = 1.0 + np.arange(n) * 3.0
    table = GratingTable.from_columns(onset_s=on, offset_s=on + 2.0, orientation_deg=dirs, sf_cpd=np.full(n, 0.05),
                                      phase_deg=np.zeros(n), contrast=np.ones(n), tf_hz=np.full(n, 2.0))
    dt = 0.001
    t = np.arange(0, on[-1] + 4.0, dt)
    k = np.clip(np.searchsorted(on, t, side="right") - 1, 0, None)
    inside = (t >= on[k]) & (t < on[k] + 2.0)
    mod = np.where(dirs[k] == 0.0, 15.0 * np.cos(2 * np.pi * 2.0 * (t - on[k])), 0.0)
    cnt = rng.poisson(np.where(inside, 5.0 + mod.clip(-5.0), 2.0) * dt)
    b = np.repeat(np.flatnonzero(cnt), cnt[cnt > 0])
    st = np.sort((b + rng.random(b.size)) * dt)
    return Spikes(time_s=st, cell=np.zeros(st.size, int)), table


def test_dsi_uses_the_noise_corrected_f1_and_has_an_interval():
    """Issue 14, effect 5 (DSI). |F1| of the unmodulated opposite direction has a noise floor that
    pulled the DSI below its true value 1 by an amount set by the number of trials: 0.72, 0.79 and 0.94
    with 3, 6 and 30 repeats before. With the noise-bias-corrected F1: 1.00, 0.91, 1.00, and the
    30-repeat value lies inside the 3- and 6-repeat intervals (trials resampled)."""
    res = {r: analyze_drifting(*_direction_selective_spikes(r)) for r in (3, 6, 30)}
    assert [bool(res[r].simple[0]) for r in res] == [True, True, True]
    assert res[3].dsi[0] >= 0.9 and res[30].dsi[0] >= 0.95
    for r in (3, 6):
        assert res[r].dsi_ci_low[0] <= res[30].dsi[0] <= res[r].dsi_ci_high[0]
    assert res[30].dsi_ci_high[0] - res[30].dsi_ci_low[0] < res[3].dsi_ci_high[0] - res[3].dsi_ci_low[0]


@pytest.mark.parametrize("with_nan", [False, True])
def test_flashed_shuffle_null_matches_a_direct_count(with_nan):
    """The blocked, all-cells-at-once shuffle test (:func:`map2d.gratings._shuffle_exceed`) against a
    plain count written from its definition (common practice: a permutation test of the one-way ANOVA
    share of variance, SSB / SST): per shuffle and lag, the permuted labels' group means and
    ``sum_g s_g^2 / n_g - s^2 / n`` over the finite responses; the same random stream in any block size."""
    from map2d.gratings import _shuffle_exceed
    rng = np.random.default_rng(5)
    n_cells, n, n_groups = 6, 90, 7
    r = rng.normal(size=(n_cells, n)) + rng.integers(0, n_groups, n)[None] * 0.2
    if with_nan:
        r[rng.random(r.shape) < 0.1] = np.nan
    finite = np.isfinite(r)
    r0 = np.where(finite, r, 0.0)
    cond = rng.integers(0, n_groups, n)
    pairs = [(np.arange(n), np.arange(n)), (np.arange(n - 1), np.arange(1, n))]

    def shares(labels, k, j):
        out = np.zeros(n_cells)
        for c in range(n_cells):
            v, f = r0[c, j], finite[c, j]
            s = np.bincount(labels, weights=v, minlength=n_groups)
            cnt = np.bincount(labels, weights=f.astype(float), minlength=n_groups)
            ssb = sum(s[g] ** 2 / cnt[g] for g in range(n_groups) if cnt[g] > 0) - v.sum() ** 2 / f.sum()
            out[c] = ssb
        return out

    sst = np.stack([np.array([np.sum((r0[c, j][finite[c, j]] - r0[c, j][finite[c, j]].mean()) ** 2)
                              for c in range(n_cells)]) for k, j in pairs], axis=1)
    obs = np.max(np.stack([shares(cond[k], k, j) for k, j in pairs], 1) / sst, axis=1)
    n_shuffles = 23
    ref_rng = np.random.default_rng(9)
    exceed_ref = np.zeros(n_cells)
    for _ in range(n_shuffles):
        perm = np.argsort(ref_rng.random((1, n)), axis=1)[0]
        null = np.max(np.stack([shares(cond[perm[k]], k, j) / sst[:, i] for i, (k, j) in enumerate(pairs)]), 0)
        exceed_ref += null >= obs - 1e-12
    for block in (1, 5, 64):
        got = _shuffle_exceed(r0, finite, not with_nan, pairs, cond, n_groups, sst, obs, n_shuffles, block,
                              np.random.default_rng(9))
        np.testing.assert_array_equal(got, exceed_ref)
    assert 0 < exceed_ref.sum() < n_cells * n_shuffles     # the check is not vacuous


# ----------------------------------------------------------------------------------------------
# latency-shifted windows (issue 14)
# ----------------------------------------------------------------------------------------------
LATS = np.repeat([0.03, 0.1, 0.2], 8)
PHI_DEG = 40.0


def _latency_spikes(tf=2.0, dur=1.0, gap=1.0, repeats=5, amp=20.0, spont=2.0, seed=0):
    """Half-wave rectified simple cells with known latencies ``LATS``: rate ``spont + amp pi [cos(2 pi tf
    (t - onset - L) + PHI)]+`` from ``onset + L`` to ``offset + L`` (full at direction 0, 0.3 of it at
    90/180/270), Poisson spikes by thinning. Fourier series of the rectified cosine: F0 = amp,
    F1 = amp pi / 2 (F1/F0 = pi / 2), and F1 referred to the stimulus onset has the phase
    ``PHI - 360 tf L``."""
    rng = np.random.default_rng(seed)
    dirs = np.tile([0.0, 90.0, 180.0, 270.0], repeats)
    dirs = dirs[rng.permutation(dirs.size)]
    n = dirs.size
    on = 1.0 + np.arange(n) * (dur + gap)
    table = GratingTable.from_columns(onset_s=on, offset_s=on + dur, orientation_deg=dirs, sf_cpd=np.full(n, 0.05),
                                      phase_deg=np.zeros(n), contrast=np.ones(n), tf_hz=np.full(n, tf))
    total = on[-1] + dur + gap + 1.0
    peak = spont + amp * np.pi
    times, cells = [], []
    for c, lat in enumerate(LATS):
        t = np.sort(rng.uniform(0.0, total, rng.poisson(peak * total)))
        k = np.clip(np.searchsorted(on, t - lat, side="right") - 1, 0, None)
        inside = (t - lat >= on[k]) & (t - lat < on[k] + dur)
        g = np.where(dirs[k] == 0.0, 1.0, 0.3)
        wave = np.maximum(np.cos(2 * np.pi * tf * (t - lat - on[k]) + np.deg2rad(PHI_DEG)), 0.0)
        keep = rng.random(t.size) < (spont + np.where(inside, g * amp * np.pi * wave, 0.0)) / peak
        times.append(t[keep])
        cells.append(np.full(keep.sum(), c))
    t, c = np.concatenate(times), np.concatenate(cells)
    o = np.argsort(t)
    return Spikes(time_s=t[o], cell=c[o], cell_ids=np.arange(LATS.size)), table


def _phase_error(dr, tf):
    """Signed error (deg) of each cell's F1 phase at direction 0 against ``PHI - 360 tf L``."""
    want = PHI_DEG - 360.0 * tf * LATS
    return (np.degrees(np.angle(dr.f1_mean[:, 0, 0, 0])) - want + 180.0) % 360.0 - 180.0


def test_drifting_windows_follow_each_cells_latency_spikes():
    """Issue 14: each cell's windows shifted by its own latency, estimated from its drifting responses
    (map2d.gratings.drifting_latency). Trials of 2 cycles (1 s at 2 Hz) analysed whole (skip_cycles=0):
    unshifted, a window holds L of spontaneous activity and misses the last L of the response.
    Measured on seeds 0-2 (8 cells per latency): latencies within 15 ms; with the shift the median F1
    phase error (truth PHI - 360 tf L) is at most 5.4 deg, F1 within 5 % of amp pi / 2 and F1/F0 within
    5 % of pi / 2 (Fourier series of the rectified cosine); unshifted, F1 reads 0.53-0.70 of the truth at
    L = 0.1-0.2 s and the phase is off by 7-15 deg at L = 0.2 s (F1/F0 only 2-8 % off: F0 loses nearly
    the same share)."""
    sp, table = _latency_spikes()
    auto = analyze_drifting(sp, table, skip_cycles=0, n_boot=0)
    none = analyze_drifting(sp, table, skip_cycles=0, n_boot=0, latency_s=0.0)
    np.testing.assert_allclose(auto.latency_s, LATS, atol=0.02)
    assert np.all(none.latency_s == 0.0)
    f1_true = 20.0 * np.pi / 2
    err_auto, err_none = _phase_error(auto, 2.0), _phase_error(none, 2.0)
    for lat in np.unique(LATS):
        s = LATS == lat
        assert abs(np.median(err_auto[s])) <= 6.0, lat
        assert abs(np.median(np.abs(auto.f1_mean[s, 0, 0, 0])) / f1_true - 1) <= 0.08, lat
        assert abs(np.median(auto.f1_f0[s]) / (np.pi / 2) - 1) <= 0.06, lat
    for lat in (0.1, 0.2):
        assert np.median(np.abs(none.f1_mean[LATS == lat, 0, 0, 0])) <= 0.75 * f1_true
    assert abs(np.median(err_none[LATS == 0.2])) >= 6.0


def test_drifting_windows_follow_each_cells_latency_traces():
    """Traces (the same cells through a first-order indicator of decay 0.4 s, sampled at 30 Hz): the
    latency comes from the drive ``r + tau dr/dt`` and is recovered to about one sample; with the shift F1/F0 of the L = 0.2 s cells reads 1.65 (truth pi / 2 = 1.57), unshifted 1.14:
    the indicator fit then assumes a drive present from the window's start."""
    sp, table = _latency_spikes()
    dt = 0.001
    total = table.offset_s[-1] + 2.0
    nb = int(total / dt)
    counts = np.zeros((LATS.size, nb))
    np.add.at(counts, (sp.cell, np.minimum((sp.time_s / dt).astype(int), nb - 1)), 1.0)
    calcium = lfilter([0.01], [1.0, -np.exp(-dt / 0.4)], counts, axis=1)
    ts = np.arange(0.0, total - 0.05, 1 / 30.0)
    noise = 0.005 * np.random.default_rng(1).standard_normal((LATS.size, ts.size))
    tr = Traces(values=calcium[:, (ts / dt).astype(int)] + noise, times_s=ts)
    auto = analyze_drifting(tr, table, skip_cycles=0, n_boot=0, trace_tau_s=0.4)
    none = analyze_drifting(tr, table, skip_cycles=0, n_boot=0, trace_tau_s=0.4, latency_s=0.0)
    # the sampling interval (33 ms) limits the estimate: a drive edge on a sample is half seen by both
    # neighbouring lags; measured: all but one cell within one sample (+17-37 ms), that one 103 ms late
    off = np.abs(auto.latency_s - LATS)
    assert np.mean(off <= 1 / 30.0 + 0.011) >= 0.9
    late = LATS == 0.2
    assert abs(np.median(auto.f1_f0[late]) / (np.pi / 2) - 1) <= 0.1
    assert np.median(none.f1_f0[late]) <= 0.8 * np.pi / 2
