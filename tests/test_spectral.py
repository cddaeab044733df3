"""Tests for map2d.spectral: Fourier sums at arbitrary wave vectors, polar-grid area weights."""

import numpy as np
import pytest

from map2d import spectral
from map2d.geometry import Grid, grating_image
from map2d.spectral import (fourier_at, grating_basis, inverse_fourier, orientation_period,
                            polar_area_weights)

# odd grid, dx != dy, grid centre and phase origin away from zero
ODD = Grid(ny=7, nx=9, center_x_deg=3.1, center_y_deg=-2.4, dx_deg=0.7, dy_deg=1.3)
ORIGIN = (4.0, -1.5)


def brute_force(maps, grid, ori, sf, origin):
    """Reference: dot product of each map with the contract's grating images (phase 0 and -90 deg).

    exp(i t) = cos t + i sin t = grating(phase 0) + i grating(phase -90 deg), per the contract formula.
    """
    x, y = grid.mesh_deg()
    out = np.empty(np.shape(maps)[:-2] + (len(ori),), complex)
    for k, (o, f) in enumerate(zip(ori, sf)):
        cos_img = grating_image(x, y, o, f, 0.0, origin_deg=origin)
        sin_img = grating_image(x, y, o, f, -90.0, origin_deg=origin)
        out[..., k] = (np.sum(maps * cos_img, axis=(-2, -1))
                       + 1j * np.sum(maps * sin_img, axis=(-2, -1))) * grid.dx_deg * grid.dy_deg
    return out


def test_fourier_at_equals_brute_force_dot_product_with_grating_images():
    # numpy reference built from the contract's grating formula (map2d.geometry.grating_image)
    rng = np.random.default_rng(1)
    maps = rng.normal(size=(2, 3) + ODD.shape)
    ori = rng.uniform(0, 360, 15)
    sf = rng.uniform(0.02, 0.7, 15)
    got = fourier_at(maps, ODD, ori, sf, ORIGIN)
    ref = brute_force(maps, ODD, ori, sf, ORIGIN)
    assert got.shape == (2, 3, 15)
    assert np.max(np.abs(got - ref)) <= 1e-9 * np.max(np.abs(ref))


def test_fourier_at_orientation_by_sf_grid_and_single_map():
    rng = np.random.default_rng(2)
    m = rng.normal(size=ODD.shape)
    ori = np.array([0.0, 30.0, 95.0, 170.0])
    sf = np.array([0.05, 0.2, 0.5])
    got = fourier_at(m, ODD, ori[:, None], sf[None, :], ORIGIN)
    assert got.shape == (4, 3)
    oo, ss = np.meshgrid(ori, sf, indexing="ij")
    ref = brute_force(m, ODD, oo.ravel(), ss.ravel(), ORIGIN).reshape(4, 3)
    assert np.max(np.abs(got - ref)) <= 1e-9 * np.max(np.abs(ref))


def test_fourier_at_chunked_path_equals_one_block(monkeypatch):
    rng = np.random.default_rng(3)
    maps = rng.normal(size=(5,) + ODD.shape)
    ori = rng.uniform(0, 180, 40)
    sf = rng.uniform(0.05, 0.5, 40)
    whole = fourier_at(maps, ODD, ori, sf, ORIGIN)
    monkeypatch.setattr(spectral, "_BLOCK_ELEMENTS", 5 * ODD.ny * 3)   # blocks of 3 wave vectors
    chunked = fourier_at(maps, ODD, ori, sf, ORIGIN)
    assert np.allclose(chunked, whole, rtol=1e-12, atol=1e-12)


def test_fourier_at_default_origin_is_grid_centre_and_rejects_wrong_shape():
    rng = np.random.default_rng(4)
    m = rng.normal(size=ODD.shape)
    a = fourier_at(m, ODD, [10.0, 50.0], [0.3, 0.1])
    b = fourier_at(m, ODD, [10.0, 50.0], [0.3, 0.1], (ODD.center_x_deg, ODD.center_y_deg))
    assert np.array_equal(a, b)
    with pytest.raises(ValueError, match="maps"):
        fourier_at(np.zeros((ODD.nx, ODD.ny)), ODD, 0.0, 0.1)


