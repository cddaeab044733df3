"""report.html in a real browser (headless Chromium, :mod:`tests.browser`): a simulated 200-cell imaging
session's report loads without console errors, every cell is reachable, and cells open from the index,
the keyboard, the receptive-field mosaic and the field-of-view map. Screenshots go to the test's
temporary folder (``report_*.png``)."""

import numpy as np
import pytest

from map2d.analysis import analyze_session
from map2d.report.html import write_report
from map2d.simulate import roi_label_image, simulate_session

N_CELLS = 200


@pytest.fixture(scope="module")
def report_200(tmp_path_factory):
    """report.html of a 200-cell session: 32 driven model cells among 168 unresponsive ones (most cells
    of a real recording do not answer a given stimulus; this also keeps the analysis to a few seconds),
    2 min of sparse noise, 1 min of flashed gratings, drifting trials, an ROI label image."""
    types = ["on_dog", "off_dog"] * 4 + ["simple"] * 14 + ["complex"] * 10 + ["unresponsive"] * 168
    types = list(np.random.default_rng(1).permutation(types))
    s, _ = simulate_session(n_cells=N_CELLS, minutes=2.0, seed=3, flashed_minutes=1.0, n_orientations=8,
                            n_phases=4, n_directions=8, repeats=2, cell_types=types,
                            peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5), unresponsive_hz=(1.0, 3.0))
    s.rois = roi_label_image(s.cell_ids, shape=(240, 320), radius_px=5.0, rng=1)
    s.roi_label_offset = 1
    an = analyze_session(s, rng=0, n_shuffles=100, n_jobs=1)
    folder = tmp_path_factory.mktemp("report200")
    return write_report(folder, an, s), an


def _wait_ready(browser):
    from selenium.webdriver.support.ui import WebDriverWait
    WebDriverWait(browser.driver, 30).until(
        lambda d: d.execute_script("return document.body.getAttribute('data-ready')") == "1")


def _viewer_cell(browser):
    return browser.driver.execute_script("return document.getElementById('viewer').getAttribute('data-cell')")


def test_200_cell_report_in_a_browser(browser, report_200, tmp_path):
    from selenium.webdriver.common.by import By

    path, an = report_200
    ids = [int(v) for v in an.cell_ids]
    size_mb = path.stat().st_size / 1e6
    assert size_mb < 30 * N_CELLS / 300          # 30 MB for 300 cells (issue's budget), pro rata
    browser.console()                            # drop messages of earlier pages
    browser.open(path)
    _wait_ready(browser)
    d = browser.driver
    missing = d.execute_script("return arguments[0].filter(function (i) { return !document.getElementById("
                               "'cell-' + i); });", ids)
    assert missing == []
    assert d.execute_script("return document.querySelectorAll('#index tbody tr').length") == N_CELLS
    # the population figures are drawn: mosaic, preference scatter, three histograms, two retinotopy plots
    assert d.execute_script("return document.querySelectorAll('#population svg').length") == 5
    assert d.execute_script("return document.querySelectorAll('#retinotopy svg').length") == 2
    assert d.find_element(By.ID, "fov-canvas").size["width"] >= 320
    browser.screenshot(tmp_path / "report_top.png")

    # open a responsive cell from the index: its panel (maps, surfaces, tuning) is drawn
    resp = [int(c) for c, v in zip(ids, an.cells["responsive"]) if v is True]
    assert len(resp) >= 8
    row = d.find_element(By.ID, f"cell-{resp[3]}")
    d.execute_script("arguments[0].scrollIntoView({block: 'center'})", row)
    row.click()
    assert _viewer_cell(browser) == str(resp[3])
    assert d.find_element(By.ID, "viewer-title").text == f"Cell {resp[3]}"
    n_svg = d.execute_script("return document.querySelectorAll('#viewer svg').length")
    assert n_svg >= 12                            # 4 map plots, 5 grating plots, 4 tuning plots at least
    d.execute_script("document.getElementById('viewer').scrollIntoView()")
    browser.screenshot(tmp_path / "report_cell.png")

    # keyboard: next and previous rows of the index
    body = d.find_element(By.TAG_NAME, "body")
    body.send_keys("n")
    after = ids[ids.index(resp[3]) + 1]
    assert _viewer_cell(browser) == str(after)
    body.send_keys("p")
    assert _viewer_cell(browser) == str(resp[3])

    # filter: only the cells called linear remain, and prev/next stays among them
    d.find_element(By.ID, "filter").send_keys("linear=yes")
    shown = d.execute_script("return Array.prototype.filter.call(document.querySelectorAll('#index tbody tr'),"
                             " function (r) { return r.style.display !== 'none'; }).map(function (r) {"
                             " return +r.id.slice(5); });")
    linear = [int(c) for c, v in zip(ids, an.cells["linear"]) if v is True]
    assert shown == linear and len(linear) >= 3
    d.find_element(By.ID, "filter").clear()
    d.execute_script("document.getElementById('filter').dispatchEvent(new Event('input'))")

    # the mosaic and the field of view open cells too
    target = resp[0]
    d.execute_script("document.querySelector('#population path.pick[data-cell=\"%d\"]')"
                     ".dispatchEvent(new MouseEvent('click', {bubbles: true}))" % target)
    assert _viewer_cell(browser) == str(target)
    fov = d.find_element(By.ID, "fov-canvas")
    r = ids.index(resp[1])
    cx, cy = d.execute_script("var s = JSON.parse(document.getElementById('m2d-session').textContent);"
                              "return [s.fov.cx[arguments[0]], s.fov.cy[arguments[0]]];", r)
    scale = fov.size["width"] / 320
    d.execute_script("var c = document.getElementById('fov-canvas'), b = c.getBoundingClientRect();"
                     "c.dispatchEvent(new MouseEvent('click', {clientX: b.left + arguments[0],"
                     " clientY: b.top + arguments[1], bubbles: true}));", (cx + 0.5) * scale, (cy + 0.5) * scale)
    assert _viewer_cell(browser) == str(resp[1])
    d.find_element(By.CSS_SELECTOR, "#fov-props button[data-key=linear]").click()
    d.execute_script("document.getElementById('s-fov').scrollIntoView()")
    browser.screenshot(tmp_path / "report_fov.png")

    # a link to a cell opens it
    d.execute_script("location.hash = '#cell-%d'" % resp[2])
    assert _viewer_cell(browser) == str(resp[2])
    errors = browser.console_errors()
    assert errors == [], errors
