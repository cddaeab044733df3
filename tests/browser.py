"""A real browser for tests: headless Chromium from the system's packages, driven by selenium.

Use the session-scoped ``browser`` fixture of ``tests/conftest.py`` (it calls :func:`start_browser`):

    def test_page(browser, tmp_path):
        browser.open(tmp_path / "page.html")          # a file path or a URL
        browser.driver.find_element(...)               # selenium WebDriver
        assert browser.console_errors() == []
        browser.screenshot(tmp_path / "page.png")

The browser is the Debian ``chromium`` with ``chromium-driver`` (``/usr/bin/chromedriver``). When they
are missing and the tests run as root on a system with ``apt-get``, :func:`ensure_chromium` installs
them once; when that is impossible the fixture skips and says why. The flags turn off everything that
reaches for the network (on a closed network Chromium otherwise waits for it) and use a fresh profile.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

CHROMEDRIVER = "/usr/bin/chromedriver"
CHROMIUM_CANDIDATES = ("/usr/bin/chromium", "/usr/lib/chromium/chromium", "/usr/bin/chromium-browser")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage", "--hide-scrollbars", "--force-device-scale-factor=1")


def _chromium_binary():
    for p in CHROMIUM_CANDIDATES:
        if os.path.exists(p):
            return p
    return None


def ensure_chromium() -> str | None:
    """None when Chromium and its driver are available (installing them if we can), else the reason."""
    if _chromium_binary() and os.path.exists(CHROMEDRIVER):
        return None
    apt = shutil.which("apt-get")
    if apt is None or os.geteuid() != 0:
        return "chromium / chromium-driver not installed and cannot be installed here (needs root and apt-get)"
    try:
        for args in (["install", "-y", "chromium", "chromium-driver"], ["update"],
                     ["install", "-y", "chromium", "chromium-driver"]):
            subprocess.run([apt] + args, check=False, timeout=600, stdout=subprocess.DEVNULL,
                           stderr=subprocess.DEVNULL)
            if _chromium_binary() and os.path.exists(CHROMEDRIVER):
                break
    except (OSError, subprocess.SubprocessError) as exc:
        return f"installing chromium failed: {exc}"
    if _chromium_binary() and os.path.exists(CHROMEDRIVER):
        return None
    return "apt-get install chromium chromium-driver did not provide /usr/bin/chromedriver"


class Browser:
    """A selenium Chrome driver with a few conveniences (see the module notes)."""

    def __init__(self, width=1500, height=1000):
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service

        self.profile = tempfile.mkdtemp(prefix="map2d-chromium-")
        opts = webdriver.ChromeOptions()
        opts.binary_location = _chromium_binary()
        for f in FLAGS:
            opts.add_argument(f)
        opts.add_argument(f"--user-data-dir={self.profile}")
        opts.add_argument(f"--window-size={width},{height}")
        opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
        self.driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
        self.driver.set_page_load_timeout(60)

    def open(self, where):
        """Load a file path or a URL."""
        url = Path(where).absolute().as_uri() if not str(where).startswith(("http:", "https:", "file:")) \
            else str(where)
        self.driver.get(url)

    def console(self):
        """Console messages since the last call: ``[{"level": ..., "message": ...}]``."""
        return self.driver.get_log("browser")

    def console_errors(self, messages=None):
        """The SEVERE (error) console messages among ``messages`` (default: since the last call)."""
        msgs = self.console() if messages is None else messages
        return [m for m in msgs if m.get("level") == "SEVERE"]

    def screenshot(self, path, full_page=False):
        """Save a PNG of the viewport (or of the whole page height with ``full_page``)."""
        d = self.driver
        if full_page:
            size = d.get_window_size()
            h = d.execute_script("return document.documentElement.scrollHeight")
            d.set_window_size(size["width"], min(int(h) + 20, 16000))
            d.save_screenshot(str(path))
            d.set_window_size(size["width"], size["height"])
        else:
            d.save_screenshot(str(path))
        return Path(path)

    def quit(self):
        try:
            self.driver.quit()
        finally:
            shutil.rmtree(self.profile, ignore_errors=True)


def start_browser(**kwargs):
    """``(Browser, None)`` or ``(None, reason)`` when no browser can be had."""
    reason = ensure_chromium()
    if reason is not None:
        return None, reason
    try:
        import selenium  # noqa: F401
    except ImportError:
        return None, "selenium is not installed (pip install -e '.[test]')"
    return Browser(**kwargs), None
