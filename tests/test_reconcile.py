"""Tests for map2d.reconcile: forward and inverse prediction, agreement, size tuning, linearity call."""

import numpy as np
import pytest
import scipy.fft

from map2d.geometry import Grid, grating_image
from map2d.models import dog2d, gabor2d, gaussian2d
from map2d.reconcile import (band_limit, forward_agreement, inverse_comparison, inverse_map,
                             linearity_call, map_similarity, predict_gratings,
                             predict_static_responses, size_tuning)

GRID = Grid(ny=24, nx=25, center_x_deg=5.0, center_y_deg=-3.0, dx_deg=0.5, dy_deg=0.45)
ORIGIN = (5.5, -2.5)
ORI = np.arange(0.0, 180.0, 15.0)                     # 12 orientations
SFS = 0.08 * 2.0 ** (np.arange(8) / 2.0)              # 8 SFs, half-octave steps, 0.08-0.9 cpd
PHASES = np.arange(0.0, 360.0, 45.0)                  # 8 spatial phases


def _mesh():
    return GRID.mesh_deg()


def gabor_map(phase_deg=40.0, x0=5.3, y0=-3.2):
    x, y = _mesh()
    return gabor2d(x, y, x0, y0, 1.5, 1.2, 30.0, 0.4, phase_deg)


def dog_map():
    x, y = _mesh()
    return dog2d(x, y, 5.2, -2.8, 1.0, 0.8, 0.15, 2.0)


def grating_responses(m, ori, sf, phases, contrast=1.0, origin=ORIGIN):
    """Brute-force linear responses: dot product of the map with each contract grating image."""
    x, y = _mesh()
    out = np.empty((len(ori), len(sf), len(phases)))
    for a, o in enumerate(ori):
        for b, f in enumerate(sf):
            for c, p in enumerate(phases):
                img = grating_image(x, y, o, f, p, contrast=contrast, origin_deg=origin)
                out[a, b, c] = np.sum(m * img) * GRID.dx_deg * GRID.dy_deg
    return out


def first_harmonic(r, phases, contrast=1.0):
    """(2 / P) sum_p r(phi_p) exp(-i phi_p) / contrast: the measured complex response (geometry.py)."""
    e = np.exp(-1j * np.deg2rad(phases))
    return 2.0 / len(phases) * np.sum(r * e, axis=-1) / contrast


# ---------------------------------------------------------------------------------------------------
# forward prediction and linearity facts
# ---------------------------------------------------------------------------------------------------

def test_forward_prediction_equals_brute_force_dot_product_per_presentation():
    # numpy reference from the contract's grating formula, to 1e-9 relative
    rng = np.random.default_rng(0)
    m = gabor_map() + 0.1 * rng.normal(size=GRID.shape)
    n = 30
    ori, sf = rng.uniform(0, 360, n), rng.uniform(0.05, 0.9, n)
    ph, c = rng.uniform(0, 360, n), rng.uniform(0.1, 1.0, n)
    got = predict_static_responses(m, GRID, ori, sf, ph, c, ORIGIN)
    x, y = _mesh()
    ref = np.array([np.sum(m * grating_image(x, y, ori[k], sf[k], ph[k], c[k], ORIGIN))
                    for k in range(n)]) * GRID.dx_deg * GRID.dy_deg
    assert np.max(np.abs(got - ref)) <= 1e-9 * np.max(np.abs(ref))
    # the paired wave vectors actually shown, and the orientation x SF grid, agree with each other
    h_pairs = predict_gratings(m, GRID, ori, sf, ORIGIN, outer=False)
    assert np.allclose(c * np.real(h_pairs * np.exp(1j * np.deg2rad(ph))), got)
    h_grid = predict_gratings(np.stack([m, 2 * m]), GRID, ORI, SFS, ORIGIN)
    assert h_grid.shape == (2, len(ORI), len(SFS))
    assert np.allclose(h_grid[1], 2 * h_grid[0])


def test_first_harmonic_of_linear_responses_is_the_prediction():
    # geometry.py convention: first harmonic over phase of c Re(H exp(i phi)), divided by c, is H
    m = gabor_map()
    r = grating_responses(m, ORI[:4], SFS[3:6], PHASES, contrast=0.5)
    h = predict_gratings(m, GRID, ORI[:4], SFS[3:6], ORIGIN)
    assert np.allclose(first_harmonic(r, PHASES, 0.5), h, rtol=1e-9, atol=1e-12 * np.abs(h).max())


