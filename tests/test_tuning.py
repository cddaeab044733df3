"""Tuning fits and selectivity indices: circular variance, OSI, von Mises, SF fits, F1/F0 helper."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from map2d.fit.tuning import (circular_variance, f1_f0, fit_direction, fit_orientation, fit_sf, gaussian_sf,
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
