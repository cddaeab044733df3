"""Tests for map2d.report: the self-contained report.html (index, per-cell data, population) and its data."""

import base64
import dataclasses
import re

import numpy as np
import pytest

from map2d.analysis import Analysis, analyze_session
from map2d.geometry import Grid
from map2d.report import data as D
from map2d.report import figures as F
from map2d.report.html import REPORT_FILE, render_report, write_report

UNIT = re.compile(r"\(.+\)")        # an axis label names its unit in parentheses: "azimuth (deg)"


@pytest.fixture(scope="module")
def full(small_spikes_session):
    """(Analysis, Session) of the shared small session: sparse noise, flashed and drifting gratings."""
    session, _ = small_spikes_session
    return analyze_session(session, n_shuffles=100, n_jobs=1), session


@pytest.fixture(scope="module")
def maps_only(small_spikes_session):
    session, _ = small_spikes_session
    s = dataclasses.replace(session, gratings=None)
    return analyze_session(s, n_shuffles=100, n_jobs=1), s


@pytest.fixture(scope="module")
def gratings_only(small_spikes_session):
    session, _ = small_spikes_session
    s = dataclasses.replace(session, sparse_noise=None)
    return analyze_session(s, n_shuffles=100, n_jobs=1), s


def _assert_self_contained(text):
    """No network, no files beside the page: no src/href outside the page, no external styles or scripts."""
    low = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]*", "data:", text).lower()
    assert "http:" not in low and "https:" not in low and "file:" not in low
    assert "<link" not in low and "@import" not in low and "<iframe" not in low
    assert "src=" not in low                               # every script inline, no external image
    assert "fetch(" not in low and "xmlhttprequest" not in low and "import(" not in low
    markup = re.sub(r"<script.*?</script>", "", text, flags=re.S)
    hrefs = re.findall(r'href="([^"]*)"', markup)
    assert all(h.startswith("#") for h in hrefs)          # only links inside the page
    assert low.count("<script") == 3                       # session data, cell data, the page's code


def _payloads(text):
    """The two JSON objects embedded in the page."""
    import json
    out = []
    for name in ("m2d-session", "m2d-cells"):
        m = re.search(rf'<script type="application/json" id="{name}">(.*?)</script>', text, re.S)
        out.append(json.loads(m.group(1)))
    return out


# ----------------------------------------------------------------------------------------------
# the whole report
# ----------------------------------------------------------------------------------------------
def test_report_is_written_self_contained_with_every_cell(full, tmp_path):
    from map2d.pipeline import write_analysis

    an, session = full
    written = write_analysis(tmp_path, an, session)
    path = tmp_path / REPORT_FILE
    assert path in written and path.is_file()
    text = path.read_text(encoding="utf-8")
    _assert_self_contained(text)
    ids = [int(v) for v in an.cell_ids]
    # every cell: a row of the index, its key values, its drawing data
    for cid in ids:
        assert text.count(f'id="cell-{cid}"') == 1 and f'id="facts-{cid}"' in text
    sess, cells = _payloads(text)
    assert sorted(int(k) for k in cells) == ids and sess["ids"] == ids
    assert sess["unit"] == an.unit and sess["grid"]["ext"] == [float(v) for v in an.maps.grid.extent_deg]
    # the all-cells table has one row per cell plus the header, with every column named
    table = text[text.index('<table id="all-cells">'):]
    assert table.count("<tr>") == len(an.cell_ids) + 1
    for col in ("cell", "responsive", "center_x_deg", "pref_sf_cpd", "f1_f0", "agreement", "linear"):
        assert f'">{col}</th>' in table                      # with its meaning as hover text


def test_cell_data_hold_the_peak_lag_maps_and_the_fit_outline(full):
    """The page draws the maps the arrays hold: ON, OFF, linear at the peak lag (row 0 at the top, the
    contract's order), within 1/32000 of the largest magnitude; the outline at the fitted centre."""
    an, session = full
    m = an.maps
    _, cells = _payloads(render_report(an, session))
    for c in np.flatnonzero(m.responsive):
        d = cells[str(int(an.cell_ids[c]))]["map"]
        li = int(m.peak_lag_index[c])
        assert d["li"] == li and d["sig"] is True
        planes = np.stack([m.on[c, li], m.off[c, li], m.linear[c, li]]).astype(float)
        got = _unpack(d["maps"])
        np.testing.assert_allclose(got, planes, atol=np.nanmax(np.abs(planes)) / 30000)
        cx, cy = an.cells["center_x_deg"][c], an.cells["center_y_deg"][c]
        if np.isfinite(cx):
            assert d["outline"][:2] == pytest.approx([cx, cy], rel=1e-3)