def test_prediction_scales_linearly_with_contrast():
    # Enroth-Cugell & Robson 1966 J Physiol 187:517: a linear cell's response is proportional to contrast
    m = dog_map()
    contrasts = np.array([0.0, 0.1, 0.25, 0.5, 1.0])
    r = predict_static_responses(m, GRID, 45.0, 0.3, 20.0, contrasts, ORIGIN)
    assert r[0] == 0.0
    assert np.allclose(r, contrasts * r[-1], rtol=1e-12, atol=0)
    assert abs(r[-1]) > 0.01


def test_phase_shift_of_180_deg_predicts_the_negative_response():
    # Hochstein & Shapley 1976 J Physiol 262:237: linear summation -> responses to counterphase pairs cancel
    m = gabor_map()
    ph = np.linspace(0, 360, 13)
    r = predict_static_responses(m, GRID, 30.0, 0.4, ph, 0.8, ORIGIN)
    r180 = predict_static_responses(m, GRID, 30.0, 0.4, ph + 180.0, 0.8, ORIGIN)
    assert np.allclose(r180, -r, atol=1e-12 * np.abs(r).max())
    assert np.abs(r).max() > 0.1


def test_even_symmetric_map_has_zero_sine_component():
    # Enroth-Cugell & Robson 1966; Hochstein & Shapley 1976: a map even about the phase origin has a
    # real Fourier component (zero sine part) at every wave vector
    grid = Grid(ny=21, nx=16, center_x_deg=2.0, center_y_deg=1.0, dx_deg=0.4, dy_deg=0.6)
    rng = np.random.default_rng(1)
    a = rng.normal(size=grid.shape)
    even = a + a[::-1, ::-1]                      # pixel centres are symmetric about the grid centre
    ori = rng.uniform(0, 360, 50)
    sf = rng.uniform(0.02, 0.8, 50)
    h = predict_gratings(even, grid, ori, sf, origin_deg=(2.0, 1.0), outer=False)
    assert np.max(np.abs(h.imag)) <= 1e-12 * np.max(np.abs(h))
    assert np.max(np.abs(h.real)) > 0.1
    # an odd map has a zero cosine part
    h_odd = predict_gratings(a - a[::-1, ::-1], grid, ori, sf, origin_deg=(2.0, 1.0), outer=False)
    assert np.max(np.abs(h_odd.real)) <= 1e-12 * np.max(np.abs(h_odd))


def test_null_phase_is_90_deg_from_best_phase():
    # Hochstein & Shapley 1976: for a linear cell there is a spatial phase with zero response, 90 deg
    # from the phase of the largest response. Brute-force responses over phase in 0.5 deg steps.
    m = gabor_map(phase_deg=65.0)
    phases = np.arange(0.0, 360.0, 0.5)
    r = grating_responses(m, [30.0], [0.4], phases)[0, 0]
    best = phases[np.argmax(r)]
    h = predict_gratings(m, GRID, [30.0], [0.4], ORIGIN)[0, 0]
    # predicted best phase -arg H, within the 0.5 deg search step
    d = (best + np.angle(h, deg=True) + 180.0) % 360.0 - 180.0
    assert abs(d) <= 0.5
    exact_best = -np.angle(h, deg=True)
    null = predict_static_responses(m, GRID, 30.0, 0.4, exact_best + np.array([90.0, -90.0]), 1.0,
                                    ORIGIN)
    assert np.max(np.abs(null)) <= 1e-9 * r.max()


# ---------------------------------------------------------------------------------------------------
# forward agreement
# ---------------------------------------------------------------------------------------------------

def test_linear_cell_with_noise_and_rectification_agrees():
    rng = np.random.default_rng(2)
    maps = np.stack([gabor_map(), dog_map()])
    pred = predict_gratings(maps, GRID, ORI, SFS, ORIGIN)
    # noisy measurement: gain * H + complex noise at 10 % of the rms |H|
    rms = np.sqrt(np.mean(np.abs(pred) ** 2, axis=(1, 2), keepdims=True))
    noise = 0.1 * rms * (rng.normal(size=pred.shape) + 1j * rng.normal(size=pred.shape)) / np.sqrt(2)
    res = forward_agreement(pred, 2.5 * pred + noise)
    assert np.all(res["agreement"] >= 0.95)
    assert np.allclose(res["gain"], 2.5, rtol=0.03)
    assert np.all(res["magnitude_agreement"] >= 0.9)
    assert np.all(res["phase_error_deg"] <= 10.0)
    assert np.all(res["n_conditions"] == pred[0].size)
    # half-wave rectification: the first harmonic of max(0, cos) is 1/2 of that of cos with the same
    # phase (Fourier series of the half-wave rectified cosine, derived); 8 phases alias only odd
    # harmonics >= 7, which the rectified cosine lacks, so the agreement is exactly 1
    r = np.maximum(grating_responses(gabor_map(), ORI, SFS, PHASES), 0.0)
    res = forward_agreement(pred[:1], first_harmonic(r, PHASES)[None])
    assert res["agreement"][0] > 1 - 1e-9
    assert res["gain"][0] == pytest.approx(0.5, rel=1e-9)


