"""Coordinates: grid pixel centres, flat-screen geometry, grating formula and drift direction."""

from __future__ import annotations

import math

import numpy as np
import pytest

from map2d.geometry import Display, Grid, fold_orientation_deg, grating_image, wave_vector


# ------------------------------------------------------------------------------------------------
# grid (shared/contract.md: x = x0 + (j - (nx-1)/2) dx, y = y0 - (i - (ny-1)/2) dy, row 0 at the top)
# ------------------------------------------------------------------------------------------------
def test_pixel_centres_follow_the_contract_formula_with_row_zero_at_top():
    g = Grid(ny=3, nx=4, center_x_deg=10.0, center_y_deg=-5.0, dx_deg=2.0, dy_deg=1.5)
    # by hand: x = 10 + (j - 1.5) * 2 -> 7, 9, 11, 13;  y = -5 - (i - 1) * 1.5 -> -3.5, -5, -6.5
    assert g.x_deg.tolist() == [7.0, 9.0, 11.0, 13.0]
    assert g.y_deg.tolist() == [-3.5, -5.0, -6.5]
    x, y = g.mesh_deg()
    assert x.shape == y.shape == (3, 4)
    assert (x[0, 0], y[0, 0]) == (7.0, -3.5)        # top-left pixel: left and up
    assert (x[2, 3], y[2, 3]) == (13.0, -6.5)       # bottom-right pixel
    left, right, bottom, top = g.extent_deg
    assert (left, right, bottom, top) == (6.0, 14.0, -7.25, -2.75)


def test_pixel_of_inverts_point_of():
    g = Grid(ny=5, nx=7, center_x_deg=-3.0, center_y_deg=4.0, dx_deg=1.25, dy_deg=2.0)
    rows, cols = np.meshgrid(np.linspace(-0.5, 4.5, 9), np.linspace(-0.5, 6.5, 11), indexing="ij")
    x, y = g.point_of(rows, cols)
    r2, c2 = g.pixel_of(x, y)
    np.testing.assert_allclose(r2, rows, atol=1e-12)
    np.testing.assert_allclose(c2, cols, atol=1e-12)
    r, c = g.pixel_of(g.x_deg[2], g.y_deg[4])
    assert (float(r), float(c)) == (4.0, 2.0)


@pytest.mark.parametrize("kw", [dict(ny=0, nx=3), dict(ny=3, nx=3, dx_deg=0.0), dict(ny=3, nx=3, dy_deg=-1.0)])
def test_grid_refuses_empty_shape_or_non_positive_spacing(kw):
    with pytest.raises(ValueError):
        Grid(**kw)


# ------------------------------------------------------------------------------------------------
# flat screen: exact atan geometry
# ------------------------------------------------------------------------------------------------
SCREEN = dict(width_cm=60.0, height_cm=34.0, width_px=1200, height_px=680, distance_cm=57.3)


def test_azimuth_is_exact_atan_worked_example():
    d = Display(**SCREEN)
    az, el = d.cm_to_deg(10.0, 0.0)
    # by hand: x = 10 / 57.3 = 0.1745201; atan x = x - x^3/3 + x^5/5 - x^7/7
    #        = 0.1745201 - 0.0017718 + 0.0000324 - 0.0000007 = 0.1727800 rad = 9.89956 deg
    assert float(az) == pytest.approx(9.89956, abs=2e-5)
    assert float(az) == pytest.approx(math.degrees(math.atan(10.0 / 57.3)), abs=1e-12)
    assert float(el) == 0.0
    # a linear cm-to-degree rule would say 10 cm * 57.2958 / 57.3 = 9.9993 deg: 0.1 deg off already
    assert abs(float(az) - 10 * 180 / math.pi / 57.3) > 0.09


def test_elevation_is_measured_in_the_vertical_plane_through_the_point():
    d = Display(**SCREEN)
    az, el = d.cm_to_deg(10.0, 10.0)
    # by hand: sqrt(10^2 + 57.3^2) = sqrt(3383.29) = 58.16606; y = 10 / 58.16606 = 0.1719216;
    # atan y = 0.1719216 - 0.0016938 + 0.0000300 - 0.0000006 = 0.1702572 rad = 9.75502 deg
    assert float(el) == pytest.approx(9.75502, abs=2e-5)
    assert float(az) == pytest.approx(9.89956, abs=2e-5)      # azimuth does not depend on height
    # lines of constant azimuth are vertical on the screen
    az_col, _ = d.cm_to_deg(np.full(5, 10.0), np.linspace(-15, 15, 5))
    np.testing.assert_allclose(az_col, az_col[0], atol=1e-12)


def test_rule_of_thumb_one_cm_at_57_cm_is_about_one_degree():
    # common practice: at 57.3 cm viewing distance 1 cm on the screen subtends about 1 degree
    d = Display(**SCREEN)
    az, _ = d.cm_to_deg(1.0, 0.0)
    assert float(az) == pytest.approx(1.0, abs=2e-4)
    _, el = d.cm_to_deg(0.0, 1.0)
    assert float(el) == pytest.approx(1.0, abs=2e-4)


def test_cm_deg_round_trip():
    d = Display(**SCREEN)
    x = np.linspace(-30, 30, 13)[:, None] * np.ones((1, 9))
    y = np.linspace(-17, 17, 9)[None, :] * np.ones((13, 1))
    x2, y2 = d.deg_to_cm(*d.cm_to_deg(x, y))
    np.testing.assert_allclose(x2, x, atol=1e-9)
    np.testing.assert_allclose(y2, y, atol=1e-9)