def test_fourier_at_gaussian_matches_analytic_transform():
    # Gaussian pair (Bracewell, The Fourier Transform and Its Applications):
    # integral exp(-r^2 / 2 s^2) exp(+i 2 pi f . (x - c)) d^2x = 2 pi s^2 exp(-2 pi^2 s^2 |f|^2)
    # times exp(+i 2 pi f . (g - c)) for a Gaussian centred at g. Sampled finely over +-7 s, the sum
    # equals the integral to far better than 1e-6 (aliasing and truncation terms ~ exp(-24)).
    s = 0.5
    grid = Grid(ny=181, nx=141, center_x_deg=0.3, center_y_deg=-0.2, dx_deg=0.05, dy_deg=0.04)
    gx, gy = 0.45, -0.1
    x, y = grid.mesh_deg()
    m = np.exp(-((x - gx) ** 2 + (y - gy) ** 2) / (2 * s**2))
    origin = (-0.7, 0.6)
    ori = np.array([0.0, 37.0, 90.0, 151.0, 260.0])
    sf = np.array([0.0, 0.2, 0.45, 0.8, 1.1])
    got = fourier_at(m, grid, ori, sf, origin)
    kx, ky = sf * np.cos(np.deg2rad(ori)), sf * np.sin(np.deg2rad(ori))
    ref = (2 * np.pi * s**2 * np.exp(-2 * np.pi**2 * s**2 * sf**2)
           * np.exp(2j * np.pi * (kx * (gx - origin[0]) + ky * (gy - origin[1]))))
    assert np.max(np.abs(got - ref)) <= 1e-6 * 2 * np.pi * s**2


def test_grating_basis_real_part_is_the_contract_grating():
    ori = np.array([20.0, 110.0])
    sf = np.array([0.15, 0.4])
    basis = grating_basis(ODD, ori, sf, ORIGIN)
    x, y = ODD.mesh_deg()
    for k in range(2):
        assert np.allclose(basis[k].real, grating_image(x, y, ori[k], sf[k], 0.0, origin_deg=ORIGIN))
        assert np.allclose(basis[k].imag, grating_image(x, y, ori[k], sf[k], -90.0, origin_deg=ORIGIN))


def test_inverse_fourier_equals_sum_of_conjugate_basis_images():
    rng = np.random.default_rng(5)
    ori = rng.uniform(0, 180, 6)
    sf = rng.uniform(0.05, 0.5, 6)
    a = rng.normal(size=(2, 6)) + 1j * rng.normal(size=(2, 6))
    basis = grating_basis(ODD, ori, sf, ORIGIN)
    ref = np.einsum("ck,kij->cij", a, np.conj(basis))
    assert np.allclose(inverse_fourier(a, ODD, ori, sf, ORIGIN), ref, rtol=1e-12, atol=1e-12)


def test_polar_area_weights_tile_the_half_annulus():
    # derived: the bins tile the half annulus between the outer SF edges, area pi (f2^2 - f1^2) / 2
    ori = np.arange(0.0, 180.0, 22.5)
    sf_lin = np.array([0.2, 0.4, 0.6, 0.8])
    w = polar_area_weights(ori, sf_lin, sf_axis="linear")
    assert w.shape == (8, 4)
    assert np.isclose(w.sum(), np.pi / 2 * (0.9**2 - 0.1**2))
    assert np.allclose(w[0], w[3])                        # uniform orientations: equal rows
    sf_log = 0.1 * 2.0 ** np.arange(5)
    w = polar_area_weights(ori, sf_log, sf_axis="log")
    lo, hi = 0.1 / np.sqrt(2), 1.6 * np.sqrt(2)           # half an octave beyond the ends
    assert np.isclose(w.sum(), np.pi / 2 * (hi**2 - lo**2))
    # area element f df dtheta: the bin between SF edges a, b and angle width d has area d (b^2 - a^2) / 2
    assert np.isclose(w[0, 2], np.deg2rad(22.5) * ((0.4 * np.sqrt(2)) ** 2 - (0.4 / np.sqrt(2)) ** 2) / 2)


def test_polar_area_weights_auto_axis_uneven_orientations_and_full_plane():
    sf_log = 0.05 * 2.0 ** np.arange(6)
    assert np.allclose(polar_area_weights([0, 90], sf_log), polar_area_weights([0, 90], sf_log, "log"))
    sf_lin = np.array([0.1, 0.2, 0.3, 0.4, 0.5])
    assert np.allclose(polar_area_weights([0, 90], sf_lin),
                       polar_area_weights([0, 90], sf_lin, "linear"))
    # uneven orientations: edges at circular midpoints (0 -> [-30, 15], 30 -> [15, 75], 120 -> [75, 150])
    w = polar_area_weights([30.0, 0.0, 120.0], [1.0, 2.0], sf_axis="linear")
    assert np.allclose(w[:, 0] / w[1, 0], [60 / 45, 1.0, 75 / 45])
    # 0-360 orientations tile the whole plane
    assert orientation_period(np.arange(0, 360, 45.0)) == 360.0
    w = polar_area_weights(np.arange(0, 360, 45.0), [1.0, 2.0], sf_axis="linear")
    assert np.isclose(w.sum(), np.pi * (2.5**2 - 0.5**2))