def test_phase_invariant_responses_disagree():
    rng = np.random.default_rng(3)
    even, odd = gabor_map(0.0), gabor_map(90.0)
    pred = predict_gratings(even, GRID, ORI, SFS, ORIGIN)
    # (a) |H| kept, phases scrambled: the magnitudes agree but the complex surface does not
    scrambled = np.abs(pred) * np.exp(2j * np.pi * rng.uniform(size=pred.shape))
    res = forward_agreement(pred[None], scrambled[None])      # leading axis: cells
    assert res["agreement"][0] <= 0.3
    assert res["magnitude_agreement"][0] > 0.99
    assert res["phase_error_deg"][0] > 45.0
    # (b) energy model (Adelson & Bergen 1985 J Opt Soc Am A 2:284): sum of squared quadrature
    # responses. Squares carry only harmonics 0 and 2 over phase, so the first harmonic is pure noise
    # although the phase-invariant response is large.
    r = (grating_responses(even, ORI, SFS, PHASES) ** 2 + grating_responses(odd, ORI, SFS, PHASES) ** 2)
    sd = 0.05 * r.max()
    r_noisy = r + sd * rng.normal(size=r.shape)
    measured = first_harmonic(r_noisy, PHASES)
    assert np.abs(measured).max() < 0.2 * r.mean(axis=-1).max()
    res = forward_agreement(np.stack([pred, predict_gratings(odd, GRID, ORI, SFS, ORIGIN)]),
                            np.stack([measured, measured]))
    assert np.all(res["agreement"] <= 0.3)
    # (c) opposite sign: the gain keeps its sign (-1) instead of being clipped to 0 (issue 14); the
    # linearity call then fails the cell for the sign, not for a made-up agreement of 0
    res = forward_agreement(pred.ravel(), -pred.ravel())      # 1-D: one cell, 0-d results
    assert float(res["gain"]) == pytest.approx(-1.0) and float(res["agreement"]) == pytest.approx(1.0)
    lin, why = linearity_call([float(res["agreement"])], gain=[float(res["gain"])])
    assert lin[0] is False and "opposite sign" in why[0]


def test_agreement_missing_conditions_and_empty_cells():
    pred = predict_gratings(np.stack([gabor_map(), gabor_map(), gabor_map()]), GRID, ORI, SFS, ORIGIN)
    meas = 3.0 * pred
    meas[0, :4] = np.nan                     # some conditions not measured: left out
    meas[1] = np.nan                         # no gratings for this cell
    meas[2, :, :] = np.nan
    meas[2, 0, :2] = 3.0 * pred[2, 0, :2]    # fewer than 3 conditions
    res = forward_agreement(pred, meas)
    assert res["agreement"][0] == pytest.approx(1.0)
    assert res["n_conditions"].tolist() == [pred[0].size - 4 * len(SFS), 0, 2]
    for key in ("gain", "agreement", "magnitude_agreement", "phase_error_deg"):
        assert np.isnan(res[key][1]) and np.isnan(res[key][2])
    # a flat-zero predicted map cannot be scored
    res = forward_agreement(np.zeros(10, complex), np.ones(10, complex))
    assert np.isnan(res["agreement"])
    with pytest.raises(ValueError, match="same shape"):
        forward_agreement(pred, meas[:, :3])


# ---------------------------------------------------------------------------------------------------
# inverse prediction and band limiting
# ---------------------------------------------------------------------------------------------------

def test_inverse_of_measured_linear_responses_returns_band_limited_map():
    # the complex surface "measured" by brute-force responses at 8 phases (not through fourier_at),
    # half-wave rectified (gain 1/2), on the coarse 12 x 8 grating set
    for m in (gabor_map(), dog_map()):
        r = np.maximum(grating_responses(m, ORI, SFS, PHASES), 0.0)
        measured = first_harmonic(r, PHASES)
        inv = inverse_map(measured, ORI, SFS, GRID, ORIGIN)
        bl = band_limit(m, GRID, ORI, SFS, ORIGIN)
        assert map_similarity(inv, bl) > 0.99
        assert np.sum(inv * bl) / np.sum(bl * bl) == pytest.approx(0.5, rel=1e-6)
    # the phase origin cancels in the band limit
    assert np.allclose(band_limit(m, GRID, ORI, SFS, (0.0, 0.0)), bl)


