"""The dashboard in a real headless Chromium: upload, wait, survey, close-up, unit card.

Screenshots of each page land in tests/artifacts/ for a person to look at.
"""

from __future__ import annotations

import os
import shutil
import threading
from pathlib import Path

import pytest

from actdoc.web import create_app

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parents[1] / "artifacts"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]


def no_browser(reason: str):
    if os.environ.get("CI"):
        pytest.fail(f"browser tests need chromium in CI: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def browser():
    executable = shutil.which("chromium")
    if executable is None:
        no_browser("no 'chromium' on PATH (Debian: apt-get install chromium)")
    from playwright.sync_api import Error, sync_playwright

    with sync_playwright() as playwright:
        try:
            launched = playwright.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS)
        except Error as error:
            no_browser(f"chromium did not start: {error.message.splitlines()[0]}")
        yield launched
        launched.close()


@pytest.fixture(scope="module")
def live_url(tmp_path_factory):
    import waitress

    app = create_app(tmp_path_factory.mktemp("live-workspace"))
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.effective_port}"
    server.close()


def shoot(page, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"web-{name}.png"), full_page=True)


def chart_title(page, key: str) -> str:
    """A drawn chart's title: plotly writes it as SVG text."""
    page.wait_for_selector(f"#chart-{key} svg.main-svg", timeout=20_000)
    return page.locator(f"#chart-{key} .gtitle").first.text_content()


def test_upload_then_survey_close_up_and_unit_card(browser, live_url, planted_dump):
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    errors: list[str] = []
    page.on("pageerror", lambda error: errors.append(str(error)))

    page.goto(live_url + "/")
    page.set_input_files("#file-input", str(planted_dump))
    page.wait_for_url("**/dumps/*", timeout=20_000)
    # The survey shows a progress bar, polls, and reloads itself when the analysis is done.
    assert "Share of units in each check" in chart_title(page, "depth")
    assert "Output scale" in chart_title(page, "signal")
    assert page.locator(".finding").count() >= 2
    shoot(page, "survey")

    page.click("table.layers >> text=hidden2")
    page.wait_for_url("**/layers/1")
    assert "Total inputs of hidden2" in chart_title(page, "inputs")
    assert "Unit map" in chart_title(page, "unit_map")
    assert page.locator("table.units tbody tr").count() == 16
    shoot(page, "close-up")

    point = page.locator("#chart-unit_map .scatterlayer .point").first
    point.scroll_into_view_if_needed()
    box = point.bounding_box()  # plotly takes clicks on its drag layer above the points
    page.mouse.click(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    page.wait_for_url("**/layers/1/units/*", timeout=10_000)
    assert "total inputs under f(z)" in chart_title(page, "preact")
    assert "outputs" in chart_title(page, "output")
    shoot(page, "unit-card")

    page.goto(live_url + "/")
    assert page.locator("table.dumps .chip.critical").count() == 1
    shoot(page, "shelf")
    page.goto(live_url + "/dumps/nothing-here")
    assert page.locator(".error-page").count() == 1
    shoot(page, "not-found")
    assert errors == []
    page.close()
