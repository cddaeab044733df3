"""The live page of ``map2d watch`` in a real browser: headless Chromium (the ``browser`` fixture of
``tests/conftest.py``, :mod:`tests.browser`) loads the page while a replayed recording goes on, and sees
it reload itself with more data. Polls with generous timeouts: nothing depends on the machine's speed.
"""

from __future__ import annotations

import threading
import time

from map2d.replay import replay_steps
from map2d.watch import watch_folder


def wait_for(check, timeout_s=90.0, what="condition"):
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        value = check()
        if value:
            return value
        time.sleep(0.2)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


def screenshot(driver, path):
    """Save a PNG of the page (retried: the page may be reloading at that moment)."""
    from selenium.common.exceptions import WebDriverException
    wait_for(lambda: _try(lambda: driver.save_screenshot(str(path)), WebDriverException), what="a screenshot")


def _try(fn, exc):
    try:
        return fn()
    except exc:
        return None


def page_state(driver):
    """(update number, frames read, state) of the page now loaded, or None while it is (re)loading."""
    from selenium.common.exceptions import WebDriverException
    try:
        return driver.execute_script(
            "const b = document.getElementById('live'); const d = document.getElementById('live-data');"
            "if (!b || !d) return null; const D = JSON.parse(d.textContent);"
            "return [Number(b.dataset.version), D.info.frames, b.dataset.state,"
            "        document.querySelectorAll('canvas.map').length, D.cells.length];")
    except WebDriverException:
        return None


def test_live_page_loads_and_updates_while_the_recording_goes_on(browser, small_spikes_session, tmp_path):
    session, _ = small_spikes_session
    folder = tmp_path / "rec"
    steps = replay_steps(session, folder, step_s=60.0, seconds=240.0)
    next(steps)                                                    # the stimulus and the first minute
    stop = threading.Event()
    result, errors = {}, []

    def run():
        try:
            result.update(watch_folder(folder, idle_s=600.0, poll_s=0.1, refresh_s=1.0, summary_s=600.0,
                                       fits=False, quiet=True, stop=stop.is_set))
        except BaseException as exc:   # reported by the test
            errors.append(exc)

    th = threading.Thread(target=run, daemon=True)
    th.start()
    page = folder / "live.html"
    wait_for(page.exists, what="the live page")
    browser.console()                                              # earlier tests' messages
    browser.open(page)
    d = browser.driver
    first = wait_for(lambda: page_state(d), what="the page's data")
    assert first[2] == "live" and first[1] > 0
    assert first[3] == 3 * first[4]                                # ON, OFF, linear for every cell
    screenshot(d, tmp_path / "live_first.png")
    next(steps)                                                    # one more minute arrives
    later = wait_for(lambda: (s := page_state(d)) and s[1] > first[1] and s,
                     what="the page to reload with the new minute")
    assert later[0] > first[0]
    screenshot(d, tmp_path / "live_later.png")
    assert "map2d stimulus gratings" in d.find_element("id", "command").text
    assert browser.console_errors() == []
    stop.set()
    th.join(timeout=300)
    assert not th.is_alive() and not errors, errors
    final = wait_for(lambda: (s := page_state(d)) and s[2].startswith("final") and s, what="the final page")
    assert final[1] == later[1]
