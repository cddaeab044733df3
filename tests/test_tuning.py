"""Tuning fits and selectivity indices: circular variance, OSI, von Mises, SF fits, F1/F0 helper."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from map2d.fit.tuning import (circular_variance, dog_sf, f1_f0, fit_direction, fit_orientation, fit_sf,
                              fit_sf_surface, gaussian_sf, grating_tuning_columns,
                              log_gaussian_sf, osi, von_mises_direction, von_mises_orientation)

TH = np.arange(0.0, 180.0, 7.5)


def test_circular_variance_of_flat_tuning_is_one():
    cv, pref = circular_variance(TH, np.ones(TH.size))
    assert cv == pytest.approx(1.0)        # Ringach, Shapley & Hawken 2002 definition
    assert np.isnan(pref)


def test_circular_variance_of_a_single_orientation_is_zero():
    r = np.zeros(TH.size)
    r[8] = 5.0
    cv, pref = circular_variance(TH, r)
    assert cv == pytest.approx(0.0, abs=1e-12)
    assert pref == pytest.approx(TH[8])


def test_circular_variance_of_raised_cosine_is_one_half_with_preference_45():
    # |sum (1 + cos 2(t - 45)) exp(2it)| / sum(...) = (N/2) / N (Ringach, Shapley & Hawken 2002 definition)
    cv, pref = circular_variance(TH, 1 + np.cos(2 * np.deg2rad(TH - 45.0)))
    assert cv == pytest.approx(0.5, abs=1e-12)
    assert pref == pytest.approx(45.0, abs=1e-9)


def test_circular_variance_of_von_mises_matches_bessel_ratio():
    th = np.arange(0.0, 180.0, 1.0)
    cv, pref = circular_variance(th, np.exp(2 * np.cos(2 * np.deg2rad(th - 70.0))))
    expected = 1 - special.iv(1, 2) / special.iv(0, 2)   # scipy.special modified Bessel functions
    assert expected == pytest.approx(0.30223, abs=1e-5)  # value quoted in issue 4
    assert cv == pytest.approx(expected, abs=1e-9)
    assert pref == pytest.approx(70.0, abs=1e-9)


def test_orientation_and_orientation_plus_180_give_identical_results():
    rng = np.random.default_rng(0)
    r = rng.random(TH.size) + von_mises_orientation(TH, 0.5, 3.0, 1.5, 120.0)
    a = circular_variance(TH, r)
    b = circular_variance(TH + 180.0, r)
    np.testing.assert_allclose(a, b, atol=1e-12)
    assert osi(TH, r) == pytest.approx(osi(TH + 180.0, r))
    fa, fb = fit_orientation(TH, r), fit_orientation(TH + 180.0, r)
    assert fa.pref_deg == pytest.approx(fb.pref_deg, abs=1e-6)
    assert fa.hwhh_deg == pytest.approx(fb.hwhh_deg, abs=1e-6)


def test_osi_of_sampled_curve():
    # (R_pref - R_orth) / (R_pref + R_orth), Ringach, Shapley & Hawken 2002
    assert osi([0, 45, 90, 135], [10.0, 5.0, 2.0, 5.0]) == pytest.approx(8 / 12)
    assert osi([0, 45, 90, 135], [10.0, 5.0, -3.0, 5.0]) == pytest.approx(1.0)   # negatives set to 0
    assert np.isnan(osi([0, 45, 90, 135], np.zeros(4)))


def test_von_mises_orientation_fit_recovers_preference_width_and_ci():
    rng = np.random.default_rng(1)
    th = np.arange(0.0, 180.0, 15.0)
    truth = von_mises_orientation(th, 2.0, 10.0, 2.5, 172.0)
    y = truth + 0.3 * rng.standard_normal(th.size)
    f = fit_orientation(th, y)
    assert f.ok
    d = abs((f.pref_deg - 172.0 + 90) % 180 - 90)
    assert d < 2.0
    assert 0 < f.pref_ci95_deg < 5
    # half height: exp(k (cos 2d - 1)) = 1/2 -> d = acos(1 - ln2 / k) / 2 (solve the model)
    assert f.hwhh_deg == pytest.approx(np.degrees(np.arccos(1 - np.log(2) / 2.5) / 2), abs=2.0)
    xs = np.linspace(172.0, 172.0 + 90, 20001)
    vals = von_mises_orientation(xs, 0.0, 1.0, 2.5, 172.0)
    assert xs[np.argmin(np.abs(vals - 0.5))] - 172.0 == pytest.approx(_hwhh(2.5), abs=0.01)


def _hwhh(kappa):
    return np.degrees(np.arccos(1 - np.log(2) / kappa) / 2)


def test_orientation_fit_with_too_few_points_or_flat_data_gives_nan():
    f = fit_orientation([0, 45, 90, 135], [1, 2, 3, 2])
    assert not f.ok and np.isnan(f.pref_deg)
    f = fit_orientation(TH, np.full(TH.size, 3.0))
    assert not f.ok and np.isnan(f.hwhh_deg)


def test_broad_tuning_has_no_half_width():
    # kappa < ln2 / 2: the curve never falls to half its height above baseline
    f = fit_orientation(TH, von_mises_orientation(TH, 0.0, 4.0, 0.2, 30.0))
    assert f.ok and np.isnan(f.hwhh_deg)
    assert abs((f.pref_deg - 30.0 + 90) % 180 - 90) < 0.5


def test_direction_fit_finds_larger_peak():
    th = np.arange(0.0, 360.0, 30.0)
    y = von_mises_direction(th, 1.0, 2.0, 6.0, 2.0, 40.0)     # larger peak at 220
    f = fit_direction(th, y)
    assert f.ok and f.pref_deg == pytest.approx(220.0, abs=0.5)


def test_sf_fit_log_gaussian_truth():
    f = np.geomspace(0.02, 1.28, 7)
    s = fit_sf(f, log_gaussian_sf(f, 0.5, 4.0, np.log2(0.17), 0.9))
    assert s.model == "log_gaussian"
    assert s.pref_cpd == pytest.approx(0.17, rel=1e-3)
    assert s.bandwidth_oct == pytest.approx(2 * np.sqrt(2 * np.log(2)) * 0.9, rel=1e-3)   # FWHH of a Gaussian


def test_sf_fit_gabor_spectrum_truth():
    # a Gabor's spectrum along its wave vector is Gaussian in linear SF (Fourier pair of the envelope)
    f = np.geomspace(0.05, 0.8, 8)
    s = fit_sf(f, gaussian_sf(f, 0.0, 3.0, 0.25, 0.07))
    assert s.model == "gaussian"
    assert s.pref_cpd == pytest.approx(0.25, rel=1e-3)
    h = np.sqrt(2 * np.log(2)) * 0.07
    assert s.bandwidth_oct == pytest.approx(np.log2((0.25 + h) / (0.25 - h)), rel=1e-3)


def test_sf_fit_ci_covers_truth_in_noise():
    rng = np.random.default_rng(3)
    f = np.geomspace(0.02, 1.28, 7)
    hits = 0
    for _ in range(20):
        y = log_gaussian_sf(f, 0.0, 5.0, np.log2(0.15), 1.0) + 0.25 * rng.standard_normal(f.size)
        s = fit_sf(f, y)
        hits += s.pref_ci_low_cpd <= 0.15 <= s.pref_ci_high_cpd
    assert hits >= 15          # nominal 95 % (common practice: allow for 20 draws)


def test_sf_peak_outside_the_tested_range_is_not_reported():
    f = np.geomspace(0.1, 0.8, 6)
    s = fit_sf(f, log_gaussian_sf(f, 0.0, 5.0, np.log2(0.02), 1.0))   # low-pass within the range
    assert np.isnan(s.pref_cpd)


def test_f1_f0_helper():
    r = f1_f0([2.0, 0.0, -1.0], [3.0 + 4.0j, 1.0, 1.0])
    assert r[0] == pytest.approx(2.5)
    assert np.isnan(r[1]) and np.isnan(r[2])


# ----------------------------------------------------------------------------------------------
# fast fits: analytic Jacobians, screened starts, worker processes
# ----------------------------------------------------------------------------------------------
def test_analytic_jacobians_match_finite_differences():
    from scipy.optimize._numdiff import approx_derivative   # scipy's own differencing as reference

    from map2d.fit.tuning import _jac_direction, _jac_gauss, _jac_orientation
    th = np.arange(0.0, 360.0, 30.0)
    f = np.geomspace(0.02, 0.64, 6)
    cases = [(von_mises_orientation, _jac_orientation, th, [0.3, 2.0, 3.3, 37.0]),
             (von_mises_direction, _jac_direction, th, [0.3, 2.0, 1.2, 2.5, 200.0]),
             (log_gaussian_sf, lambda x, *p: _jac_gauss(np.log2(x), *p), f, [0.3, 2.0, -3.0, 1.1]),
             (gaussian_sf, _jac_gauss, f, [0.3, 2.0, 0.1, 0.07])]
    for model, jac, x, p in cases:
        num = approx_derivative(lambda q: model(x, *q), np.array(p, float), method="3-point")
        np.testing.assert_allclose(jac(x, *p), num, rtol=1e-6, atol=1e-8 * np.abs(num).max())


def _multistart_ssr(model, jac, x, y, starts, lower, upper):
    """The smallest SSR of plain bounded fits from many hand-made starts."""
    from scipy import optimize
    best = np.inf
    for p0 in starts:
        p0 = np.clip(p0, np.array(lower) + 1e-9, np.array(upper) - 1e-9)
        r = optimize.least_squares(lambda p: model(x, *p) - y, p0, jac=lambda p: jac(x, *p),
                                   bounds=(lower, upper), max_nfev=2000)
        best = min(best, 2 * r.cost)
    return best


def test_screened_fits_are_no_worse_than_many_starts():
    # the screened start(s) + refinement must reach the best of a broad multi-start search
    from map2d.fit.tuning import _jac_direction, _jac_orientation
    rng = np.random.default_rng(7)
    th_o = np.arange(0.0, 180.0, 15.0)
    for _ in range(4):
        y = von_mises_orientation(th_o, 1.0, 4.0, rng.uniform(0.5, 8), rng.uniform(0, 360))
        y = y + 0.6 * rng.standard_normal(th_o.size)
        fo = fit_orientation(th_o, y)
        span = max(abs(y.max()), abs(y.min()), np.ptp(y))
        lo, hi = [-10 * span, 0, 1e-3, -360], [10 * span, 20 * span, 50, 360]
        ref = _multistart_ssr(von_mises_orientation, _jac_orientation, th_o, y,
                              [[y.min(), np.ptp(y), kk, tt] for kk in (0.5, 3, 20) for tt in range(-150, 180, 30)],
                              lo, hi)
        assert np.sum((von_mises_orientation(th_o, *fo.params) - y) ** 2) <= ref * (1 + 1e-5)
    # 8 directions, narrow peaks between samples: curves of a simulated 500-cell session on which
    # refining only the best screened start stopped in a worse minimum (0.5 % and 1.6 % more SSR)
    th_d = np.arange(0.0, 360.0, 45.0)
    curves = [[4.09, 0.58, 1.01, 10.03, 2.83, 1.11, 0.84, 11.55],
              [13.44, 14.17, 16.69, 14.07, 13.64, 16.05, 19.26, 13.41],
              von_mises_direction(th_d, 1.0, 4.0, 2.5, 12.0, 100.0) + rng.standard_normal(8)]
    for y in map(np.asarray, curves):
        fd = fit_direction(th_d, y)
        span = max(abs(y.max()), abs(y.min()), np.ptp(y))
        lo, hi = [-10 * span, 0, 0, 1e-3, -360], [10 * span, 20 * span, 20 * span, 50, 360]
        ref = _multistart_ssr(von_mises_direction, _jac_direction, th_d, y,
                              [[y.min(), np.ptp(y), a2 * np.ptp(y), kk, tt] for a2 in (0.1, 0.8)
                               for kk in (0.5, 3, 20) for tt in range(-135, 180, 45)], lo, hi)
        assert np.sum((von_mises_direction(th_d, *fd.params) - y) ** 2) <= ref * (1 + 1e-5)


def _fake_results(n_cells, rng):
    """Duck-typed flashed and drifting results holding only what the tuning columns read."""
    from types import SimpleNamespace
    ori, sfs = np.arange(0.0, 180.0, 15.0), np.array([0.02, 0.04, 0.08, 0.16])
    dirs, dsfs = np.arange(0.0, 360.0, 45.0), np.array([0.04, 0.08])
    ids = np.arange(n_cells) * 3 + 5
    surf = np.empty((n_cells, ori.size, sfs.size))
    resp = np.empty((n_cells, dirs.size, dsfs.size, 1))
    for c in range(n_cells):
        t0, k, f0 = rng.uniform(0, 180), rng.uniform(0.3, 5), rng.uniform(0.03, 0.12)
        o = von_mises_orientation(ori, 0.2, 3.0, k, t0)
        surf[c] = np.outer(o, log_gaussian_sf(sfs, 0.0, 1.0, np.log2(f0), 1.0)) + 0.2 * rng.standard_normal((ori.size, 4))
        d = von_mises_direction(dirs, 0.5, 3.0, rng.uniform(0, 3), k, t0)
        resp[c] = (d[:, None] * np.array([1.0, 0.6]))[..., None] + 0.3 * rng.standard_normal((dirs.size, 2, 1))
    responsive = rng.random(n_cells) < 0.85
    fl = SimpleNamespace(cell_ids=ids, orientations_deg=ori, sfs_cpd=sfs, peak_response=surf,
                         p_value=np.where(responsive, 1e-4, 0.5), responsive=responsive,
                         peak_lag_s=np.full(n_cells, 0.05))
    dresp = rng.random(n_cells) < 0.85
    pref = np.array([np.unravel_index(int(np.argmax(r)), r.shape) for r in resp])
    dr = SimpleNamespace(cell_ids=ids, directions_deg=dirs, sfs_cpd=dsfs, response=resp, pref_index=pref,
                         p_value=np.where(dresp, 1e-3, 0.4), responsive=dresp, f1_f0=rng.random(n_cells) * 2,
                         simple=rng.random(n_cells) < 0.5, dsi=rng.random(n_cells),
                         pref_direction_deg=dirs[pref[:, 0]])
    return fl, dr


def test_worker_processes_give_the_serial_columns_exactly():
    from map2d.fit.tuning import TUNING_COLUMNS, grating_tuning_columns
    fl, dr = _fake_results(24, np.random.default_rng(11))
    ids = np.concatenate([fl.cell_ids, [1000, 1001]])          # two cells without any grating result
    serial = grating_tuning_columns(fl, dr, cell_ids=ids, n_jobs=1)
    forked = grating_tuning_columns(fl, dr, cell_ids=ids, n_jobs=2)
    assert list(serial) == list(TUNING_COLUMNS)
    assert serial["cell"] == sorted(int(c) for c in ids)
    for k in TUNING_COLUMNS:
        a, b = np.array(serial[k], dtype=object), np.array(forked[k], dtype=object)
        assert a.astype(str).tolist() == b.astype(str).tolist(), k
    fitted = np.isfinite(np.array(serial["pref_orientation_deg"], float))
    assert fitted.sum() >= 10                                    # the fits did run
    assert np.isfinite(np.array(serial["pref_direction_deg"], float)).sum() >= 10


def test_no_worker_processes_by_default_beside_other_threads():
    # a forked copy of a threaded process (e.g. a batch worker) can hang on a lock: stay serial there
    import threading

    from map2d.fit.tuning import _may_start_processes
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not _may_start_processes()
    finally:
        stop.set()
        t.join()


def _skimage_gabor_surface(theta_deg, sf_cpd, dx_deg=0.25):
    """|H| of an even, elongated Gabor from ``skimage.filters.gabor_kernel`` by exact Fourier sums
    ``sum k(x) exp(i 2 pi k.x) dA`` at the given orientations x SFs, and a function giving ``|H|`` anywhere."""
    filters = pytest.importorskip("skimage.filters")
    # carrier 0.1 cycles/pixel (0.4 cpd at 0.25 deg/pixel) at 37 deg, envelope 4 x 8 pixels (elongated
    # along the bars); skimage's kernel is exp(-(x'^2/sx^2 + y'^2/sy^2)/2) cos(2 pi f x')
    k = np.real(filters.gabor_kernel(0.1, theta=np.deg2rad(37.0), sigma_x=4.0, sigma_y=8.0, n_stds=4))
    n_r, n_c = k.shape
    yy, xx = np.mgrid[:n_r, :n_c]
    x = (xx - (n_c - 1) / 2) * dx_deg
    y = (yy - (n_r - 1) / 2) * dx_deg

    def mag(th_deg, f):
        th, f = np.broadcast_arrays(np.deg2rad(np.asarray(th_deg, float)), np.asarray(f, float))
        kx, ky = f * np.cos(th), f * np.sin(th)
        ph = np.exp(2j * np.pi * (kx[..., None] * x.ravel() + ky[..., None] * y.ravel()))
        return np.abs(ph @ k.ravel()) * dx_deg**2

    return mag(np.asarray(theta_deg)[:, None], np.asarray(sf_cpd)[None, :]), mag


def test_sf_from_the_surface_finds_the_peak_of_an_elongated_gabor_spectrum():
    """The preferred SF of a Gabor is where its spectrum peaks (Jones & Palmer 1987 model; the spectrum
    is the Fourier pair of the Gaussian envelope, Bracewell). Rows off the preferred orientation peak at
    lower SFs, so averaging the rows near the preference reads the SF low; the surface fit does not.
    Reference spectrum: exact Fourier sums of skimage.filters.gabor_kernel."""
    from scipy import optimize

    th = np.arange(0.0, 180.0, 15.0)          # the preference (37 deg + rotation sign) lies between rows
    f = np.geomspace(0.1, 0.8, 7)             # half an octave apart
    surface, mag = _skimage_gabor_surface(th, f)
    # the true peak, numerically, from the best grid point
    i, j = np.unravel_index(np.argmax(surface), surface.shape)
    res = optimize.minimize(lambda p: -mag(p[0], p[1]), [th[i], f[j]], method="Nelder-Mead",
                            options={"xatol": 1e-7, "fatol": 1e-12})
    true_theta, true_sf = res.x
    ofit = fit_orientation(th, surface.max(axis=1))
    off = abs((th - true_theta + 90) % 180 - 90).min()
    assert off > 5.0                           # the test is about rows that miss the preference
    s = fit_sf_surface(th, f, surface, ofit)
    assert s.ok
    assert s.pref_cpd == pytest.approx(true_sf, rel=0.01)
    assert s.pref_ci_low_cpd <= s.pref_cpd <= s.pref_ci_high_cpd
    # why: the three rows nearest the preference, pooled, give an SF curve that peaks low
    near = np.argsort(abs((th - ofit.pref_deg + 90) % 180 - 90))[:3]
    pooled = fit_sf(f, surface[near].mean(axis=0))
    assert pooled.pref_cpd < true_sf * 0.98


def test_sf_from_the_surface_needs_an_orientation_fit_and_three_sfs():
    th = np.arange(0.0, 180.0, 15.0)
    surface, _ = _skimage_gabor_surface(th, np.array([0.2, 0.4]))
    ofit = fit_orientation(th, surface.max(axis=1))
    assert not fit_sf_surface(th, [0.2, 0.4], surface, ofit).ok
    surface, _ = _skimage_gabor_surface(th, np.array([0.2, 0.3, 0.4]))
    assert not fit_sf_surface(th, [0.2, 0.3, 0.4], surface, fit_orientation(th, np.ones(th.size))).ok


# ----------------------------------------------------------------------------------------------
# DoG spectrum as an SF model (centre-surround cells)
# ----------------------------------------------------------------------------------------------
def _half_height_octaves(f, y):
    """Octaves between the half-height points of a densely sampled single-peaked curve (by definition)."""
    above = np.flatnonzero(y >= y.max() / 2)
    return np.log2(f[above[-1]] / f[above[0]])


def test_sf_fit_dog_spectrum_truth():
    from map2d.models import dog_peak_sf, dog_spectrum
    f = np.geomspace(0.01, 0.32, 7)
    for kc, rc, ks, rs in ((1.0, 1.2, 0.3, 2.5), (1.0, 1.0, 0.2, 2.2)):
        s = fit_sf(f, dog_spectrum(f, kc, rc, ks, rs))
        assert s.model == "dog" and s.params_model == "dog"
        # closed-form peak of the DoG spectrum (Enroth-Cugell & Robson 1966; map2d.models.dog_peak_sf)
        assert s.pref_cpd == pytest.approx(dog_peak_sf(kc, rc, ks, rs), rel=0.01)
        assert s.pref_ci_low_cpd <= s.pref_cpd <= s.pref_ci_high_cpd
        fine = np.geomspace(0.001, 1.0, 200001)
        # full bandwidth at half height, from the definition on a dense grid
        assert s.bandwidth_oct == pytest.approx(_half_height_octaves(fine, dog_spectrum(fine, kc, rc, ks, rs)),
                                                abs=1e-3)
        assert dog_sf(f, *s.params) == pytest.approx(dog_spectrum(f, kc, rc, ks, rs), abs=1e-9)


def test_sf_fit_low_pass_dog_has_no_preferred_sf():
    from map2d.models import dog_peak_sf, dog_spectrum
    f = np.geomspace(0.01, 0.32, 7)
    kc, rc, ks, rs = 1.0, 1.0, 0.005, 3.0           # weak surround: the spectrum peaks at 0 SF
    assert dog_peak_sf(kc, rc, ks, rs) == 0.0
    s = fit_sf(f, dog_spectrum(f, kc, rc, ks, rs))
    assert s.ok and s.params_model == "dog"
    assert np.isnan(s.pref_cpd) and np.isnan(s.bandwidth_oct)      # no lower half-height point either


def test_sf_fit_dog_ci_covers_truth_in_noise():
    from map2d.models import dog_peak_sf, dog_spectrum
    rng = np.random.default_rng(5)
    f = np.geomspace(0.01, 0.32, 11)
    kc, rc, ks, rs = 1.0, 1.2, 0.3, 2.5
    y0 = dog_spectrum(f, kc, rc, ks, rs)
    truth = dog_peak_sf(kc, rc, ks, rs)
    hits = 0
    for _ in range(20):
        s = fit_sf(f, y0 + 0.05 * y0.max() * rng.standard_normal(f.size))
        hits += s.pref_ci_low_cpd <= truth <= s.pref_ci_high_cpd
    assert hits >= 15          # nominal 95 % (common practice: allow for 20 draws)


def test_sf_fit_dog_needs_five_sfs():
    from map2d.models import dog_spectrum
    f = np.geomspace(0.02, 0.32, 4)                  # 4 SFs: baseline fixed, 3-parameter fits only
    s = fit_sf(f, dog_spectrum(f, 1.0, 1.2, 0.3, 2.5))
    assert s.ok and s.params_model in ("log_gaussian", "gaussian") and len(s.params) == 4


def test_report_draws_the_dog_fit():
    from map2d.models import dog_spectrum
    from map2d.report.figures import _sf_fit_curve
    f = np.geomspace(0.01, 0.32, 9)
    fine = np.geomspace(0.01, 0.32, 40)
    curve, pref = _sf_fit_curve(f, dog_spectrum(f, 1.0, 1.0, 0.2, 2.2), fine)
    assert curve == pytest.approx(dog_spectrum(fine, 1.0, 1.0, 0.2, 2.2), abs=1e-6)


@pytest.mark.parametrize("seed", [1, 2])
def test_simulated_centre_surround_cells_preferred_sf(seed):
    """Preferred SF of simulated centre-surround (DoG) cells within 10 % (issue 4), through the cells.csv
    path (rank-1 SF profile of the flashed-grating surface, :func:`fit_sf`).

    Design: 11 SFs half an octave apart (0.01-0.32 cycles/deg), 12 orientations, gains 150-250 spikes/s,
    20 minutes of flashed gratings, 6 DoG cells per session. Measured on seeds 1-24 (144 cells): rms
    error 2.5 %, worst 7.7 %, 95 % interval covering the truth for 129 of 144; without the DoG model
    (log-Gaussian / Gaussian only) rms 5.9 %, worst 15 %, 70 of 144 covered. With 5 minutes (seeds
    1-12) the error is noise-limited: rms 4.9 %, worst 12.4 % (the 4-parameter Gaussian in linear SF
    fits some noisy DoG curves better and takes the Akaike weight), so the session here is longer.
    """
    simulate = pytest.importorskip("map2d.simulate")
    from map2d.gratings import analyze_flashed
    s, truth = simulate.simulate_session(n_cells=6, minutes=0, flashed_minutes=20, repeats=0, seed=seed,
                                         cell_types=["on_dog", "off_dog"] * 3, sfs_cpd=np.geomspace(0.01, 0.32, 11),
                                         peak_rate_hz=(150.0, 250.0))
    cols = grating_tuning_columns(analyze_flashed(s.responses, s.gratings, rng=0), None)
    covered = 0
    for i, tc in enumerate(truth["cells"]):
        assert np.isnan(cols["pref_orientation_deg"][i]), i
        # truth: closed-form peak of the cell's DoG spectrum (map2d.models.dog_peak_sf)
        assert cols["pref_sf_cpd"][i] == pytest.approx(tc["pref_sf_cpd"], rel=0.10), i
        covered += cols["pref_sf_ci_low_cpd"][i] <= tc["pref_sf_cpd"] <= cols["pref_sf_ci_high_cpd"][i]
    assert covered >= 4        # nominal 95 %: 2 misses of 6 has probability ~3 % (binomial)


def test_screened_dog_fit_is_no_worse_than_many_starts():
    # the screened (rc, rs / rc) start + refinement must reach the best of a broad multi-start search
    from map2d.fit.tuning import _DOG_T_BOUNDS, _fit_dog, _jac_dog_internal
    from map2d.models import dog_spectrum
    rng = np.random.default_rng(11)
    f = np.geomspace(0.01, 0.32, 11)
    lf = np.log2(f)

    def model(x, a_c, a_s, rc, t):
        return dog_sf(x, 0.0, a_c, a_s, rc, rc * t)

    def jac(x, *q):
        return _jac_dog_internal(x, 0.0, *q)[:, 1:]
    for _ in range(4):
        rc = rng.uniform(0.8, 3.0)
        y0 = dog_spectrum(f, 1.0, rc, rng.uniform(0.05, 0.2), rc * rng.uniform(1.5, 3.0))
        y = y0 + 0.08 * y0.max() * rng.standard_normal(f.size)
        span = max(abs(y.max()), abs(y.min()), np.ptp(y))
        got = _fit_dog(f, y, lf.min(), lf.max(), span)
        rc_lo, rc_hi = 1 / (np.pi * 8 * f.max()), 1 / (np.pi * f.min() / 4)
        ref = _multistart_ssr(model, jac, f, y,
                              [[a * np.ptp(y), b * a * np.ptp(y), r, t] for a in (1, 5) for b in (0.3, 0.9)
                               for r in np.geomspace(rc_lo, rc_hi, 6) for t in (1.5, 3, 8)],
                              [0, 0, rc_lo, _DOG_T_BOUNDS[0]], [50 * span, 50 * span, rc_hi, _DOG_T_BOUNDS[1]])
        assert got["ssr"] <= ref * (1 + 1e-5)


def test_centre_surround_cell_with_aliased_orientation_modulation_gets_no_orientation():
    """With 4 phases, a rectified centre-surround cell away from the phase origin can show a small but
    significant orientation modulation (harmonics 3 and 5 alias onto the first; their share depends on
    the response phase, which changes with orientation). Such a cell (simulator seed 4, cell 7: F test
    p = 0.004, circular variance 0.97) must not get a preferred orientation; tuned Gabor cells keep theirs
    (circular variance <= 0.70 on the simulator)."""
    from map2d.fit.tuning import MAX_CIRCULAR_VARIANCE_ORIENTED, _flashed_curves, grating_tuning_columns
    from map2d.gratings import analyze_flashed
    simulate = pytest.importorskip("map2d.simulate")
    s, truth = simulate.simulate_session(n_cells=30, minutes=0, flashed_minutes=10, repeats=0, seed=4,
                                         sfs_cpd=np.geomspace(0.02, 0.16, 7), peak_rate_hz=(150.0, 250.0))
    fl = analyze_flashed(s.responses, s.gratings, rng=0)
    curves = _flashed_curves(fl, 7)
    assert truth["cells"][7]["kind"] == "off_dog"
    assert fit_orientation(curves[0], curves[1]).tuned                 # the F test alone is fooled
    cols = grating_tuning_columns(fl, None)
    for i, tc in enumerate(truth["cells"]):
        if not cols["grating_responsive"][i]:
            continue
        if "dog" in tc["kind"]:
            assert np.isnan(cols["pref_orientation_deg"][i]), i
            assert cols["circular_variance"][i] > MAX_CIRCULAR_VARIANCE_ORIENTED
            assert cols["pref_sf_cpd"][i] == pytest.approx(tc["pref_sf_cpd"], rel=0.15), i
        elif tc["kind"] in ("simple", "complex"):
            d = abs((cols["pref_orientation_deg"][i] - tc["pref_orientation_deg"] + 90) % 180 - 90)
            assert d < 5.0, i


def test_weak_but_clean_drifting_orientation_tuning_is_kept():
    """The circular-variance gate is for the phase aliasing of flashed sequences; a drifting-grating
    curve with a weak but significant orientation preference (circular variance 0.975) keeps it.
    ``sf_fit_curve`` names the model of the SF parameter columns, whose width sits in the column of
    its unit (the other two empty)."""
    from types import SimpleNamespace

    from map2d.fit.tuning import MAX_CIRCULAR_VARIANCE_ORIENTED, grating_tuning_columns
    dirs = np.arange(16) * 22.5
    sfs = np.array([0.02, 0.04, 0.08, 0.16, 0.32])
    ori = 1.0 + 0.05 * np.cos(2 * np.deg2rad(dirs - 60.0))                # 1 - CV = 0.025
    sf = np.exp(-0.5 * (np.log2(sfs / 0.07) / 0.8) ** 2)
    resp = (ori[:, None] * sf[None, :])[None, :, :, None]                # (cells, D, S, T)
    dr = SimpleNamespace(cell_ids=np.array([5]), p_value=np.array([1e-6]), responsive=np.array([True]),
                         f1_f0=np.array([0.3]), simple=np.array([False]), dsi=np.array([0.0]),
                         pref_direction_deg=np.array([60.0]), pref_index=np.array([[2, 2, 0]]),
                         response=resp, directions_deg=dirs, sfs_cpd=sfs)
    cols = grating_tuning_columns(drifting=dr)
    assert cols["tuning_source"] == ["drifting"]
    assert cols["circular_variance"][0] > MAX_CIRCULAR_VARIANCE_ORIENTED
    assert cols["pref_orientation_deg"][0] == pytest.approx(60.0, abs=0.5)
    assert cols["pref_sf_cpd"][0] == pytest.approx(0.07, rel=0.01)
    curve = cols["sf_fit_curve"][0]
    assert curve in ("log_gaussian", "gaussian", "dog")
    assert cols["sf_model"][0] in (curve, "average")
    width = {"log_gaussian": "sf_fit_sigma_oct", "gaussian": "sf_fit_sigma_cpd", "dog": "sf_fit_rc_deg"}
    assert cols[width[curve]][0] > 0
    assert all(np.isnan(cols[w][0]) for k, w in width.items() if k != curve)


def test_flashed_selectivity_does_not_drift_with_recording_length():
    """Issue 14, effect 5. A simple, a second simple and a complex cell (seed 3) recorded with 3, 10
    and 100 minutes of flashed gratings. Before, |H| entered the tuning response with its noise floor
    and the first cell's circular variance read 0.465, 0.421 and 0.393: the 3-minute value lies far
    outside the 100-minute interval (0.376-0.400). With the noise power removed it reads 0.409, 0.394 and
    0.388, and every 100-minute value (circular variance and OSI, all three cells) lies inside the 3- and
    10-minute intervals (resampling the measured noise)."""
    from map2d.analysis import flashed_noise
    from map2d.gratings import analyze_flashed
    from map2d.simulate import simulate_session

    out = {}
    for minutes in (3.0, 10.0, 100.0):
        s, _ = simulate_session(n_cells=3, minutes=0, responses="spikes", seed=3, flashed_minutes=minutes,
                                repeats=0, cell_types=["simple", "simple", "complex"])
        fl = analyze_flashed(s.responses, s.gratings, rng=0, n_shuffles=0)
        fl.responsive[:] = True
        raw = grating_tuning_columns(fl, None, n_jobs=1)["circular_variance"]
        fl.harmonic_noise_var, fl.phase_mean_noise_var = flashed_noise(s.responses, s.gratings, fl,
                                                                       phase_mean=True)
        cols = grating_tuning_columns(fl, None, n_jobs=1)
        out[minutes] = (np.asarray(raw, float), cols)
    raw3, raw100 = out[3.0][0], out[100.0][0]
    assert raw3[0] == pytest.approx(0.465, abs=0.005) and raw100[0] == pytest.approx(0.393, abs=0.005)
    long = out[100.0][1]
    assert raw3[0] > long["circular_variance_ci_high"][0]          # the old estimate drifted out
    for minutes in (3.0, 10.0):
        c = out[minutes][1]
        for k in ("circular_variance", "osi"):
            lo, hi = np.asarray(c[k + "_ci_low"], float), np.asarray(c[k + "_ci_high"], float)
            assert np.all((lo <= np.asarray(long[k])) & (np.asarray(long[k]) <= hi)), (minutes, k, lo, hi, long[k])
    assert out[3.0][1]["circular_variance"][0] == pytest.approx(0.409, abs=0.005)


@pytest.fixture(scope="module")
def recording_lengths():
    """The same 30 simulated cells (seed 5: simple, complex, centre-surround and unresponsive) recorded
    with 3, 10 and 100 minutes of flashed gratings (nothing else simulated), analysed with the noise
    variances measured; cells.csv tuning columns per length."""
    from map2d.analysis import flashed_noise
    from map2d.gratings import analyze_flashed
    from map2d.simulate import simulate_session

    out = {}
    for minutes in (3.0, 10.0, 100.0):
        s, _ = simulate_session(n_cells=30, minutes=0, responses="spikes", seed=5, flashed_minutes=minutes,
                                repeats=0)
        fl = analyze_flashed(s.responses, s.gratings, rng=0, n_shuffles=0)
        fl.responsive[:] = True
        fl.harmonic_noise_var, fl.phase_mean_noise_var = flashed_noise(s.responses, s.gratings, fl,
                                                                       phase_mean=True)
        out[minutes] = {k: np.asarray(v) for k, v in grating_tuning_columns(fl, None, n_jobs=1).items()}
    return out


@pytest.mark.parametrize("name,unit,n_min", [("circular_variance", "", 50), ("osi", "", 50),
                                             ("orientation_hwhh", "_deg", 25), ("sf_bandwidth", "_oct", 35)])
def test_selectivity_of_3_and_10_minutes_covers_100_minutes(recording_lengths, name, unit, n_min):
    """Issue 14, item 5, for every selectivity column: the 100-minute value of each cell against the
    95 % intervals of the same cell recorded for 3 and 10 minutes. The intervals resample the
    presentations of each condition (circular variance, OSI) and, for the orientation HWHH and the SF
    bandwidth, refit the models to every resampled surface (before, the bandwidth intervals came from
    the fit's covariance). Measured (seed 5, 30 cells): circular variance 59/60, OSI 59/60, HWHH 29/31,
    SF bandwidth 38/42 of the 3- and 10-minute intervals hold the 100-minute value (with Gaussian noise
    of the measured variance added to the surface instead of resampling presentations: 54/60, 59/60,
    27/31, 36/42). The 100-minute value has its own noise (about a third, a sixth of the 10-, 3-minute
    spread), so about 94 % is expected of calibrated intervals; on 80 other cells (seed 6) the shares
    were 94, 93, 92 and 94 % (Gaussian draws: 91, 94, 89, 91 %; the fit-based intervals of before:
    HWHH 91 %, SF bandwidth 90 %). Cells whose interval is empty (too few resampled surfaces with a
    finite width) say so in ``bandwidth_interval_reason``."""
    long = recording_lengths[100.0][name + unit].astype(float)
    held, n = 0, 0
    for minutes in (3.0, 10.0):
        c = recording_lengths[minutes]
        est = c[name + unit].astype(float)
        lo, hi = c[f"{name}_ci_low{unit}"].astype(float), c[f"{name}_ci_high{unit}"].astype(float)
        ok = np.isfinite(long) & np.isfinite(lo)
        assert np.all((lo[ok] <= est[ok]) & (est[ok] <= hi[ok]))
        held += int(np.sum((lo[ok] <= long[ok]) & (long[ok] <= hi[ok])))
        n += int(ok.sum())
        if unit:
            # an empty interval of a finite width always comes with its reason
            empty = np.isfinite(est) & ~np.isfinite(lo)
            assert all(("finite in only" in r) for r in c["bandwidth_interval_reason"][empty])
            assert not any("from the fit" in r for r in c["bandwidth_interval_reason"])      # all resampled
    assert n >= n_min                                   # most cells have their intervals
    assert held >= 0.88 * n, (name, held, n)


def test_drifting_selectivity_intervals_resample_trials():
    """Issue 14, item 5, for cells tuned by drifting gratings (no flashed sequence): 16 simulated cells
    (seed 7; 12 directions, 5 SFs) with 3, 6 and 30 repeats. Circular variance and OSI (before: no
    interval), orientation HWHH and SF bandwidth (before: the fit's covariance) get intervals from
    the trials of each condition resampled, the indices recomputed and the widths refitted. Measured:
    of the 3-repeat intervals 39 of 48 hold the 30-repeat value (CV 12/14, OSI 10/14, HWHH 10/10, SF
    7/10), of the 6-repeat ones 42 of 49 (12/14, 11/14, 9/10, 10/11): with 3 trials a resample of a
    condition varies less than new trials would ((n - 1) / n of the variance, and few distinct
    values; Efron & Tibshirani 1993, cited from memory), so short designs read too narrow. On 40 cells
    (seed 7, 8 directions) the fit-based SF bandwidth intervals held 15/23 and 23/25, the resampled
    ones 15/23 and 24/25."""
    from map2d.gratings import analyze_drifting
    from map2d.simulate import simulate_session

    cols = {}
    for reps in (3, 6, 30):
        s, _ = simulate_session(n_cells=16, minutes=0, responses="spikes", seed=7, flashed_minutes=0, repeats=reps,
                                drifting_sfs_cpd=[0.02, 0.04, 0.08, 0.16, 0.32], n_directions=12)
        dr = analyze_drifting(s.responses, s.gratings)
        cols[reps] = {k: np.asarray(v) for k, v in grating_tuning_columns(None, dr, n_jobs=1).items()}
    held, n = 0, 0
    for reps in (3, 6):
        c = cols[reps]
        tuned = c["tuning_source"] == "drifting"
        assert tuned.sum() >= 12
        for name, unit in (("circular_variance", ""), ("osi", ""), ("orientation_hwhh", "_deg"),
                           ("sf_bandwidth", "_oct")):
            est, long = c[name + unit].astype(float), cols[30][name + unit].astype(float)
            lo, hi = c[f"{name}_ci_low{unit}"].astype(float), c[f"{name}_ci_high{unit}"].astype(float)
            if not unit:
                assert np.all(np.isfinite(lo[tuned]) & np.isfinite(hi[tuned])), name      # every tuned cell
            ok = np.isfinite(lo) & np.isfinite(long)
            assert np.all((lo[ok] <= est[ok]) & (est[ok] <= hi[ok]))
            held += int(np.sum((lo[ok] <= long[ok]) & (long[ok] <= hi[ok])))
            n += int(ok.sum())
        assert not any("from the fit" in r for r in c["bandwidth_interval_reason"])        # all resampled
    assert n >= 90
    assert held >= 0.75 * n, (held, n)


# ----------------------------------------------------------------------------------------------
# all cells' fits advanced together (map2d.fit.tuning._levenberg_marquardt)
# ----------------------------------------------------------------------------------------------
def test_batched_tuning_columns_agree_with_scipy_fits_within_their_intervals():
    """The columns from the batched fits against those from one-by-one ``scipy.optimize.least_squares``
    fits of the same problems (same starts, bounds and models; scipy is the reference), on simulated
    cells (von Mises x log-Gaussian surfaces, two-peaked direction curves, noise): every reported
    preference and width lies within the reference's 95 % interval, and the decisions (tuned or not,
    which SF model) are the same."""
    from map2d.fit.tuning import _drifting_view, _flashed_view, _tuning_chunk
    fl, dr = _fake_results(40, np.random.default_rng(23))
    ids = np.sort(fl.cell_ids)
    ref = _tuning_chunk(_flashed_view(fl), _drifting_view(dr), ids, solver="scipy")
    got = _tuning_chunk(_flashed_view(fl), _drifting_view(dr), ids, solver="batch")
    text = ("tuning_source", "sf_model", "sf_fit_curve", "grating_class", "bandwidth_interval_reason")
    for k in text:
        assert got[k] == ref[k], k
    col = {k: (np.array(ref[k], float), np.array(got[k], float)) for k in ref if k not in text}
    for k, (a, b) in col.items():
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=k)
    a, b = col["pref_orientation_deg"]
    ok = np.isfinite(a)
    assert ok.sum() >= 10
    assert np.all(np.abs(b[ok] - a[ok]) <= col["pref_orientation_ci_halfwidth_deg"][0][ok])
    for value, unit in (("orientation_hwhh", "deg"), ("sf_bandwidth", "oct")):
        a, b = col[f"{value}_{unit}"]
        ok = np.isfinite(a)
        assert ok.sum() >= 10, value                                     # the fits did run
        assert np.all((b[ok] >= col[f"{value}_ci_low_{unit}"][0][ok]) & (b[ok] <= col[f"{value}_ci_high_{unit}"][0][ok]))
    a, b = col["pref_sf_cpd"]
    ok = np.isfinite(a)
    assert ok.sum() >= 10
    assert np.all((b[ok] >= col["pref_sf_ci_low_cpd"][0][ok]) & (b[ok] <= col["pref_sf_ci_high_cpd"][0][ok]))
    # and much closer than that on these well-determined cells
    np.testing.assert_allclose(col["pref_orientation_deg"][1][np.isfinite(col["pref_orientation_deg"][0])],
                               col["pref_orientation_deg"][0][np.isfinite(col["pref_orientation_deg"][0])],
                               atol=0.05)


def test_batched_direction_and_sf_fits_agree_with_scipy_within_their_intervals():
    """Single fits of simulated curves, batched against scipy (the reference): direction preferences
    within the reference's interval; SF curves of 7 SFs (free baseline, the DoG candidate; centre-surround
    DoG spectra, Enroth-Cugell & Robson 1966, and log-Gaussian cells) with the preferred SF inside the
    reference interval and the same model choice."""
    from map2d.fit.tuning import _direction_job, _run_jobs, _sf_job
    rng = np.random.default_rng(31)
    th = np.arange(0.0, 360.0, 30.0)
    f = np.geomspace(0.01, 0.32, 7)
    d_jobs, s_jobs = [], []
    for _ in range(30):
        y = von_mises_direction(th, 0.5, 4.0, rng.uniform(0, 3), rng.uniform(0.8, 4), rng.uniform(0, 360))
        d_jobs.append((th, y + 0.3 * rng.standard_normal(th.size)))
        if rng.random() < 0.5:
            rc = rng.uniform(0.5, 2.0)
            s = dog_sf(f, 0.0, 5.0, rng.uniform(2.0, 4.5), rc, rc * rng.uniform(2.0, 4.0))
        else:
            s = log_gaussian_sf(f, 0.2, 4.0, np.log2(rng.uniform(0.03, 0.12)), rng.uniform(0.6, 1.4))
        s_jobs.append((f, s + 0.08 * rng.standard_normal(f.size)))
    for solver_jobs, make in ((d_jobs, _direction_job), (s_jobs, _sf_job)):
        ref = _run_jobs([make(*j) for j in solver_jobs], "scipy")
        got = _run_jobs([make(*j) for j in solver_jobs], "batch")
        for r, g in zip(ref, got):
            assert r.ok == g.ok
            if make is _direction_job:
                diff = abs((g.pref_deg - r.pref_deg + 180.0) % 360.0 - 180.0)
                assert diff <= r.pref_ci95_deg
            elif np.isfinite(r.pref_cpd):
                assert r.model == g.model
                assert r.pref_ci_low_cpd <= g.pref_cpd <= r.pref_ci_high_cpd
                if np.isfinite(r.bandwidth_oct):
                    assert abs(g.bandwidth_oct - r.bandwidth_oct) <= r.bandwidth_ci95_oct
    assert sum(np.isfinite(r.pref_cpd) for r in ref) >= 20


def test_batched_solver_holds_parameters_on_their_bounds_like_scipy():
    """Fits whose minimum lies on a bound (a flat curve: amplitude 0; a needle-sharp peak: the
    concentration at its upper bound 50): the same cost as scipy's bounded fit (the reference), and
    every parameter inside the box."""
    from map2d.fit.tuning import _orientation_job, _solve
    th = np.arange(0.0, 180.0, 15.0)
    rng = np.random.default_rng(2)
    curves = [1.0 + 0.01 * rng.standard_normal(th.size),
              np.where(np.isclose(th, 60.0), 5.0, 1.0) + 1e-3 * rng.standard_normal(th.size)]
    for y in curves:
        probs, _ = _orientation_job(th, y)
        (r,), (g,) = _solve(probs, "scipy"), _solve(probs, "batch")
        cost = [np.sum((von_mises_orientation(th, *x.params) - y) ** 2) for x in (r, g)]
        assert cost[1] <= cost[0] * (1 + 1e-6) + 1e-12
        assert np.all(g.params >= probs[0].lower) and np.all(g.params <= probs[0].upper)


def test_vectorised_selectivity_indices_match_the_single_curve_ones():
    """The row-wise circular variance, OSI and rank-1 profiles used for the resampled intervals against
    :func:`circular_variance`, :func:`osi` and ``_rank1`` (the SVD, numpy.linalg.svd) curve by curve,
    with negative and missing responses."""
    from map2d.fit.tuning import _circular_variance_rows, _osi_rows, _rank1, _rank1_many
    rng = np.random.default_rng(4)
    th = np.arange(0.0, 180.0, 15.0)
    r = rng.normal(1.0, 1.0, (200, th.size))
    r[rng.random(r.shape) < 0.1] = np.nan
    r[0] = -1.0                                                     # all zero after rectification
    r[1, 2:] = np.nan                                               # too few points for the OSI
    cv = _circular_variance_rows(th, r)
    oi = _osi_rows(th, r)
    for i in range(r.shape[0]):
        np.testing.assert_allclose(cv[i], circular_variance(th, r[i])[0], atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(oi[i], osi(th, r[i]), atol=1e-12, equal_nan=True)
    assert np.isnan(cv[0]) and np.isnan(oi[1]) and np.isfinite(cv[2:]).all()
    for shape in ((30, th.size, 4), (30, 3, 7)):
        s = rng.normal(0.0, 1.0, shape)
        s[0] = 0.0
        prof, some = _rank1_many(s)
        assert not some[0] and np.all(prof[0] == 0)
        for i in range(1, shape[0]):
            np.testing.assert_allclose(prof[i], _rank1(s[i])[0], rtol=1e-9, atol=1e-9)


def test_bandwidth_refits_agree_with_scipy_least_squares():
    """The refits behind the bandwidth intervals (:func:`map2d.fit.tuning._refit`: all draws at once,
    started from the estimate, at most 30 iterations) against ``scipy.optimize.least_squares`` (the
    reference) run to convergence from the same start on the same noisy surfaces: the SF bandwidth of
    every draw within 0.01 octave (both surface models: the Gabor spectrum and the separable one)."""
    from map2d.fit.tuning import (_KINDS, _least_squares, _profile_rows, _refit, _run_jobs, _sf_surface_job,
                                  fit_orientation, gabor_spectrum_surface, separable_surface)
    rng = np.random.default_rng(41)
    th = np.arange(0.0, 180.0, 15.0)
    f = np.geomspace(0.02, 0.32, 5)
    T, F = np.meshgrid(th, f, indexing="ij")
    for truth in (gabor_spectrum_surface(T, F, 0.2, 5.0, 60.0, 0.1, 0.04, 0.03),
                  separable_surface(T, F, 0.2, 5.0, 2.0, 60.0, np.log2(0.08), 0.9)):
        surface = truth + 0.2 * rng.standard_normal(truth.shape)
        ofit = fit_orientation(th, surface.mean(axis=1))
        (sfit, pfs), = _run_jobs([_sf_surface_job(th, f, surface, ofit)], keep=True)
        assert sfit.ok
        lo, hi = np.log2(f.min()), np.log2(f.max())
        for pr, fit in pfs:
            draws = pr.y[None] + 0.2 * rng.standard_normal((20, pr.y.size))
            (p, cost), = _refit(pr.kind, [(pr.x, draws, fit.params, pr.lower, pr.upper)])
            ref = np.array([_least_squares(_KINDS[pr.kind][0], pr.x, y, [fit.params], pr.lower, pr.upper,
                                           jac=_KINDS[pr.kind][1]).params for y in draws])
            ok = np.isfinite(cost)
            assert ok.sum() >= 18
            bw, bw_ref = _profile_rows(pr.kind, p[ok], lo, hi)[1], _profile_rows(pr.kind, ref[ok], lo, hi)[1]
            fin = np.isfinite(bw_ref)
            assert fin.sum() >= 15 and np.array_equal(np.isfinite(bw), fin), pr.kind
            np.testing.assert_allclose(bw[fin], bw_ref[fin], atol=0.01, err_msg=pr.kind)


def test_resampled_presentations_rebuild_the_surface_of_a_literal_resample():
    """Issue 14, item 5: each flashed selectivity draw (``_presentation_draws``) is the tuning surface
    rebuilt from a literal resampled data set. For 3 draws the presentations are repeated as often as
    the draw took them and everything is recomputed here without the count matrix: condition means
    less the blank mean, the first harmonic over phase by ``numpy.linalg.lstsq`` on ``[1, cos, sin]``
    (the reference fit), each condition's noise variance ``s^2 / n`` (``ddof = 1``) carried through the
    fit's pseudo-inverse (error propagation), ``|H|`` with that noise power removed (the draw's change
    added to the estimate). Each draw resamples within each condition (counts kept), and the path for
    finite responses equals the general one (a NaN in another cell) to rounding."""
    from map2d.analysis import flashed_noise
    from map2d.fit.tuning import _flashed_view, _presentation_counts, _presentation_draws
    from map2d.gratings import analyze_flashed
    from map2d.simulate import simulate_session

    s, _ = simulate_session(n_cells=5, minutes=0, responses="spikes", seed=11, flashed_minutes=2.0, repeats=0,
                            n_orientations=6, sfs_cpd=[0.04, 0.08, 0.16])
    fl = analyze_flashed(s.responses, s.gratings, rng=0, n_shuffles=0)
    fl.responsive[:] = True
    fl.harmonic_noise_var, fl.phase_mean_noise_var = flashed_noise(s.responses, s.gratings, fl, phase_mean=True)
    v = _flashed_view(fl)
    cells = np.arange(5)
    got = _presentation_draws(v, cells, 200, 3)                          # (cells, draws, O, S)
    counts, n_g, _ = _presentation_counts(v, 200)
    y, lab = v.pres_y.astype(float), v.pres_label
    n_o, n_s, n_p = fl.orientations_deg.size, fl.sfs_cpd.size, fl.phases_deg.size
    n_c = n_o * n_s * n_p
    phi = np.deg2rad(fl.phases_deg)
    x = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi)], axis=1)
    pinv = np.linalg.pinv(x)
    cc = fl.condition_contrast

    def rebuilt(take):
        yy, ll = y[:, take], lab[take]
        h = np.zeros((5, n_o, n_s), complex)
        pm, var = np.zeros((5, n_o, n_s)), np.zeros((5, n_o, n_s))
        ref = yy[:, ll == n_c].mean(axis=1)
        for o in range(n_o):
            for f in range(n_s):
                grp = [(o * n_s + f) * n_p + p for p in range(n_p)]
                d = np.stack([yy[:, ll == g].mean(axis=1) - ref for g in grp], axis=1)     # (cells, P)
                vm = np.stack([yy[:, ll == g].var(axis=1, ddof=1) / np.sum(ll == g) for g in grp], axis=1)
                coef = np.linalg.lstsq(x, d.T, rcond=None)[0]                              # (3, cells)
                h[:, o, f] = (coef[1] - 1j * coef[2]) / cc[o, f]
                pm[:, o, f] = d.mean(axis=1)
                var[:, o, f] = (vm @ (pinv[1] ** 2 + pinv[2] ** 2)) / cc[o, f] ** 2
        return h, pm, var

    h_all, pm_all, _ = rebuilt(np.arange(lab.size))
    dense = counts[:3 * n_g].toarray().reshape(3, n_g, lab.size)
    for d in range(3):
        # within each group the draw takes as many presentations as the group has
        assert np.array_equal(dense[d].sum(axis=1), np.bincount(lab, minlength=n_g))
        take = np.repeat(np.arange(lab.size), dense[d].sum(axis=0).astype(int))
        h, pm, var = rebuilt(take)
        hh = fl.harmonic_combined + (h - h_all)
        want = fl.phase_mean_combined + (pm - pm_all) + cc * np.sqrt(np.maximum(np.abs(hh) ** 2 - var, 0.0))
        assert np.allclose(got[:, d], want, rtol=1e-9, atol=1e-9)
    v2 = _flashed_view(fl)
    v2.pres_y = v.pres_y.copy()
    v2.pres_y[0, 7] = np.nan
    assert np.allclose(_presentation_draws(v2, cells, 200, 3)[1:], got[1:], rtol=1e-9, atol=1e-9)