def _unpack(p):
    q = np.frombuffer(base64.b64decode(p["q"]), "<i2").astype(float)
    return np.where(q == -32768, np.nan, q / 32000 * p["m"]).reshape(p["sh"])


def test_predictions_and_warnings_follow_the_cell(full):
    """Predicted surfaces exist only for cells with a significant map and a non-zero gain; measured and
    predicted share one scale (one packed array); a grating peak at the last lag is flagged."""
    an, session = full
    _, cells = _payloads(render_report(an, session))
    n_pred = 0
    for c, cid in enumerate(an.cell_ids):
        s = cells[str(int(cid))]["surf"]
        assert s["h"]["sh"] == [2, len(an.flashed.orientations_deg), len(an.flashed.sfs_cpd)]
        g = abs(complex(an.forward["gain"][c]))
        ok = bool(an.maps.responsive[c]) and np.isfinite(g) and g > 0
        assert s["has_pred"] == ok and (s["pred_reason"] == "") == ok
        n_pred += ok
        lag = s["lag"]
        assert lag["last"] == (lag["peak"] == len(lag["e"]) - 1 and bool(an.flashed.responsive[c]))
    assert n_pred >= 3


def test_report_is_identical_when_rendered_again(full):
    an, session = full
    assert render_report(an, session) == render_report(an, session)


def test_maps_only_report(maps_only, tmp_path):
    an, session = maps_only
    assert an.flashed is None and an.drifting is None
    text = write_report(tmp_path, an, session).read_text(encoding="utf-8")
    _assert_self_contained(text)
    _, cells = _payloads(text)
    assert all("map" in d and "surf" not in d and "tun" not in d for d in cells.values())
    assert "No gratings" in text
    assert all(f'id="cell-{int(c)}"' in text for c in an.cell_ids)


def test_gratings_only_report(gratings_only, tmp_path):
    an, session = gratings_only
    assert an.maps is None
    text = write_report(tmp_path, an, session).read_text(encoding="utf-8")
    _assert_self_contained(text)
    sess, cells = _payloads(text)
    assert "grid" not in sess and all("map" not in d and "tun" in d for d in cells.values())
    assert "No sparse noise" in text


def test_text_from_the_data_is_escaped(full):
    an, session = full
    cells = {k: list(v) for k, v in an.cells.items()}
    cells["polarity"][0] = "<b>bold</b> & more"
    cells["linear_reason"][1] = "</script><script>alert(1)</script>"
    odd = dataclasses.replace(an, cells=cells, notes=["a note with <script>x</script>"])
    text = render_report(odd, session)
    assert "<b>bold</b>" not in text and "&lt;b&gt;bold&lt;/b&gt; &amp; more" in text
    assert "<script>x" not in text and "&lt;script&gt;" in text
    assert "alert(1)</script>" not in text                 # JSON in the page cannot close its element
    sess, _ = _payloads(text)
    assert sess["col"]["linear_reason"][1] == "</script><script>alert(1)</script>"


def test_flashed_error_bars_match_the_spread_of_noisy_surfaces():
    """The standard errors of the rank-1 profiles (a seeded parametric bootstrap of 200 draws) match the
    spread of the profiles over 3000 independent noisy copies of one surface (Monte Carlo, common practice)."""
    from map2d.fit.tuning import _rank1
    rng = np.random.default_rng(0)
    ori = np.linspace(0, 165, 12)
    sf = np.array([0.5, 1.0, 0.6, 0.2])
    clean = 5 + 20 * np.exp(2 * (np.cos(np.deg2rad(2 * (ori - 60))) - 1))[:, None] * sf[None, :]
    var = rng.uniform(0.5, 2.0, clean.shape)
    o_se, s_se = D._rank1_se(clean, var)
    draws = [_rank1(clean + rng.normal(0, np.sqrt(var))) for _ in range(3000)]
    o_sd = np.std([d[0] for d in draws], axis=0)
    s_sd = np.std([d[1] for d in draws], axis=0)
    # 200 draws: each s.d. within ~5 % (1 s.e. of a s.d. is 1/sqrt(2 x 199))
    np.testing.assert_allclose(o_se, o_sd, rtol=0.2)
    np.testing.assert_allclose(s_se, s_sd, rtol=0.2)


