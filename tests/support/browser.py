"""The browser-test harness: Debian's chromium driven by Playwright, a dashboard served by
waitress on a free loopback port, screenshots under tests/artifacts/, and the page types every
browser check walks through.

Without chromium the browser tests skip with the reason; with the environment variable CI set
they fail instead (DEVELOPERS.md).
"""

from __future__ import annotations

import json
import os
import shutil
import threading
import urllib.request
from contextlib import contextmanager
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
ARTIFACTS = REPO / "tests" / "artifacts"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]
PHONE = {"width": 390, "height": 844}  # a common phone's CSS viewport (common practice)
WIDE = {"width": 1440, "height": 900}


def no_browser(reason: str):
    """Skip, or fail in CI, when chromium cannot be used."""
    if os.environ.get("CI"):
        pytest.fail(f"browser tests need chromium in CI: {reason}")
    pytest.skip(reason)


@contextmanager
def launched_chromium():
    """Debian's chromium under Playwright (never a browser Playwright downloads itself)."""
    executable = shutil.which("chromium")
    if executable is None:
        no_browser("no 'chromium' on PATH (Debian: apt-get install chromium)")
    from playwright.sync_api import Error, sync_playwright

    with sync_playwright() as playwright:
        try:
            browser = playwright.chromium.launch(executable_path=executable,
                                                 args=CHROMIUM_ARGS)
        except Error as error:
            no_browser(f"chromium did not start: {error.message.splitlines()[0]}")
        try:
            yield browser
        finally:
            browser.close()


def serve_in_thread(app):
    """Serve ``app`` with waitress on a free loopback port; yields the base URL."""
    import waitress

    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.effective_port}"
    from tests.support.web import stop_server

    stop_server(server)


def get_json(url: str):
    with urllib.request.urlopen(url, timeout=30) as response:
        return json.load(response)


def page_types(base_url: str) -> dict[str, str]:
    """One address of each page type of a demo dashboard: Shelf, Survey, Close-up, Unit card,
    Compare, the checks' help page and an error page."""
    dumps = {dump["name"]: dump for dump in get_json(base_url + "/api/dumps")}
    survey = dumps["logistic_deep_old_init.h5"]["page"]
    first, last = dumps["relu_dying_step1.h5"]["id"], dumps["relu_dying_step5.h5"]["id"]
    return {
        "shelf": "/",
        "survey": survey,
        "close-up": survey + "/layers/1",
        "unit-card": survey + "/layers/1/units/3",
        "compare": f"/compare?dump={first}&dump={last}",
        "checks-help": "/help/checks",
        "error": "/dumps/no-such-dump",
    }


def open_page(browser, width: int):
    """A page at ``width`` (a desktop height, or a phone's 844 at phone widths) that collects
    its script errors in ``page.errors``."""
    page = browser.new_page(viewport={"width": width, "height": 900 if width > 600 else 844})
    page.errors = []
    page.on("pageerror", lambda error: page.errors.append(str(error)))
    return page


def shoot(page, name: str) -> Path:
    """A full-page screenshot in tests/artifacts/web-<name>.png, for a person to look at."""
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / f"web-{name}.png"
    page.screenshot(path=str(path), full_page=True)
    return path


def wait_for_charts(page, timeout: float = 30_000) -> None:
    """Until every chart on the page is drawn (actdoc.js marks each with data-drawn)."""
    page.wait_for_function(
        "() => [...document.querySelectorAll('.chart[data-figure]')]"
        ".every(el => el.dataset.drawn === 'yes' && el.querySelector('svg.main-svg'))",
        timeout=timeout)


#: Installed before any page script: records Content-Security-Policy violations and every
#: window.open call, so a test can assert there were none.
WATCH_SCRIPT = """
window.__cspViolations = [];
window.__opened = [];
document.addEventListener('securitypolicyviolation', e =>
  window.__cspViolations.push(e.violatedDirective + ' ' + e.blockedURI));
window.open = function (url) { window.__opened.push(String(url)); return null; };
"""
