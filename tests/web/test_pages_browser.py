"""The page content in a real headless Chromium at 1440 and 390 px: unit cards, the roster of
one finding, the Survey, the Shelf's live search and sort, Compare, the checks help page, a
200,000-unit layer and a dump whose names carry markup. Screenshots land in tests/artifacts/
as pages-<name>-<width>.png for a person to look at. The ``browser`` fixture (one Chromium per
session) is in tests/web/conftest.py.

References: the demo scenario (docs/demo.md): relu_dying_step5.h5's second layer has 33 dead
units; logistic_deep_old_init.h5's top layer saturates at the low side (z near -10.5).
"""

from __future__ import annotations

import json
import threading
from pathlib import Path

import numpy as np
import pytest

from actdoc.io.writer import write_dump
from actdoc.web import create_app
from tests.support.browser import open_page
from tests.support.web import post_file, stop_server, wait_until_done

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parents[2] / "tests" / "artifacts"
WIDTHS = (1440, 390)


def hostile_npz(folder: Path) -> Path:
    rng = np.random.default_rng(8)
    z = rng.normal(size=(40, 6)).astype(np.float32)
    z[:, :4] -= 20.0
    names = ['<a href="https://example.invalid/">click</a>', "ansi\x1b[31mred\nnext"]
    arrays = {}
    for name in names:
        arrays[f"{name}/preact"] = z
        arrays[f"{name}/output"] = np.maximum(z, 0)
    arrays["actdoc_meta"] = np.array(json.dumps(
        {"layers": [{"name": name, "activation": "relu"} for name in names]}))
    path = folder / "hostile.npz"
    np.savez(path, **arrays)
    return path


def wide_dump(folder: Path) -> Path:
    units = 200_000
    rng = np.random.default_rng(6)
    z = rng.normal(size=(8, units)).astype(np.float32)
    z[:, : units // 4] -= 30.0
    return write_dump(folder / "wide.h5", {"wide": {
        "activation": "relu", "preact": z, "output": np.maximum(z, 0),
        "weight": rng.normal(size=(units, 3)).astype(np.float32)}})


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """The demo dashboard plus a hostile and a wide dump; yields (base URL, ids by name)."""
    import waitress

    folder = tmp_path_factory.mktemp("pages-browser")
    app = create_app(folder / "ws", demo=True, max_upload_bytes=64 * 2 ** 20)
    client = app.test_client()
    for path in (hostile_npz(folder), wide_dump(folder)):
        assert post_file(client, path).status_code == 201
    ids = {}
    for dump in client.get("/api/dumps").get_json():
        assert wait_until_done(client, dump["id"], timeout=300)["status"] == "ready"
        ids[dump["name"]] = dump["id"]
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.effective_port}", ids
    stop_server(server)


def shoot(page, name: str, width: int) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"pages-{name}-{width}.png"), full_page=True)


def drawn(page, key: str):
    page.wait_for_selector(f"#chart-{key} svg.main-svg", timeout=30_000)
    return page.locator(f"#chart-{key}")


@pytest.mark.parametrize("width", WIDTHS)
def test_unit_cards(browser, site, width):
    base, ids = site
    page = open_page(browser, width)
    page.goto(f"{base}/dumps/{ids['logistic_deep_old_init.h5']}/layers/3/units/0")
    chart = drawn(page, "preact")
    ticks = [t.replace("−", "-") for t in chart.locator(".xtick text").all_text_contents()]
    # The inputs sit near z = -10.5: the ticks follow them, not the curve's edges at +-6.9.
    assert ticks and all(-11.5 <= float(t) <= -9.5 for t in ticks), ticks
    assert page.locator("h1 .chip.look-saturated").count() == 1
    assert "■" in page.locator("h1 .chip").text_content()
    assert page.locator(".unit-nav", has_text="next flagged").count() == 1
    shoot(page, "unit-saturated", width)

    page.goto(f"{base}/dumps/{ids['relu_dying_step1.h5']}/layers/1/units/27")
    drawn(page, "preact")
    assert page.locator("#total-input", has_text="Never above zero").count() == 1
    assert page.locator("h1 .chip.look-dead").count() == 1
    shoot(page, "unit-dead", width)
    assert page.errors == []
    page.close()


@pytest.mark.parametrize("width", WIDTHS)
def test_from_a_finding_to_its_units(browser, site, width):
    base, ids = site
    page = open_page(browser, width)
    page.goto(f"{base}/dumps/{ids['relu_dying_step5.h5']}")
    drawn(page, "depth")
    legend = page.locator("#chart-depth .legendtext").all_text_contents()
    assert legend and all("_" not in name for name in legend)
    shoot(page, "survey", width)
    page.locator(".finding", has_text="hidden2").locator("a", has_text="33 units").first.click()
    page.wait_for_url("**/layers/1?finding=dead#units")
    assert page.locator("table.units tbody tr").count() == 33
    assert page.locator(".filter-note", has_text="show all 64").count() == 1
    unit_map = drawn(page, "unit_map")
    names = unit_map.locator(".legendtext").all_text_contents()
    assert "dead" in names and "no finding" in names
    shoot(page, "close-up-finding", width)
    assert page.errors == []
    page.close()


@pytest.mark.parametrize("width", WIDTHS)
def test_shelf_search_sort_and_compare(browser, site, width):
    base, _ids = site
    page = open_page(browser, width)
    page.goto(base + "/")
    names = [n for n in page.locator("#shelf-rows tr td.dump-cell > a").all_text_contents()
             if n.startswith("relu_dying")]
    assert names == [f"relu_dying_step{i}.h5" for i in range(1, 6)]
    page.fill("#shelf-search", "dying step")
    visible = page.locator("#shelf-rows tr:not([hidden])")
    assert visible.count() == 5
    assert page.locator("#shelf-count").text_content().startswith("5 of")
    page.select_option("#shelf-sort", "worst")
    first = visible.first.locator("td.dump-cell > a").text_content()
    assert first == "relu_dying_step5.h5"  # the only checkpoint with a critical layer
    shoot(page, "shelf", width)
    page.fill("#shelf-search", "")
    page.click("text=compare the demo checkpoints")
    page.wait_for_url("**/compare?*")
    assert page.title().startswith("Compare 5 dumps")
    drawn(page, "layer-1")
    shoot(page, "compare", width)
    page.goto(base + "/help/checks")
    assert page.locator("#document h3", has_text="Zones of the transfer functions").count() == 1
    shoot(page, "help-checks", width)
    assert page.errors == []
    page.close()


def test_a_wide_layer_and_hostile_names_render(browser, site):
    base, ids = site
    page = open_page(browser, 1440)
    page.goto(f"{base}/dumps/{ids['wide.h5']}/layers/0")
    drawn(page, "unit_map")
    assert page.locator("#chart-unit_map .scatterlayer .point").count() <= 4000
    shoot(page, "wide-layer", 1440)

    page.goto(f"{base}/dumps/{ids['hostile.npz']}")
    chart = drawn(page, "depth")
    assert chart.locator("svg a").count() == 0  # no live link inside the chart
    ticks = "".join(chart.locator(".xtick text").all_text_contents())
    assert '<a href="https://example.invalid/">click</a>' in ticks
    assert "\x1b" not in page.content()
    shoot(page, "hostile-names", 1440)
    assert page.errors == []
    page.close()