def test_inverse_of_forward_recovers_a_map_inside_a_densely_sampled_band():
    # inverse Fourier transform in polar coordinates with area weights f df dtheta (Bracewell): with
    # fine sampling, a map whose spectrum lies in the band comes back with its amplitude
    ori = np.arange(0.0, 180.0, 5.0)
    sfs = np.arange(0.05, 0.91, 0.05)
    for m in (gabor_map(), dog_map()):
        back = inverse_map(predict_gratings(m, GRID, ori, sfs, ORIGIN), ori, sfs, GRID, ORIGIN)
        assert map_similarity(back, m) > 0.99
        assert np.sum(back * m) / np.sum(m * m) == pytest.approx(1.0, abs=0.03)


def test_band_limit_agrees_with_fft_annulus_filter():
    # independent reference: keep the FFT coefficients (scipy.fft) with radial frequency inside the
    # band [first SF edge, last SF edge] and transform back. A localised broadband map, so the FFT's
    # periodic boundary does not matter.
    rng = np.random.default_rng(4)
    x, y = _mesh()
    blob = rng.normal(size=GRID.shape) * gaussian2d(x, y, 5.0, -3.0, 2.0, 2.0)
    ori = np.arange(0.0, 180.0, 5.0)
    fy = scipy.fft.fftfreq(GRID.ny, GRID.dy_deg)
    fx = scipy.fft.fftfreq(GRID.nx, GRID.dx_deg)
    f = np.hypot(fy[:, None], fx[None, :])
    for sfs, axis, lo, hi in [(np.arange(0.2, 0.61, 0.04), "linear", 0.18, 0.62),
                              (0.2 * 2 ** (np.arange(9) / 6), "log", 0.2 * 2 ** (-1 / 12),
                               0.2 * 2 ** (8 / 6 + 1 / 12))]:
        bl = band_limit(blob, GRID, ori, sfs, ORIGIN, sf_axis=axis)
        ref = np.real(scipy.fft.ifft2(scipy.fft.fft2(blob) * ((f >= lo) & (f <= hi))))
        assert map_similarity(bl, ref) > 0.95
        assert np.sum(bl * ref) / np.sum(ref * ref) == pytest.approx(1.0, abs=0.1)
        assert map_similarity(bl, blob) < 0.8          # the band limit really removed something


def test_inverse_comparison_returns_both_maps_and_nan_for_missing():
    maps = np.stack([gabor_map(), dog_map(), gabor_map()])
    measured = predict_gratings(maps, GRID, ORI, SFS, ORIGIN) * 4.0
    measured[1] = measured[1, ::-1]                 # wrong surface for cell 1
    measured[2, 0, 0] = np.nan                      # incomplete surface: no inverse
    res = inverse_comparison(measured, maps, GRID, ORI, SFS, ORIGIN)
    assert res.from_gratings.shape == res.from_map.shape == (3,) + GRID.shape
    assert res.similarity[0] > 0.999
    assert res.similarity[1] < 0.9
    assert np.isnan(res.similarity[2]) and np.all(np.isnan(res.from_gratings[2]))
    # a single SF: bin widths undefined, the inverse cannot be formed
    assert np.all(np.isnan(inverse_map(measured[:1, :, :1], ORI, SFS[:1], GRID, ORIGIN)))


def test_map_similarity_edge_cases():
    a = np.arange(20.0).reshape(4, 5)
    b = a.copy()
    b[0, 0] = np.nan
    assert map_similarity(a, b) == pytest.approx(1.0)
    assert np.isnan(map_similarity(a, np.ones_like(a)))
    assert np.isnan(map_similarity(a, np.full_like(a, np.nan)))


# ---------------------------------------------------------------------------------------------------
# size tuning
# ---------------------------------------------------------------------------------------------------

def test_disk_response_of_gaussian_and_uniform_map_match_the_integrals():
    grid = Grid(ny=41, nx=41, center_x_deg=1.0, center_y_deg=2.0, dx_deg=0.25, dy_deg=0.25)
    x, y = grid.mesh_deg()
    radii = np.array([0.0, 0.5, 1.0, 2.0, 4.0])
    # derived: integral of exp(-r^2 / rc^2) over a disk of radius R is pi rc^2 (1 - exp(-R^2 / rc^2))
    g = np.exp(-((x - 1.1) ** 2 + (y - 1.9) ** 2) / 1.0**2)
    disk, annulus = size_tuning(g, grid, (1.1, 1.9), radii)
    assert disk[0] == 0.0
    assert np.allclose(disk[1:], np.pi * (1 - np.exp(-radii[1:] ** 2)), rtol=0.01)
    assert np.allclose(annulus, disk[-1] - disk)
    # derived: a uniform map answers a disk with its area pi R^2
    disk, _ = size_tuning(np.ones(grid.shape), grid, (0.3, 2.4), radii[1:])
    assert np.allclose(disk, np.pi * radii[1:] ** 2, rtol=0.01)


