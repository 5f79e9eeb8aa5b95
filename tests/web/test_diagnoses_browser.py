"""The probe panel, the gradient chart, related-finding links and the new roster columns in a
real headless Chromium at 1440 and 390 px. Screenshots land in tests/artifacts/ as
diagnoses-<name>-<width>.png for a person to look at.

References: the gradient dump is recorded by actdoc.capture from a PyTorch 2.13 CPU model
(tests/support/diagnoses.py); the demo tanh_raw_inputs.h5 feeds raw features (docs/demo.md).
"""

from __future__ import annotations

import threading
from pathlib import Path

import pytest

from actdoc.web import create_app
from tests.support.browser import open_page
from tests.support.web import post_file, wait_until_done

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parents[2] / "tests" / "artifacts"
DEMO = Path(__file__).resolve().parents[2] / "demo_models" / "dumps"
WIDTHS = (1440, 390)


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    pytest.importorskip("torch", reason="PyTorch records the gradient dump (extra 'torch')")
    import waitress

    from tests.support.diagnoses import gradient_dump

    folder = tmp_path_factory.mktemp("diagnoses-browser")
    app = create_app(folder / "ws")
    client = app.test_client()
    ids = {}
    for path in (gradient_dump(folder)[0], DEMO / "tanh_raw_inputs.h5"):
        response = post_file(client, path)
        assert response.status_code == 201, response.get_json()
        assert wait_until_done(client, response.get_json()["id"], 300)["status"] == "ready"
        ids[path.name] = response.get_json()["id"]
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.effective_port}", ids
    server.close()


def shoot(locator, name: str, width: int) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    locator.screenshot(path=str(ARTIFACTS / f"diagnoses-{name}-{width}.png"))


def within_width(page, selector: str) -> None:
    """The panel does not reach past the window: no sideways scrolling from it."""
    box = page.locator(selector).bounding_box()
    assert box["x"] >= 0 and box["x"] + box["width"] <= page.viewport_size["width"] + 1


@pytest.mark.parametrize("width", WIDTHS)
def test_gradient_chart_probe_panel_and_related_links(browser, site, width):
    base, ids = site
    page = open_page(browser, width)
    page.goto(f"{base}/dumps/{ids['deep_logistic_grad.h5']}")
    page.wait_for_selector("#chart-gradient svg.main-svg", timeout=30_000)
    legend = page.locator("#chart-gradient .legendtext").all_text_contents()
    assert "gradient RMS" in legend and any("gradient fading" in name for name in legend)
    numbers = page.locator("#gradient-flow details")
    assert not page.locator("#gradient-flow table.gradients").is_visible()
    numbers.locator("summary").click()
    assert page.locator("#gradient-flow table.gradients tbody tr").count() == 9
    for panel in ("#gradient-flow", "#probe"):
        within_width(page, panel)
    shoot(page.locator("#gradient-flow"), "gradient", width)
    shoot(page.locator("#probe"), "probe-grad", width)

    related = page.locator("p.related a").first
    target = related.get_attribute("href").split("#", 1)[1]
    related.click()
    page.wait_for_url(f"**/layers/*#{target}")
    block = page.locator(f"#{target}")
    box = block.bounding_box()
    assert -2 <= box["y"] < page.viewport_size["height"]    # the linked finding is in view
    assert page.errors == []
    page.close()


@pytest.mark.parametrize("width", WIDTHS)
def test_probe_findings_and_saturated_side(browser, site, width):
    base, ids = site
    page = open_page(browser, width)
    page.goto(f"{base}/dumps/{ids['tanh_raw_inputs.h5']}")
    panel = page.locator("#probe")
    assert panel.locator(".chip", has_text="inputs not standardised").count() == 1
    within_width(page, "#probe")
    shoot(panel, "probe", width)
    page.locator(".finding a", has_text="probe batch").first.click()
    page.wait_for_url("**#probe")
    page.goto(f"{base}/dumps/{ids['tanh_raw_inputs.h5']}/layers/0")
    headers = page.locator("table.units thead th").all_text_contents()
    assert any("saturated side" in h for h in headers)
    assert page.locator("table.units tbody td", has_text="low").count() > 0
    shoot(page.locator("#units"), "roster-sides", width)
    assert page.errors == []
    page.close()


WCAG_21_AA = ["wcag2a", "wcag2aa", "wcag21a", "wcag21aa"]


@pytest.mark.parametrize("width", WIDTHS)
def test_axe_finds_no_wcag_21_violation_in_the_new_panels(browser, site, width):
    """axe-core (Deque, bundled in axe-playwright-python) with the WCAG 2.1 A and AA rules on
    the pages that carry the probe panel, the gradient chart and its table (folded open), the
    related links and the new roster columns."""
    from axe_playwright_python.sync_playwright import Axe

    base, ids = site
    grad, tanh = ids["deep_logistic_grad.h5"], ids["tanh_raw_inputs.h5"]
    page = open_page(browser, width)
    found = {}
    for path in (f"/dumps/{grad}", f"/dumps/{grad}/layers/0", f"/dumps/{grad}/layers/0/units/3",
                 f"/dumps/{tanh}", f"/dumps/{tanh}/layers/0"):
        page.goto(base + path)
        if page.locator(".chart").count():
            page.wait_for_selector(".chart svg.main-svg", timeout=30_000)
        page.evaluate("document.querySelectorAll('main details').forEach(d => d.open = true)")
        results = Axe().run(page, options={"runOnly": {"type": "tag", "values": WCAG_21_AA}})
        if results.violations_count:
            found[path] = results.generate_report()
    page.close()
    assert not found, "\n".join(f"{path}: {report}" for path, report in found.items())
