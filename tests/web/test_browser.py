"""The dashboard in a real headless Chromium: upload, wait, survey, close-up, unit card; and in
demo mode the Shelf's demo notes, the Drift page over the demo checkpoints, and the Survey
screenshot the README shows.

Screenshots of each page land in tests/artifacts/ for a person to look at. With
ACTDOC_UPDATE_SCREENSHOTS=1 the README's image, docs/img/overview.png, is written afresh.
"""

from __future__ import annotations

import os

import pytest

from actdoc.web import create_app
from tests.support.browser import REPO, serve_in_thread, shoot

pytestmark = pytest.mark.browser

DOCS_IMAGE = REPO / "docs" / "img" / "overview.png"


@pytest.fixture(scope="module")
def live_url(tmp_path_factory):
    yield from serve_in_thread(create_app(tmp_path_factory.mktemp("live-workspace")))


def roster_fits(page) -> bool:
    """The unit roster needs no sideways scrolling: the table is no wider than its box."""
    return page.evaluate("""() => {
        const table = document.querySelector('table.units');
        return table.scrollWidth <= table.parentElement.clientWidth;
    }""")


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
    assert roster_fits(page)
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


def test_demo_shelf_drift_page_and_the_readme_survey(browser, demo_url):
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    errors: list[str] = []
    page.on("pageerror", lambda error: errors.append(str(error)))

    page.goto(demo_url + "/")
    assert page.locator(".demo-note", has_text="Units dying step by step").count() == 5
    button = page.locator("#drift-button")
    assert button.is_disabled()
    shoot(page, "shelf-demo")
    # Tick two dumps by hand: the button comes alive and opens the Drift page over both.
    page.check('input[aria-label="compare relu_dying_step1.h5"]')
    page.check('input[aria-label="compare relu_dying_step5.h5"]')
    button.click()
    page.wait_for_url("**/compare?*")
    assert page.locator("table.drift thead th.num").count() == 2

    page.goto(demo_url + "/")
    page.click("text=compare the demo checkpoints")
    page.wait_for_url("**/compare?*")
    assert "hidden2" in chart_title(page, "layer-1")
    labels = page.locator("table.drift thead th.num").all_text_contents()
    assert labels == ["step1", "step2", "step3", "step4", "step5"]
    # docs/demo.md: the dead share of the second layer climbs from one unit to about half.
    dead_row = page.locator("table.drift tbody", has_text="hidden2").locator(
        "tr", has_text="dead").first.locator("td.num").all_text_contents()
    assert dead_row[0].startswith("1.6%") and dead_row[-1].startswith("52%")
    assert page.locator(".changes li", has_text="became dead").count() >= 4
    shoot(page, "drift")

    page.goto(demo_url + "/")
    page.click("text=logistic_deep_old_init.h5")
    page.wait_for_url("**/dumps/*")
    assert "Share of units in each check" in chart_title(page, "depth")
    chart_title(page, "signal")
    if os.environ.get("ACTDOC_UPDATE_SCREENSHOTS") == "1":
        DOCS_IMAGE.parent.mkdir(parents=True, exist_ok=True)
        page.screenshot(path=str(DOCS_IMAGE), full_page=True)
    shoot(page, "survey-demo")

    page.click("table.layers >> text=hidden4")
    page.wait_for_url("**/layers/*")
    chart_title(page, "inputs")
    assert roster_fits(page)
    shoot(page, "close-up-logistic")
    assert errors == []
    page.close()


def boxes_overlap(a: dict, b: dict) -> bool:
    return not (a["x"] + a["width"] <= b["x"] or b["x"] + b["width"] <= a["x"]
                or a["y"] + a["height"] <= b["y"] or b["y"] + b["height"] <= a["y"])


def test_wide_inputs_close_up_reads_in_z_with_separate_zone_names(browser, demo_url):
    # The demo's raw-input tanh layer reaches about +-10^4, thousands of times its saturation
    # edge atanh(0.99) ~ 2.65: the chart switches to an asinh axis labelled in z.
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    page.goto(demo_url + "/")
    page.click("text=tanh_raw_inputs.h5")
    page.wait_for_url("**/dumps/*")
    page.click("table.layers >> text=hidden1")
    page.wait_for_url("**/layers/*")
    assert "Total inputs of hidden1" in chart_title(page, "inputs")
    chart = page.locator("#chart-inputs")
    ticks = chart.locator(".xtick text").all_text_contents()
    assert {"−10k", "−1", "0", "1", "10k"} <= set(ticks), ticks
    assert "asinh" in chart.locator(".g-xtitle").text_content()
    texts = [chart.locator(".legend .legendtext", has_text=name).first
             for name in ("saturated", "near-linear")]
    boxes = [text.bounding_box() for text in texts]
    boxes.append(chart.locator(".g-xtitle").bounding_box())
    assert not any(boxes_overlap(a, b) for i, a in enumerate(boxes) for b in boxes[i + 1:])
    shoot(page, "close-up-wide-inputs")
    page.close()
