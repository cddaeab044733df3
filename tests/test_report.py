"""Tests for map2d.report: figures with units on every axis, and a self-contained report.html."""

import base64
import dataclasses
import re

import numpy as np
import pytest
from matplotlib.image import AxesImage

from map2d.analysis import Analysis, analyze_session
from map2d.geometry import Grid
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


def _figure_ids(text):
    return re.findall(r'<figure id="([^"]+)"', text)


def _assert_self_contained(text):
    srcs = re.findall(r'src="([^"]*)"', text)
    low = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]*", "data:", text).lower()   # base64 may hold any word
    assert "http" not in low and "//" not in low and "file:" not in low
    assert "<script" not in low and "<link" not in low and "url(" not in low and "@import" not in low
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    hrefs = re.findall(r'href="([^"]*)"', text)
    assert all(h.startswith("#") for h in hrefs)          # only links inside the page
    for s in srcs:
        assert base64.b64decode(s.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"


def _all_figures(analysis, max_cells=40):
    """Every Figure of a report before encoding, as (id, problems with its axis labels).

    Cell panels reuse one Figure, so each is checked right after it is drawn.
    """
    out = [(fid, _axes_problems(fig)) for fid, _, fig in F.summary_figures(analysis)]
    rows, _ = F.select_cells(analysis, max_cells)
    panels = F.CellPanels(analysis)
    for r in rows:
        out.append((f"fig-cell-{int(analysis.cell_ids[r])}", _axes_problems(panels.draw(r))))
    return out


def _axes_and_insets(fig):
    """All axes of a figure, including inset axes (colour bars) that live inside other axes."""
    out = []
    for ax in fig.axes:
        out += [ax] + list(ax.child_axes)
    return out


def _axes_problems(fig):
    """Axes of ``fig`` whose labels lack a unit: data axes need x and y labels, colour bars their label."""
    bad = []
    for ax in _axes_and_insets(fig):
        if not ax.get_visible():
            continue
        cb = getattr(ax, "_colorbar", None)
        if cb is not None:
            label = ax.get_ylabel() or ax.get_xlabel()
            if not UNIT.search(label):
                bad.append(("colour bar", label))
            continue
        if not ax.has_data():
            continue
        for which, label in (("x", ax.get_xlabel()), ("y", ax.get_ylabel())):
            if not UNIT.search(label):
                bad.append((ax.get_title(), which, label))
    return bad


# ----------------------------------------------------------------------------------------------
# the whole report
# ----------------------------------------------------------------------------------------------
def test_report_is_written_self_contained_with_every_figure(full, tmp_path, monkeypatch):
    from map2d.pipeline import write_analysis
    from map2d.report import html as report_html

    an, session = full
    monkeypatch.setattr(report_html, "DEFAULT_MAX_CELLS", 4)       # fewer panels: a faster test
    written = write_analysis(tmp_path, an, session)
    path = tmp_path / REPORT_FILE
    assert path in written and path.is_file()
    text = path.read_text(encoding="utf-8")
    _assert_self_contained(text)
    rows, n_qual = F.select_cells(an, 4)
    resp = [v is True for v in an.cells["responsive"]]
    assert n_qual >= sum(resp) >= 5 and len(rows) == 4    # the small session has responsive cells
    expected = ["fig-field", "fig-tuning-summary"] + [f"fig-cell-{int(an.cell_ids[r])}" for r in rows]
    assert _figure_ids(text) == expected
    assert text.count("<img ") == len(expected)
    for r in rows:                                       # a key-value table and an anchor per panel
        assert f'id="cell-{int(an.cell_ids[r])}"' in text and f'href="#cell-{int(an.cell_ids[r])}"' in text
    # the all-cells table has one row per cell plus the header, with every column named
    table = text[text.index("<h2>All cells</h2>"):]
    assert table.count("<tr>") == len(an.cell_ids) + 1
    for col in ("cell", "responsive", "center_x_deg", "pref_sf_cpd", "f1_f0", "agreement", "linear"):
        assert f'">{col}</th>' in table                      # with its meaning as hover text


def test_every_axis_names_its_unit(full):
    an, _ = full
    figs = _all_figures(an)
    assert len(figs) >= 2 + 5
    assert all(not bad for _, bad in figs), [f for f in figs if f[1]]
    # a full panel has the maps, surfaces, reconstructions and tuning rows: 12 data axes + 3 colour bars
    panel = F.CellPanels(an).draw(int(np.flatnonzero(an.maps.responsive)[0]))
    n_cb = sum(getattr(ax, "_colorbar", None) is not None for ax in _axes_and_insets(panel))
    assert len(panel.axes) == 4 + 4 + 4 and n_cb == 3


def test_panel_maps_are_upright_in_degrees_with_the_fit_outline(full):
    """The shown map is the peak-lag map, row 0 at the top, over the grid's extent (contract)."""
    an, _ = full
    m = an.maps
    c = int(np.flatnonzero(m.responsive)[0])
    fig = F.CellPanels(an).draw(c)
    li = int(m.peak_lag_index[c])
    images = [im for ax in fig.axes for im in ax.get_images() if isinstance(im, AxesImage)]
    lin = images[2]                                       # ON, OFF, linear come first
    np.testing.assert_array_equal(np.asarray(lin.get_array(), float), np.asarray(m.linear[c, li], float))
    assert lin.origin == "upper"
    np.testing.assert_allclose(lin.get_extent(), m.grid.extent_deg)
    # the outline sits at the fitted centre
    ellipses = [p for p in fig.axes[2].patches if p.get_visible()]
    cx, cy = an.cells["center_x_deg"][c], an.cells["center_y_deg"][c]
    if np.isfinite(cx):
        assert len(ellipses) == 1
        np.testing.assert_allclose(ellipses[0].get_center(), (cx, cy))


def test_cap_on_panels_says_how_many_are_omitted(full):
    an, session = full
    _, n_qual = F.select_cells(an)
    text = render_report(an, session, max_cells=2)
    cells = [i for i in _figure_ids(text) if i.startswith("fig-cell-")]
    assert len(cells) == 2
    assert f"{n_qual - 2} omitted" in text


def test_report_is_identical_when_rendered_again(full):
    an, session = full
    assert render_report(an, session, max_cells=1) == render_report(an, session, max_cells=1)


def test_maps_only_report(maps_only, tmp_path):
    an, session = maps_only
    assert an.flashed is None and an.drifting is None
    text = write_report(tmp_path, an, session, max_cells=3).read_text(encoding="utf-8")
    _assert_self_contained(text)
    ids = _figure_ids(text)
    assert ids[:2] == ["fig-field", "fig-tuning-summary"]
    _, n_qual = F.select_cells(an)
    assert n_qual == sum(v is True for v in an.cells["responsive"]) > 3
    assert len(ids) == 2 + 3
    assert "No gratings" in text
    assert all(not bad for _, bad in _all_figures(an))


def test_gratings_only_report(gratings_only, tmp_path):
    an, session = gratings_only
    assert an.maps is None
    text = write_report(tmp_path, an, session, max_cells=3).read_text(encoding="utf-8")
    _assert_self_contained(text)
    ids = _figure_ids(text)
    assert "fig-field" not in ids and ids[0] == "fig-tuning-summary"
    _, n_qual = F.select_cells(an)
    assert n_qual == sum(v is True for v in an.cells["grating_responsive"]) > 3
    assert len(ids) == 1 + 3
    assert "No sparse noise" in text
    assert all(not bad for _, bad in _all_figures(an))


def test_text_from_the_data_is_escaped(full):
    an, session = full
    cells = {k: list(v) for k, v in an.cells.items()}
    cells["polarity"][0] = "<b>bold</b> & more"
    odd = dataclasses.replace(an, cells=cells, notes=["a note with <script>x</script>"])
    text = render_report(odd, session, max_cells=0)
    assert "<b>bold</b>" not in text and "&lt;b&gt;bold&lt;/b&gt; &amp; more" in text
    assert "<script>" not in text and "&lt;script&gt;" in text


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


def test_summary_without_any_responsive_cell_still_draws_labelled_axes():
    grid = Grid(ny=4, nx=5, center_x_deg=0.0, center_y_deg=0.0, dx_deg=1.0, dy_deg=1.0)
    cells = {"cell": [0, 1], "responsive": [False, False], "center_x_deg": [None, None],
             "center_y_deg": [None, None], "agreement": [None, None], "f1_f0": [None, None],
             "linear": [None, None]}
    an = _hand_analysis(cells)

    class _Maps:                     # just what the summary reads from a MapResult
        pass

    an.maps = _Maps()
    an.maps.grid = grid
    an.maps.lags_s = np.array([0.0, 0.05])
    figs = F.summary_figures(an)
    assert [f[0] for f in figs] == ["fig-field", "fig-tuning-summary"]
    for _, _, fig in figs:
        for ax in fig.axes:
            assert UNIT.search(ax.get_xlabel()) and UNIT.search(ax.get_ylabel())
    text = render_report(an, None)
    assert "no cell panels" in text.lower() or "there are no cell panels" in text


def test_drifting_gratings_without_a_flashed_sequence(full, tmp_path):
    """No flashed sequence: no surfaces row, tuning curves from the drifting trials.

    Built from the full analysis with the flashed results removed (cheaper than a new analysis; the
    report only reads what is there).
    """
    an, session = full
    an = dataclasses.replace(an, flashed=None, predicted_h=None, measured_h=None, forward=None, inverse=None)
    panels = F.CellPanels(an)
    assert [k for k, _ in panels.rows] == ["maps", "tuning"]
    assert len(panels.fig.axes) == 4 + 3                 # maps row; orientation, SF and size tuning
    text = write_report(tmp_path, an, session, max_cells=2).read_text(encoding="utf-8")
    _assert_self_contained(text)
    assert "No flashed gratings" in text
    assert len(_figure_ids(text)) == 2 + 2
    assert all(not bad for _, bad in _all_figures(an))
    src = F._tuning_curves(an, F.select_cells(an, 1)[0][0])
    assert src is not None and src[0] == "drifting"


def test_forked_panels_give_the_same_page_as_serial(full, monkeypatch):
    """Half of the panels drawn in a forked child (speed) must not change a byte of the report."""
    from map2d.report import html as H
    an, session = full
    monkeypatch.setattr(H, "_FORK_MIN_PANELS", 2)
    made = []
    real_init = H._Forked.__init__

    def spy(self, fn, enabled=True):
        real_init(self, fn, enabled)
        made.append(self.pid)
    monkeypatch.setattr(H._Forked, "__init__", spy)
    forked = H.render_report(an, session, max_cells=6)
    import threading
    if hasattr(__import__("os"), "fork") and threading.active_count() == 1:
        assert made and made[0] is not None          # the child really drew half of the panels
    monkeypatch.setattr(H._Forked, "__init__", lambda self, fn, enabled=True: (
        setattr(self, "fn", fn), setattr(self, "pid", None), setattr(self, "fd", None))[0])
    serial = H.render_report(an, session, max_cells=6)
    assert forked == serial
    assert forked.count("<section class=\"cell\"") + forked.count("<section class='cell'") >= 2


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
