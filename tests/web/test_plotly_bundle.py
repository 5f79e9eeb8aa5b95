"""plotly.js as served: only the trace types actdoc draws are registered, every figure of the demo
pages stays within them, and a bundle that does not read as expected is served whole.

The cut follows plotly.js's own "partial bundles" (plotly.js dist/README.md, from memory: the same
library with fewer trace modules registered); the registered set is read back from plotly.js
itself (``Plotly.PlotSchema.get().traces``) in the browser.
"""

from __future__ import annotations

import json
import logging
import re

import numpy as np

from actdoc.web.assets import plotly_js_path, served_plotly
from actdoc.web.plotly_bundle import DRAWN_TRACES, trimmed_bundle
from actdoc.web.unitmap import density_trace

FIGURE_BLOCK = re.compile(r'<script type="application/json" id="figure-[^"]*">(.*?)</script>',
                          re.S)


def installed_bundle() -> str:
    return plotly_js_path().read_text(encoding="utf-8")


def test_the_installed_bundle_is_cut_only_in_its_trace_list():
    source = installed_bundle()
    trimmed = trimmed_bundle(source)
    assert trimmed is not None, "the installed plotly.js is no longer recognised"
    lists = re.findall(r"\.register\(\[[^\]]*\]\)", source)
    cut = re.findall(r"\.register\(\[[^\]]*\]\)", trimmed)
    changed = [(before, after) for before, after in zip(lists, cut) if before != after]
    assert len(changed) == 1
    before, after = changed[0]
    assert after.count("()") == 3 < before.count("()")  # bar, heatmap and the calendars
    start = source.index(before)
    assert trimmed[:start] == source[:start]
    assert trimmed[start + len(after):] == source[start + len(before):]
    assert trimmed.startswith("/**\n* plotly.js v")  # the licence header is untouched


def esbuild_like(entries: dict[str, str], kinds: dict[str, str]) -> str:
    """A small bundle in the shape the installed one has: lazily run modules, an entry per
    trace that runs its index, and one register list."""
    modules = []
    for entry, index in entries.items():
        modules.append(f'var {entry}=W((a,b)=>{{"use strict";b.exports={index}()}});')
    for index, kind in kinds.items():
        module_type, name = kind.split(":")
        modules.append(f'var {index}=W((a,b)=>{{b.exports={{moduleType:"{module_type}",'
                       f'name:"{name}",plot:P()}}}});')
    calls = ",".join(entry + "()" for entry in entries)
    return ("/** header */var W=(e,t)=>()=>t;var P=W((a,b)=>{b.exports=1});"
            + "".join(modules) + f"Plotly.register([{calls}]);")


def trace_bundle(names: list[str]) -> str:
    entries = {f"E{i}": f"I{i}" for i in range(len(names))}
    kinds = {f"I{i}": name for i, name in enumerate(names)}
    return esbuild_like(entries, kinds)


FILLER = [f"trace:t{i}" for i in range(25)]


def test_a_bundle_of_the_expected_shape_keeps_drawn_traces_and_components():
    trimmed = trimmed_bundle(trace_bundle(FILLER + ["trace:bar", "trace:heatmap",
                                                    "component:calendars"]))
    assert trimmed is not None
    assert trimmed.endswith("Plotly.register([E25(),E26(),E27()]);")


def test_bundles_that_do_not_read_as_expected_are_left_whole(caplog):
    unreadable = {
        "no register list": "var Plotly={};",
        "a short list": trace_bundle(["trace:bar", "trace:heatmap"]),
        "heatmap missing": trace_bundle(FILLER + ["trace:bar"]),
        "a trace twice": trace_bundle(FILLER + ["trace:bar", "trace:heatmap", "trace:bar"]),
        "an entry with no kind": trace_bundle(FILLER + ["trace:bar", "trace:heatmap"]).replace(
            'moduleType:"trace",name:"t3"', 'name:"t3"'),
        "an entry never defined": trace_bundle(FILLER + ["trace:bar", "trace:heatmap"]).replace(
            "var E4=", "var X4="),
    }
    for why, source in unreadable.items():
        assert trimmed_bundle(source) is None, why
    with caplog.at_level(logging.WARNING, logger="actdoc"):
        assert served_plotly(b"var Plotly={};") is None
    assert "serving all of it" in caplog.text


def page_figures(html: str) -> list[dict]:
    return [json.loads(block) for block in FIGURE_BLOCK.findall(html)]


def demo_pages(client) -> list[str]:
    """Every Survey, Close-up and Compare page of the demo, and three Unit cards a layer."""
    dumps = client.get("/api/dumps").get_json()
    pages = ["/compare?" + "&".join(f"dump={dump['id']}" for dump in dumps
                                    if dump["name"].startswith("relu_dying"))]
    for dump in dumps:
        survey = dump["page"]
        pages.append(survey)
        html = client.get(survey).get_data(as_text=True)
        for layer in sorted(set(re.findall(re.escape(survey) + r"/layers/\d+(?=\")", html))):
            pages.append(layer)
            units = sorted(set(re.findall(re.escape(layer) + r"/units/\d+(?=\")",
                                          client.get(layer).get_data(as_text=True))))
            pages.extend(units[:: max(1, len(units) // 3)][:3])
    return pages


def test_every_demo_figure_uses_only_the_registered_traces(demo_app):
    client = demo_app.test_client()
    used: dict[str, str] = {}
    measured_labels = []
    pages = demo_pages(client)
    assert sum("/units/" in page for page in pages) >= 10
    for page in pages:
        answer = client.get(page)
        assert answer.status_code == 200, page
        for figure in page_figures(answer.get_data(as_text=True)):
            for trace in figure["data"]:
                used.setdefault(trace.get("type", "scatter"), page)
            measured_labels += [(page, key) for key, axis in figure["layout"].items()
                                if key[1:5] == "axis" and axis.get("ticklabeloverflow") != "allow"]
    assert set(used) <= DRAWN_TRACES, used
    # The list is no longer than needed: the demo draws scatter and bar; the heatmap is the
    # density under the unit map of a layer too wide to draw every unit (none in the demo).
    assert set(used) == {"scatter", "bar"}
    wide = np.random.default_rng(0).normal(size=(2, 5000))
    assert density_trace(*wide)["type"] == "heatmap"
    # No axis has plotly.js measure its tick labels one by one (docs/dashboard.md, page load).
    assert measured_labels == []


def test_the_browser_registers_exactly_the_drawn_traces_and_draws_every_chart(browser,
                                                                              demo_url):
    page = browser.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda error: errors.append(str(error)))
    page.on("console", lambda message: message.type in ("error", "warning")
            and errors.append(message.text))
    try:
        page.goto(demo_url + "/")
        survey = page.locator("a[href^='/dumps/']").first.get_attribute("href")
        page.goto(demo_url + survey)
        page.wait_for_function("() => [...document.querySelectorAll('.chart[data-figure]')]"
                               ".every(el => el.dataset.drawn === 'yes')")
        registered = page.evaluate("Object.keys(Plotly.PlotSchema.get().traces).sort()")
    finally:
        page.close()
    assert registered == sorted(DRAWN_TRACES)
    assert errors == []