def test_pixel_degree_round_trip_with_eye_offset():
    d = Display(**SCREEN, eye_x_cm=7.5, eye_y_cm=-4.0)
    rng = np.random.default_rng(0)
    col = rng.uniform(0, SCREEN["width_px"] - 1, 200)
    row = rng.uniform(0, SCREEN["height_px"] - 1, 200)
    c2, r2 = d.deg_to_px(*d.px_to_deg(col, row))
    np.testing.assert_allclose(c2, col, atol=1e-7)
    np.testing.assert_allclose(r2, row, atol=1e-7)


def test_eye_offset_moves_the_straight_ahead_point():
    d = Display(**SCREEN, eye_x_cm=7.5, eye_y_cm=-4.0)
    # 0.05 cm per pixel both ways; screen centre is between pixels 599/600 and 339/340;
    # 7.5 cm right = 150 px, 4 cm down = 80 px -> column 599.5 + 150 = 749.5, row 339.5 + 80 = 419.5
    col, row = d.deg_to_px(0.0, 0.0)
    assert float(col) == pytest.approx(749.5, abs=1e-9)
    assert float(row) == pytest.approx(419.5, abs=1e-9)
    # a pixel above the eye line has positive elevation, right of it positive azimuth
    az, el = d.px_to_deg(900, 100)
    assert az > 0 and el > 0
    az, el = d.px_to_deg(100, 600)
    assert az < 0 and el < 0


def test_pixel_mesh_has_screen_shape_and_orientation():
    d = Display(width_cm=20.0, height_cm=10.0, width_px=40, height_px=20, distance_cm=30.0)
    az, el = d.pixel_mesh_deg()
    assert az.shape == el.shape == (20, 40)
    assert np.all(np.diff(az, axis=1) > 0)       # azimuth grows to the right
    assert np.all(np.diff(el, axis=0) < 0)       # elevation falls down the rows (row 0 at the top)
    np.testing.assert_allclose(az[:, ::-1], -az, atol=1e-12)   # symmetric about the centre


def test_display_refuses_non_positive_sizes():
    with pytest.raises(ValueError, match="distance_cm"):
        Display(width_cm=10, height_cm=10, width_px=10, height_px=10, distance_cm=0)


# ------------------------------------------------------------------------------------------------
# gratings (contract: s = c cos(2 pi sf u - 2 pi tf (t - onset) + phase), u along the wave vector)
# ------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("ori", [0.0, 30.0, 90.0, 157.5, 250.0])
def test_phase_zero_puts_a_bright_crest_on_the_origin(ori):
    origin = (4.0, -3.0)
    sf = 0.125                                                   # period 8 deg
    assert float(grating_image(*origin, ori, sf, 0.0, origin_deg=origin)) == pytest.approx(1.0)
    th = math.radians(ori)
    # half a period along the wave vector: a dark trough
    x, y = origin[0] + 4.0 * math.cos(th), origin[1] + 4.0 * math.sin(th)
    assert float(grating_image(x, y, ori, sf, 0.0, origin_deg=origin)) == pytest.approx(-1.0)
    # along the stripes (perpendicular to the wave vector) the value stays at the crest
    xs = origin[0] - np.linspace(-20, 20, 9) * math.sin(th)
    ys = origin[1] + np.linspace(-20, 20, 9) * math.cos(th)
    np.testing.assert_allclose(grating_image(xs, ys, ori, sf, 0.0, origin_deg=origin), 1.0, atol=1e-12)
    # phase 90 deg at the origin: cos(90 deg) = 0; phase 180: a trough
    assert float(grating_image(*origin, ori, sf, 90.0, origin_deg=origin)) == pytest.approx(0.0, abs=1e-12)
    assert float(grating_image(*origin, ori, sf, 180.0, origin_deg=origin)) == pytest.approx(-1.0)


def test_orientation_zero_is_vertical_stripes_and_contrast_scales():
    g = Grid(ny=5, nx=9, dx_deg=1.0, dy_deg=1.0)
    x, y = g.mesh_deg()
    s = grating_image(x, y, 0.0, 0.2, 30.0, contrast=0.5)
    np.testing.assert_allclose(s, s[0:1, :] * np.ones((5, 1)), atol=1e-12)     # constant down columns
    assert np.abs(s).max() <= 0.5 + 1e-12
    kx, ky = wave_vector(0.0, 0.2)
    assert (float(kx), float(ky)) == (0.2, 0.0)


@pytest.mark.parametrize("ori", [0.0, 45.0, 120.0, 200.0, 300.0])
def test_drifting_grating_moves_toward_its_orientation(ori):
    sf, tf, t = 0.1, 2.0, 0.1
    th = math.radians(ori)
    u = np.linspace(-2.0, 8.0, 10001)                          # positions along the wave vector
    x, y = u * math.cos(th), u * math.sin(th)
    s0 = grating_image(x, y, ori, sf, 0.0, tf_hz=tf, t_since_onset_s=0.0)
    s1 = grating_image(x, y, ori, sf, 0.0, tf_hz=tf, t_since_onset_s=t)
    assert abs(u[np.argmax(s0)]) < 1e-3                         # crest at the origin at onset
    # crest where 2 pi sf u = 2 pi tf t: u = tf t / sf = 2 deg further along +ori
    assert u[np.argmax(s1)] == pytest.approx(tf * t / sf, abs=2e-3)


def test_fold_orientation_into_0_180():
    np.testing.assert_array_equal(fold_orientation_deg([-10.0, 0.0, 180.0, 190.0, 359.0]),
                                  [170.0, 0.0, 0.0, 10.0, 179.0])