def test_centre_surround_map_prefers_a_small_disk():
    # Enroth-Cugell & Robson 1966 J Physiol 187:517 (DoG): the surround reduces the response to a large
    # disk below that to a disk the size of the centre
    grid = Grid(ny=31, nx=31, center_x_deg=0.0, center_y_deg=0.0, dx_deg=0.5, dy_deg=0.5)
    x, y = grid.mesh_deg()
    on = dog2d(x, y, 0.7, -0.4, 1.0, 1.0, 0.08, 3.0)
    radii = np.linspace(0.25, 7.0, 28)
    disk, annulus = size_tuning(np.stack([on, -on]), grid, [(0.7, -0.4), (0.7, -0.4)], radii)
    small = disk[0, np.argmin(np.abs(radii - 1.25))]
    assert small > disk[0, -1] > 0
    assert small > 1.3 * disk[0, -1]
    assert np.argmax(disk[0]) < np.argmin(np.abs(radii - 2.5))     # peak near the centre size
    assert np.allclose(disk[1], -disk[0])                           # OFF centre: mirror image
    # an annulus whose hole covers the centre drives the surround alone: opposite sign
    assert annulus[0, np.argmin(np.abs(radii - 2.5))] < 0 < annulus[0, 0]
    # per-map centres: a shifted copy gives the same curve about its own centre
    shifted = dog2d(x, y, -1.3, 0.6, 1.0, 1.0, 0.08, 3.0)
    d2, _ = size_tuning(np.stack([on, shifted]), grid, [(0.7, -0.4), (-1.3, 0.6)], radii[:10])
    assert np.allclose(d2[0], d2[1], rtol=0.02)
    # no centre (unresponsive cell, no fit): empty, not invented
    d3, a3 = size_tuning(np.stack([on, on]), grid, [(0.7, -0.4), (np.nan, np.nan)], radii[:3])
    assert np.all(np.isfinite(d3[0])) and np.all(np.isnan(d3[1])) and np.all(np.isnan(a3[1]))
    with pytest.raises(ValueError, match="radii"):
        size_tuning(on, grid, (0, 0), [-1.0])


# ---------------------------------------------------------------------------------------------------
# linearity call
# ---------------------------------------------------------------------------------------------------

def test_linearity_call_reasons_and_empties():
    agreement = [0.92, 0.85, 0.10, 0.90, 0.88, np.nan, 0.95, np.nan]
    f1_f0 = [1.6, 0.5, 0.3, np.nan, 1.4, 1.2, 1.8, np.nan]
    overlap = [0.1, 0.2, 0.9, 0.15, 0.8, 0.1, 0.05, np.nan]
    responsive = [True, True, True, True, True, True, False, None]
    linear, reason = linearity_call(agreement, f1_f0, overlap, responsive)
    assert linear.tolist() == [True, False, False, True, False, None, None, None]
    assert reason[0].startswith("agreement 0.92 >= 0.50") and "f1/f0 1.60 > 1.00" in reason[0]
    assert reason[1] == "f1/f0 0.50 <= 1.00"                     # Skottun et al. 1991 decided
    assert reason[2] == "agreement 0.10 < 0.50; f1/f0 0.30 <= 1.00; ON/OFF overlap 0.90 > 0.50"
    assert "f1/f0" not in reason[3]                              # no drifting gratings: skipped
    assert reason[4] == "ON/OFF overlap 0.80 > 0.50"             # Hubel & Wiesel 1962 criterion
    assert reason[5] == "no flashed gratings"
    assert reason[6] == "not responsive"
    assert reason[7] == "no map"
    # optional inputs absent: the agreement alone decides; thresholds are parameters
    linear, reason = linearity_call(np.array([0.6, 0.4]))
    assert linear.tolist() == [True, False]
    linear, _ = linearity_call(np.array([0.6, 0.4]), agreement_threshold=0.7)
    assert linear.tolist() == [False, False]
    with pytest.raises(ValueError, match="f1_f0"):
        linearity_call([0.5, 0.6], f1_f0=[1.0, 2.0, 3.0])


# ---------------------------------------------------------------------------------------------------
# noise-corrected agreement and the pixel box
# ---------------------------------------------------------------------------------------------------