def test_retinotopy_recovers_the_gradient_and_flags_the_cell_off_it():
    rng = np.random.default_rng(1)
    xy = rng.uniform(0, 200, (60, 2))
    az = 3.0 + 0.05 * xy[:, 0] - 0.02 * xy[:, 1] + rng.normal(0, 0.2, 60)
    el = -1.0 + 0.04 * xy[:, 1] + rng.normal(0, 0.2, 60)
    el[[7, 30]] += [6.0, -5.0]                              # two cells far off the map
    az[12] = np.nan                                         # one without a centre: not fitted, not flagged
    out = D.retinotopy(xy, az, el)
    assert np.flatnonzero(out["flag"]).tolist() == [7, 30]
    np.testing.assert_allclose(out["az"]["coef"][1:], [0.05, -0.02], atol=0.003)   # slopes in deg/pixel
    assert out["az"]["coef"][0] == pytest.approx(3.0, abs=0.3)
    np.testing.assert_allclose(out["el"]["coef"][1:], [0.0, 0.04], atol=0.003)
    assert out["el"]["n"] == 57 and out["el"]["r2"] > 0.95
    assert D.retinotopy(xy[:4], az[:4], el[:4]) is None


def test_fov_in_the_report_numbers_each_roi(full):
    from map2d.simulate import roi_label_image
    an, session = full
    s = dataclasses.replace(session, rois=roi_label_image(an.cell_ids, shape=(80, 100), radius_px=4, rng=0),
                            roi_label_offset=1)
    text = render_report(an, s)
    sess, _ = _payloads(text)
    fov = sess["fov"]
    lab = np.frombuffer(base64.b64decode(fov["lab"]), "<u2").reshape(fov["h"], fov["w"])
    # label of cell row r is r + 1; its centroid is the mean of its pixels
    for r in range(len(an.cell_ids)):
        yy, xx = np.nonzero(lab == r + 1)
        assert fov["cx"][r] == pytest.approx(xx.mean(), rel=1e-3) and fov["cy"][r] == pytest.approx(yy.mean(), rel=1e-3)
    assert 'id="fov-map"' in text and "Retinotopy" in text


def test_pack_round_trip():
    a = np.array([[1.5, -3.0, np.nan], [0.0, 2.0, 1e-3]])
    p = D.pack(a)
    np.testing.assert_allclose(_unpack(p), a, atol=3.0 / 32000)
    assert np.isnan(_unpack(p)[0, 2]) and np.isnan(_unpack(D.pack(np.full(3, np.nan)))).all()


def test_cyclic_orientation_colours_have_one_lightness():
    """Every orientation equally light (the map never passes near black or white) and 0 = 180 deg."""
    from map2d.report.colours import cyclic_rgb
    rgb = cyclic_rgb(90)
    lum = rgb @ np.array([0.2126, 0.7152, 0.0722])     # relative luminance of gamma-encoded sRGB (rough)
    assert lum.min() > 0.45 and lum.max() < 0.8
    assert np.abs(rgb[0] - rgb[-1]).max() < 0.1          # wraps around


# ----------------------------------------------------------------------------------------------
# pieces, on hand-made analyses
# ----------------------------------------------------------------------------------------------
def _hand_analysis(cells):
    ids = np.asarray(cells["cell"])
    return Analysis(session_name="hand", cell_ids=ids, unit="spikes/s", cells=cells)