def test_polar_area_weights_undefined_and_bad_input():
    assert np.all(np.isnan(polar_area_weights([0, 45, 90], [0.3])))
    assert np.all(np.isnan(polar_area_weights([45.0], [0.1, 0.3])))
    with pytest.raises(ValueError, match="distinct"):
        polar_area_weights([10.0, 370.0], [0.1, 0.2])
    with pytest.raises(ValueError, match="distinct"):
        polar_area_weights([0.0, 90.0], [0.2, 0.2])
    with pytest.raises(ValueError, match="log"):
        polar_area_weights([0.0, 90.0], [0.0, 0.2], sf_axis="log")


def test_closed_form_model_spectra_match_reference_transforms():
    """The closed-form spectra (Bracewell 2000: Gaussian pair, shift and modulation theorems) against
    the brute-force grating dot product of finely sampled kernels, and the Gabor against the kernel of
    skimage.filters.gabor_kernel (a reference implementation of the Gabor function)."""
    from skimage.filters import gabor_kernel

    from map2d.models import dog2d, gabor2d, gaussian2d
    from map2d.spectral import dog_spectrum_at, gabor_spectrum, gaussian_spectrum
    fine = Grid(ny=361, nx=361, center_x_deg=1.0, center_y_deg=-0.5, dx_deg=0.15, dy_deg=0.15)
    x, y = fine.mesh_deg()
    ori = np.array([0.0, 35.0, 100.0, 250.0])
    sf = np.array([0.04, 0.16, 0.32, 0.2])
    cases = [
        (gabor2d(x, y, 2.0, -1.0, 3.0, 4.0, 30.0, 0.16, 40.0, 1.5),
         gabor_spectrum(ori, sf, 2.0, -1.0, 3.0, 4.0, 30.0, 0.16, 40.0, 1.5, ORIGIN)),
        (dog2d(x, y, 2.0, -1.0, 1.0, 2.0, 0.2, 4.0),
         dog_spectrum_at(ori, sf, 2.0, -1.0, 1.0, 2.0, 0.2, 4.0, ORIGIN)),
        (gaussian2d(x, y, 2.0, -1.0, 4.0, 2.0, 30.0, 2.0),
         gaussian_spectrum(ori, sf, 2.0, -1.0, 4.0, 2.0, 30.0, 2.0, ORIGIN)),
    ]
    for kernel, closed in cases:
        ref = brute_force(kernel, fine, ori, sf, ORIGIN)
        np.testing.assert_allclose(closed, ref, atol=1e-6 * np.abs(ref).max())
    # skimage's Gabor on a unit pixel grid: exp(-(x'^2/sx^2 + y'^2/sy^2)/2) exp(i(2 pi f x' + offset))
    # / (2 pi sx sy), x' = x cos(theta) + y sin(theta); theta = 0, so the row direction does not matter
    sk = gabor_kernel(0.1, theta=0.0, sigma_x=4.0, sigma_y=6.0, offset=0.7, n_stds=5).real
    ny, nx = sk.shape
    unit = Grid(ny=ny, nx=nx, center_x_deg=0.0, center_y_deg=0.0, dx_deg=1.0, dy_deg=1.0)
    want = brute_force(sk, unit, ori[:3], sf[:3], (0.0, 0.0))
    got = gabor_spectrum(ori[:3], sf[:3], 0.0, 0.0, 4.0, 6.0, 0.0, 0.1, np.rad2deg(0.7),
                         1.0 / (2 * np.pi * 4.0 * 6.0), (0.0, 0.0))
    np.testing.assert_allclose(got, want, atol=1e-6 * np.abs(want).max())


def test_nyquist_mask_marks_half_a_cycle_per_pixel():
    from map2d.spectral import nyquist_mask
    g = Grid(ny=4, nx=4, center_x_deg=0.0, center_y_deg=0.0, dx_deg=5.0, dy_deg=5.0)
    # 5-deg pixels: Nyquist 0.1 cpd along each axis (1 / (2 spacing), sampling theorem)
    assert nyquist_mask(g, [0.0, 0.0, 45.0, 45.0], [0.1, 0.11, 0.14, 0.15]).tolist() == [True, False, True,
                                                                                        False]