def _noisy_surfaces(n_rep, signal, var, rng):
    """``n_rep`` measurements of ``signal`` with circular complex Gaussian noise of variance ``var``."""
    e = (rng.standard_normal((n_rep,) + signal.shape) + 1j * rng.standard_normal((n_rep,) + signal.shape))
    return signal[None] + e * np.sqrt(var / 2)[None]


def test_noise_corrected_agreement_of_a_perfect_prediction_is_one():
    # Spearman's correction for attenuation (1904): with the noise power N known, a perfect
    # prediction scores P / (P + N) raw and 1 corrected; heteroscedastic noise (strong conditions
    # noisier, as for Poisson responses)
    rng = np.random.default_rng(4)
    pred = predict_gratings(gabor_map(), GRID, ORI, SFS, ORIGIN)
    shape = 0.2 + np.abs(pred) / np.max(np.abs(pred))
    var = 0.6 * np.sum(np.abs(3.0 * pred) ** 2) * shape / shape.sum()      # noise power 0.6 x signal
    meas = _noisy_surfaces(200, 3.0 * pred, var, rng)
    r = forward_agreement(np.broadcast_to(pred, meas.shape), meas,
                          noise_var=np.broadcast_to(var, meas.shape))
    p_pow, n_pow = np.sum(np.abs(3 * pred) ** 2), np.sum(var)
    assert abs(np.mean(r["agreement_raw"]) - p_pow / (p_pow + n_pow)) < 0.01
    assert np.mean(r["agreement_raw"]) < 0.85
    # unbiased before the clip to [0, 1]: half the estimates reach 1, the rest lie just below
    assert abs(np.median(r["agreement"]) - 1.0) < 0.02 and np.percentile(r["agreement"], 10) > 0.9
    assert np.all(r["noise_corrected"])
    assert np.all(r["signal_p"] < 1e-6)
    # an imperfect prediction keeps its true score: agreement with the noiseless surface
    other = predict_gratings(gabor_map(phase_deg=80.0), GRID, ORI, SFS, ORIGIN)
    true_score = float(forward_agreement(other.ravel(), 3.0 * pred.ravel())["agreement"])
    r = forward_agreement(np.broadcast_to(other, meas.shape), meas, noise_var=np.broadcast_to(var, meas.shape))
    assert 0.2 < true_score < 0.9
    assert abs(np.median(r["agreement"]) - true_score) < 0.03
    assert np.mean(r["agreement_raw"]) < true_score - 0.05


def test_surface_of_pure_noise_is_not_corrected_and_scores_near_zero():
    # no first harmonic at all (a phase-invariant cell): the signal test holds its level
    # (Satterthwaite's scaled chi-square, derived in forward_agreement), the score stays raw and small
    rng = np.random.default_rng(5)
    pred = predict_gratings(gabor_map(), GRID, ORI, SFS, ORIGIN)
    var = 1e-3 * (0.2 + np.abs(pred) / np.max(np.abs(pred)))
    meas = _noisy_surfaces(2000, np.zeros_like(pred), var, rng)
    r = forward_agreement(np.broadcast_to(pred, meas.shape), meas, noise_var=np.broadcast_to(var, meas.shape),
                          alpha=0.05)
    frac = np.mean(r["signal_p"] < 0.05)
    assert 0.03 < frac < 0.07                                  # the nominal 5 %
    assert np.mean(r["noise_corrected"]) == pytest.approx(frac, abs=0.01)
    assert np.all(r["agreement"][~r["noise_corrected"]] == r["agreement_raw"][~r["noise_corrected"]])
    assert np.median(r["agreement_raw"]) < 0.03 and abs(np.mean(r["signal_fraction"])) < 0.05
    # without noise_var nothing changes
    r0 = forward_agreement(pred.ravel(), 2 * pred.ravel())
    assert float(r0["agreement"]) == float(r0["agreement_raw"]) == pytest.approx(1.0)
    assert np.isnan(r0["signal_p"]) and not bool(r0["noise_corrected"])
    with pytest.raises(ValueError, match="noise_var"):
        forward_agreement(pred[None], pred[None], noise_var=np.ones(3))