def test_select_cells_ranks_both_then_map_then_gratings_and_caps():
    nan = float("nan")
    cells = {"cell": [0, 1, 2, 3, 4, 5],
             "responsive": [True, False, True, True, None, False],
             "grating_responsive": [False, True, True, False, True, False],
             "snr": [5.0, nan, 2.0, 9.0, nan, 1.0],
             "flashed_p_value": [nan, 0.001, 0.001, nan, 0.0001, 0.5],
             "drifting_p_value": [nan, nan, nan, nan, nan, nan]}
    an = _hand_analysis(cells)
    assert F.select_cells(an, None) == ([0, 1, 2, 3, 4], 5)
    # rank: 2 (both), then 3 (map, snr 9), 0 (map, snr 5), then 4 (p 1e-4), 1 (p 1e-3)
    assert F.select_cells(an, 1) == ([2], 5)
    assert F.select_cells(an, 3) == ([0, 2, 3], 5)
    assert F.select_cells(an, 4) == ([0, 2, 3, 4], 5)


def test_outlines_follow_the_fitted_model():
    nan = float("nan")
    cells = {"cell": [0, 1, 2, 3],
             "model": ["gaussian", "dog", "gabor", ""],
             "center_x_deg": [1.0, 2.0, 3.0, nan], "center_y_deg": [-1.0, -2.0, -3.0, nan],
             "sigma_major_deg": [2.0, nan, nan, nan], "sigma_minor_deg": [1.0, nan, nan, nan],
             "theta_deg": [30.0, nan, nan, nan], "rc_deg": [nan, 1.5, nan, nan],
             "gabor_sigma_u_deg": [nan, nan, 1.2, nan], "gabor_sigma_v_deg": [nan, nan, 0.8, nan],
             "gabor_orientation_deg": [nan, nan, 100.0, nan]}
    an = _hand_analysis(cells)
    g = F.outline_patch(an, 0)
    assert (g.get_center(), g.width, g.height, g.angle) == ((1.0, -1.0), 4.0, 2.0, 30.0)
    d = F.outline_patch(an, 1)
    # exp(-r^2 / rc^2) falls to exp(-1/2) at r = rc / sqrt(2) (module notes: 1-s.d. contour)
    assert d.width == pytest.approx(2 * 1.5 / np.sqrt(2)) and d.height == d.width
    b = F.outline_patch(an, 2)
    assert (b.width, b.height, b.angle) == (pytest.approx(2.4), pytest.approx(1.6), 100.0)
    assert F.outline_patch(an, 3) is None


def test_a_table_with_missing_columns_still_gives_a_page():
    """Columns the table lacks (another version, another helper's column) are shown empty."""
    cells = {"cell": [0, 1], "responsive": [False, False], "linear": [None, None]}
    an = _hand_analysis(cells)
    text = render_report(an, None)
    sess, cells_data = _payloads(text)
    assert 'id="cell-0"' in text and 'id="cell-1"' in text
    assert sess["col"]["agreement"] == [None, None] and set(cells_data) == {"0", "1"}


def test_drifting_gratings_without_a_flashed_sequence(full, tmp_path):
    """No flashed sequence: no surfaces, tuning curves (with standard errors) from the drifting trials."""
    an, session = full
    an = dataclasses.replace(an, flashed=None, predicted_h=None, measured_h=None, forward=None, inverse=None)
    text = write_report(tmp_path, an, session).read_text(encoding="utf-8")
    _assert_self_contained(text)
    assert "No flashed gratings" in text
    _, cells = _payloads(text)
    tuned = [d["tun"] for d in cells.values() if d.get("tun")]
    assert tuned and all(t["src"] == "drifting" and "surf" not in d for t, d in zip(tuned, cells.values()))
    assert any(t["ose"] is not None and any(v is not None for v in t["ose"]) for t in tuned)


def test_sf_panel_shows_the_tables_preferred_sf(full):
    """The SF panel's fitted curve is the table's fit (surface fit for orientation-tuned cells): its
    preferred SF is the one in cells.csv."""
    an, _ = full
    checked = 0
    for c in range(len(an.cell_ids)):
        pref = F._vfloat(an, "pref_sf_cpd", c)
        got = F._tuning_curves(an, c)
        if got is None or not np.isfinite(pref):
            continue
        src, th, oc, sfs, sc, surface, ofit = got
        curve = F._sf_fit_curve(sfs, sc, np.geomspace(sfs.min(), sfs.max(), 20), th, surface, ofit)
        assert curve is not None
        assert curve[1] == pytest.approx(pref, rel=1e-6), c
        checked += surface is not None
    assert checked >= 1