def test_pixel_box_transfer_is_the_fourier_sum_ratio_of_a_pixel_averaged_map():
    # the Fourier sum of a kernel averaged over each pixel is the kernel's H times sinc(kx dx) sinc(ky dy)
    # (transform of a box; Bracewell 2000), up to sampling error, at wave vectors below Nyquist
    from map2d.reconcile import pixel_box_transfer
    x, y = _mesh()
    n_sub = 9
    off = (np.arange(n_sub) + 0.5) / n_sub - 0.5
    fine = sum(gabor2d(x + a * GRID.dx_deg, y + b * GRID.dy_deg, 5.3, -3.2, 1.5, 1.2, 30.0, 0.4, 40.0)
               for a in off for b in off) / n_sub**2
    ori, sf = ORI[:, None], np.array([0.2, 0.4, 0.6])[None, :]
    h_pix = predict_gratings(fine, GRID, ORI, sf[0], ORIGIN)
    h_bare = predict_gratings(gabor_map(), GRID, ORI, sf[0], ORIGIN)
    t = pixel_box_transfer(GRID, ori, sf)
    strong = np.abs(h_bare) > 0.2 * np.max(np.abs(h_bare))
    assert np.all(np.abs(h_pix / t - h_bare)[strong] < 0.01 * np.max(np.abs(h_bare)))
    assert np.all(np.abs(h_pix - h_bare)[strong].max() > 0.02 * np.max(np.abs(h_bare)))
    # beyond min_value (far past Nyquist) no correction
    assert float(pixel_box_transfer(GRID, 0.0, 1.5 / GRID.dx_deg)) == 1.0


def test_forward_prediction_above_the_grid_nyquist_uses_the_model_spectrum():
    """Issue 14, effect 1: 4-deg pixels, a Gabor of 0.08 cpd, a perfect (noiseless, pixel-integrated)
    map and gratings to 0.32 cpd. The sampled map's Fourier sum over the pixel box (the old forward
    prediction) mirrors the spectrum beyond Nyquist (0.125 cpd): |H| 63.5 at 165 deg, 0.16 cpd where
    the kernel's transform is < 0.01, and the agreement of a perfect map with the truth is only 0.69.
    The closed-form spectrum of the fitted model (here the true parameters) agrees to >= 0.9999."""
    from map2d.reconcile import forward_prediction, pixel_box_transfer
    from map2d.spectral import gabor_spectrum
    d, n = 4.0, 20
    g = Grid(ny=12, nx=16, center_x_deg=0.0, center_y_deg=0.0, dx_deg=d, dy_deg=d)
    u = ((np.arange(n) + 0.5) / n - 0.5) * d
    x = g.x_deg[None, :, None, None] + u[None, None, None, :]
    y = g.y_deg[:, None, None, None] + u[None, None, :, None]
    par = (2.0, -1.0, 6.0, 8.0, 30.0, 0.08, 20.0, 1.0)
    pix = gabor2d(x, y, *par).mean(axis=(2, 3))                  # the kernel averaged over each pixel
    ori, sf = np.arange(12) * 15.0, np.array([0.02, 0.04, 0.08, 0.12, 0.16, 0.24, 0.32])
    truth = gabor_spectrum(ori[:, None], sf[None], *par, origin_deg=(0.0, 0.0))
    old = predict_gratings(pix, g, ori, sf, (0.0, 0.0)) / pixel_box_transfer(g, ori[:, None], sf[None])
    assert abs(old[11, 4]) == pytest.approx(63.5, abs=0.5) and abs(truth[11, 4]) < 0.01
    assert forward_agreement(old[None], truth[None])["agreement"][0] == pytest.approx(0.69, abs=0.01)
    fits = {"model": np.array(["gabor"], object), "center_x_deg": [2.0], "center_y_deg": [-1.0],
            "amplitude": [1.0], "gabor_sigma_u_deg": [6.0], "gabor_sigma_v_deg": [8.0],
            "gabor_orientation_deg": [30.0], "gabor_sf_cpd": [0.08], "gabor_phase_deg": [20.0]}
    new, sampled = forward_prediction(fits, [True], pix[None], g, ori, sf, (0.0, 0.0))
    np.testing.assert_allclose(new[0], truth, atol=1e-9)
    assert forward_agreement(new, truth[None])["agreement"][0] >= 0.9999
    # the sampled-map diagnostic is kept inside the Nyquist band only, where it is close to the truth
    inside = np.isfinite(sampled[0])
    assert inside[:, :3].all() and not inside[:, 5:].any()     # per axis: 0.16 cpd at 45 deg is inside
    assert forward_agreement(sampled, truth[None])["agreement"][0] >= 0.999
    # a missing fit (e.g. rejected: NaN parameters) and no usable map: no prediction at all
    fits["gabor_sf_cpd"] = [np.nan]
    none, _ = forward_prediction(fits, [True], np.full((1,) + g.shape, np.nan), g, ori, sf, (0.0, 0.0))
    assert np.isnan(none).all()


def test_local_visual_angle_columns_scale_azimuth_by_cos_elevation():
    """Issue 14, item 7. At elevation 60 deg a step of azimuth spans cos 60 = 1/2 as much visual angle
    (spherical azimuth-elevation grid; common practice in mouse work, Marshel et al. 2011, cited from
    memory): a field of sd 4 deg of azimuth and 2 deg of elevation is round in local degrees (sd 2), a
    grating of 0.05 cycles per azimuth degree has 0.1 cycles per local degree, and at the horizon
    nothing changes. Oblique wave vectors turn toward the azimuth axis: (kx / cos e, ky)."""
    from map2d.reconcile import local_angle_columns
    fits = {"size_deg": [np.sqrt(8.0)] * 3, "sigma_major_deg": [4.0] * 3, "sigma_minor_deg": [2.0] * 3,
            "theta_deg": [0.0] * 3, "gabor_sf_cpd": [0.05, 0.05, np.nan], "gabor_orientation_deg": [0.0, 45.0, 0.0]}
    tuning = {"pref_sf_cpd": [0.05, 0.05, 0.05], "pref_orientation_deg": [90.0, 45.0, 0.0]}
    c = local_angle_columns([60.0, 0.0, 89.0], fits, tuning)
    assert c["sigma_major_local_deg"][0] == pytest.approx(2.0) and c["sigma_minor_local_deg"][0] == pytest.approx(2.0)
    assert c["size_local_deg"][0] == pytest.approx(2.0)          # sqrt(8) * sqrt(1/2)
    assert c["gabor_sf_local_cpd"][0] == pytest.approx(0.1)
    assert c["pref_sf_local_cpd"][0] == pytest.approx(0.05)
    assert c["pref_orientation_local_deg"][0] == pytest.approx(90.0)
    # horizon: unchanged
    assert c["sigma_major_local_deg"][1] == pytest.approx(4.0) and c["theta_local_deg"][1] == pytest.approx(0.0)
    assert c["gabor_sf_local_cpd"][1] == pytest.approx(0.05)
    assert c["gabor_orientation_local_deg"][1] == pytest.approx(45.0)
    # against a direct computation at e = 60 for the oblique grating: kx = ky = 0.05 / sqrt(2)
    c60 = local_angle_columns([60.0], {}, {"pref_sf_cpd": [0.05], "pref_orientation_deg": [45.0]})
    k = 0.05 / np.sqrt(2)
    assert c60["pref_sf_local_cpd"][0] == pytest.approx(np.hypot(2 * k, k))
    assert c60["pref_orientation_local_deg"][0] == pytest.approx(np.degrees(np.arctan(0.5)))
    # too close to the pole, or a missing input: NaN
    assert np.isnan(c["size_local_deg"][2]) and np.isnan(c["gabor_sf_local_cpd"][2])


def test_size_tuning_of_many_cells_equals_the_direct_sum():
    """Every cell's disk response is the sum of the map over the sub-sample points within the radius
    (the definition, written out point by point), for unsorted radii, a NaN pixel and a NaN centre."""
    grid = Grid(ny=9, nx=11, center_x_deg=1.0, center_y_deg=-2.0, dx_deg=1.5, dy_deg=1.2)
    rng = np.random.default_rng(5)
    maps = rng.standard_normal((40, 9, 11))
    maps[3, 4, 5] = np.nan
    centres = rng.uniform(-6, 6, (40, 2))
    centres[7] = np.nan
    radii = np.array([3.0, 0.5, 6.0, 0.0, 9.0])
    disk, annulus = size_tuning(maps, grid, centres, radii, supersample=4)
    u = (np.arange(4) + 0.5) / 4 - 0.5
    sx = (grid.x_deg[:, None] + u * grid.dx_deg).ravel()
    sy = (grid.y_deg[:, None] + u * grid.dy_deg).ravel()
    area = grid.dx_deg * grid.dy_deg / 16
    for c in range(40):
        sub = np.repeat(np.repeat(maps[c], 4, axis=0), 4, axis=1) * area
        d2 = (sx[None, :] - centres[c, 0]) ** 2 + (sy[:, None] - centres[c, 1]) ** 2
        for r, rad in enumerate(radii):
            ref = np.sum(sub[d2 <= rad ** 2]) if np.all(np.isfinite(centres[c])) else np.nan
            assert np.isclose(disk[c, r], ref, rtol=1e-12, atol=1e-12, equal_nan=True), (c, r)
    assert np.allclose(annulus, disk[:, [4]] - disk, equal_nan=True)
    assert np.isnan(disk[3]).any() and np.isnan(disk[7]).all()
