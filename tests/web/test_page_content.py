"""What the pages say and draw: unit cards, finding rosters, unit maps, legends and ticks, the
explanations, the Shelf's order, and pages that stay whole for hostile or huge dumps.

References: the planted arrays through numpy (numpy.percentile, numpy.histogram) and scipy
(scipy.special.expit, the logistic; scipy.special.logit(0.99) = ln 99, its saturation edge for
the default margin, docs/checks.md). A ReLU unit whose total input never exceeds 0 never fires
(dead; common practice).
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
from scipy.special import expit, logit

from actdoc.io.writer import write_dump
from actdoc.web import create_app, looks
from actdoc.web.ticks import log_axis, percent_axis
from actdoc.web.unitmap import MAX_POINTS
from tests.support.web import DEAD_UNITS, SATURATED_UNITS, planted_layers, post_file, wait_until_done


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    return create_app(tmp_path_factory.mktemp("content-workspace")).test_client()


def upload(client, path) -> str:
    response = post_file(client, path)
    assert response.status_code == 201, response.get_json()
    body = wait_until_done(client, response.get_json()["id"], timeout=300)
    assert body["status"] == "ready", body
    return body["id"]


@pytest.fixture(scope="module")
def planted(client, tmp_path_factory) -> str:
    return upload(client, write_dump(tmp_path_factory.mktemp("p") / "planted.h5",
                                     planted_layers()))


def twin(client, url: str) -> dict:
    response = client.get(url + ("&" if "?" in url else "?") + "format=json")
    assert response.status_code == 200, response.get_json()
    return response.get_json()


# --- unit cards -------------------------------------------------------------------------------

def test_a_saturated_units_histogram_fills_the_view_with_the_curve_over_it(client, planted):
    z = planted_layers()["hidden2"]["preact"][:, SATURATED_UNITS[0]].astype(float)
    figure = twin(client, f"/dumps/{planted}/layers/1/units/{SATURATED_UNITS[0]}")[
        "figures"]["preact"]
    low, high = figure["layout"]["xaxis"]["range"]
    assert low <= z.min() and high >= z.max()
    # The inputs sit near 12, far past ln 99 ~ 4.6: they fill the view, not a pixel of it.
    assert (z.max() - z.min()) / (high - low) >= 0.25
    assert z.min() > logit(0.99)
    curve = figure["data"][1]
    x = np.asarray(curve["x"], dtype=float)
    assert x.min() <= z.min() and x.max() >= z.max()  # drawn across the inputs
    assert np.allclose(curve["y"], expit(x), atol=1e-6)
    bars = figure["data"][0]
    counts, _ = np.histogram(z, bins=len(bars["y"]))  # numpy as the reference
    assert bars["y"] == counts.tolist()


def test_a_dead_unit_says_how_far_below_zero_its_total_input_stays(client, planted):
    unit = DEAD_UNITS[0]
    z = planted_layers()["hidden1"]["preact"][:, unit].astype(np.float64)
    data = twin(client, f"/dumps/{planted}/layers/0/units/{unit}")
    inputs = data["inputs"]
    assert math.isclose(inputs["max"], z.max(), rel_tol=1e-12)
    assert math.isclose(inputs["mean"], z.mean(), rel_tol=1e-9)
    for p, value in inputs["percentiles"].items():
        assert math.isclose(value, np.percentile(z, float(p)), rel_tol=1e-9), p
    assert inputs["above_zero"] == 0 and math.isclose(inputs["gap_below_zero"], -z.max())
    html = client.get(f"/dumps/{planted}/layers/0/units/{unit}").get_data(as_text=True)
    assert "Never above zero" in html and f"{-z.max():.3g}" in html


def test_state_chips_take_their_colour_and_shape_from_the_look_table(client, planted):
    dead = client.get(f"/dumps/{planted}/layers/0/units/{DEAD_UNITS[0]}").get_data(as_text=True)
    saturated = client.get(f"/dumps/{planted}/layers/1/units/{SATURATED_UNITS[0]}").get_data(
        as_text=True)
    assert 'class="chip look look-dead"' in dead and looks.look("dead").glyph in dead
    assert 'class="chip look look-saturated"' in saturated
    css = client.get("/looks.css").get_data(as_text=True)
    assert f".look-dead {{ --look: {looks.look('dead').colour}; }}" in css
    assert looks.look("dead").colour != looks.look("saturated").colour
    # A check the table does not know still gets a label from its id and a whole look.
    new = looks.look("wobbly_units")
    assert new.label == "wobbly units" and new.colour and new.symbol and new.glyph


def test_this_units_number_says_what_it_is(client, planted):
    html = client.get(f"/dumps/{planted}/layers/1/units/{SATURATED_UNITS[0]}").get_data(
        as_text=True)
    assert "this unit: " not in html
    assert "this unit's share of observations saturated (both sides together): 100.0%" in html
    assert "(limit 95.0%)" in html


def test_unit_cards_step_to_the_previous_and_next_flagged_unit(client, planted):
    units = twin(client, f"/dumps/{planted}/layers/0?per_page=500")["units"]["rows"]
    flagged = [row["unit"] for row in units if row["state"]]
    assert flagged == list(DEAD_UNITS)
    middle = twin(client, f"/dumps/{planted}/layers/0/units/{flagged[3]}")["neighbours"]
    assert middle["previous_flagged"] == flagged[2] and middle["next_flagged"] == flagged[4]
    after = twin(client, f"/dumps/{planted}/layers/0/units/{flagged[-1] + 2}")["neighbours"]
    assert after["previous_flagged"] == flagged[-1] and after["next_flagged"] is None
    html = client.get(f"/dumps/{planted}/layers/0/units/{flagged[3]}").get_data(as_text=True)
    assert "previous flagged" in html and "next flagged" in html


def test_a_constant_unit_of_magnitude_1e16_gets_a_card(client, tmp_path):
    # At 1e16 the float64 spacing is 2 (numpy.spacing), so +-0.5 around the value rounds back
    # to it and numpy.histogram cannot make 60 bins: the card used to answer 500.
    rng = np.random.default_rng(4)
    z = rng.normal(size=(50, 4))
    z[:, 0] = 1e16
    z[:, 1] = -3e17
    z[:, 2] = 1e16 + 2 * np.arange(50)  # one ulp apart
    z[:, 3] = np.where(np.arange(50) % 2, 1e308, -1e308)  # a span past the largest float
    dump = upload(client, write_dump(tmp_path / "huge.h5", {
        "huge": {"activation": "tanh", "preact": z, "output": np.tanh(z)}}))
    for unit in range(4):
        page = client.get(f"/dumps/{dump}/layers/0/units/{unit}")
        assert page.status_code == 200, unit
        bars = twin(client, f"/dumps/{dump}/layers/0/units/{unit}")["figures"]["preact"][
            "data"][0]
        assert sum(bars["customdata"]) == 50, unit
        assert all(math.isfinite(x) for x in bars["x"])


# --- from a finding to its units --------------------------------------------------------------

def test_a_findings_unit_count_opens_the_roster_of_those_units(client, planted):
    html = client.get(f"/dumps/{planted}").get_data(as_text=True)
    assert f'href="/dumps/{planted}/layers/0?finding=dead#units">13 units</a>' in html
    roster = twin(client, f"/dumps/{planted}/layers/0?finding=dead")["units"]
    assert [row["unit"] for row in roster["rows"]] == list(DEAD_UNITS)
    assert roster["total"] == len(DEAD_UNITS) and roster["finding"] == "dead"
    page = client.get(f"/dumps/{planted}/layers/0?finding=dead").get_data(as_text=True)
    assert "Showing the 13 units the <strong>dead</strong> finding names" in page
    assert "show all 24" in page
    # A check with no finding in the layer leaves the roster whole.
    assert twin(client, f"/dumps/{planted}/layers/0?finding=saturated")["units"]["total"] == 24


def test_the_unit_map_separates_units_at_one_place_and_marks_states_by_shape(client, planted):
    figure = twin(client, f"/dumps/{planted}/layers/0")["figures"]["unit_map"]
    dead = next(t for t in figure["data"] if t["name"] == "dead")
    # Every dead unit has active share 0 and spread 0 (planted); drawn, no two coincide.
    assert all(row[1] == 0 and row[2] == 0 for row in dead["customdata"])
    points = set(zip(dead["x"], dead["y"]))
    assert len(points) == len(DEAD_UNITS)
    symbols = {t["name"]: t["marker"]["symbol"] for t in figure["data"]}
    assert len(set(symbols.values())) == len(symbols)
    assert sorted(row[0] for row in dead["customdata"]) == list(DEAD_UNITS)


def test_legends_use_labels_and_single_series_charts_have_none(client, planted, tmp_path):
    rng = np.random.default_rng(2)
    z = rng.normal(size=(200, 8))
    z[:, 0] = 9.0 + 0.01 * rng.normal(size=200)
    z[:, 1] = np.where(rng.random(200) < 0.5, -9.0, 9.0)  # two-valued: near binary
    one = upload(client, write_dump(tmp_path / "binary.h5", {
        "sq": {"activation": "logistic", "preact": z, "output": expit(z)}}))
    depth = twin(client, f"/dumps/{one}")["figures"]["depth"]
    names = [trace["name"] for trace in depth["data"]]
    assert "near_binary" not in names and all("_" not in name for name in names)
    if len(names) == 1:
        assert depth["layout"]["showlegend"] is False
    healthy = upload(client, write_dump(tmp_path / "calm.h5", {
        "calm": {"activation": "tanh", "preact": 0.8 * rng.normal(size=(300, 6)),
                 "output": np.tanh(0.8 * rng.normal(size=(300, 6)))}}))
    data = twin(client, f"/dumps/{healthy}")
    if not any(layer["fractions"].get(c) for layer in data["layers"] for c in data["checks"]):
        assert data["figures"]["depth"] is None
        html = client.get(f"/dumps/{healthy}").get_data(as_text=True)
        assert "nothing to chart" in html and 'id="figure-depth"' not in html
    signal = data["figures"]["signal"]
    assert signal["layout"]["showlegend"] == (len(signal["data"]) > 1)


@pytest.mark.parametrize("top", [0.003, 0.02, 0.05, 0.12, 0.5, 1.0])
def test_percent_ticks_never_repeat_a_label(top):
    axis = percent_axis(top)
    decimals = int(axis["tickformat"][1:-1])
    ticks = np.arange(0, axis["range"][1] + 1e-12, axis["dtick"])
    labels = [f"{100 * t:.{decimals}f}%" for t in ticks]  # d3's ".N%" formatting
    assert len(labels) == len(set(labels)) and 2 <= len(labels) <= 8, labels


def test_log_axes_are_ticked_at_round_values_only():
    many = log_axis([1e-4, 3e2], "size")
    assert all(math.log10(v).is_integer() for v in many["tickvals"]) and len(many["tickvals"]) <= 8
    narrow = log_axis([0.3, 0.9], "size")
    assert set(narrow["tickvals"]) <= {0.2, 0.5, 1.0} and len(narrow["tickvals"]) <= 7


def test_zone_wording_follows_the_kind_and_layers_are_numbered_one_way(client, planted):
    relu = client.get(f"/dumps/{planted}/layers/0").get_data(as_text=True)
    logistic = client.get(f"/dumps/{planted}/layers/1").get_data(as_text=True)
    assert "Shaded: silent side" in relu and "Shaded: saturated zone" not in relu
    assert "Shaded: saturated zone" in logistic and "near-linear zone" in logistic
    assert "none (" not in relu and "no finding (11)" in relu
    assert "layer 1 of 3" in relu
    survey = client.get(f"/dumps/{planted}").get_data(as_text=True)
    assert ">1 of 3<" in survey and ">3 of 3<" in survey


def test_info_findings_are_listed_on_the_survey(client):
    from demo_models import bundled_dumps

    step5 = next(path for path in bundled_dumps() if path.name == "relu_dying_step5.h5")
    dump = upload(client, step5)
    data = twin(client, f"/dumps/{dump}")
    listed = data["top_findings"] + data["other_findings"]
    assert len(listed) == data["finding_count"]
    info = [f for f in listed if f["severity"] == "info"]
    html = client.get(f"/dumps/{dump}").get_data(as_text=True)
    for finding in info:
        assert finding["summary"].replace("'", "&#39;") in html


# --- explanations ------------------------------------------------------------------------------

def test_pages_explain_the_measures_and_show_the_thresholds_used(client, planted, app_context):
    from flask import render_template

    from actdoc.analysis import analyze
    from actdoc.analysis.defaults import Settings
    from actdoc.io.memory import dump_from_arrays
    from actdoc.web import views

    html = client.get(f"/dumps/{planted}/layers/0").get_data(as_text=True)
    for words in ("gradient gain", "dormant score", "bimodality", "÷ bin width",
                  "Thresholds this analysis used", 'href="/help/checks"'):
        assert words in html, words
    assert "Every threshold is at its default." in html
    # An analysis run with an override (what --set does) shows it as changed.
    findings = analyze(dump_from_arrays(planted_layers()),
                       Settings().replace(dormant_active_share=0.05))
    payload = views.layer_detail(findings, findings.layers[0])
    assert payload["explain"]["changed"] == ["dormant_active_share"]
    row = next(r for r in payload["explain"]["settings"] if r["name"] == "dormant_active_share")
    assert row["value"] == 0.05 and row["default"] != 0.05


@pytest.fixture
def app_context(client):
    with client.application.test_request_context():
        yield


def test_the_checks_help_page_renders_the_document_with_no_link_off_the_machine(client):
    page = client.get("/help/checks")
    assert page.status_code == 200
    html = page.get_data(as_text=True)
    assert "Zones of the transfer functions" in html  # a heading of docs/checks.md
    assert "<table" in html and "logistic_saturation_margin" in html
    for target in re.findall(r'href="([^"]*)"', html):
        assert target.startswith("/") or target.startswith("#"), target


# --- the Shelf ---------------------------------------------------------------------------------

def test_the_shelf_sorts_naturally_searches_and_filters(tmp_path):
    client = create_app(tmp_path / "ws").test_client()
    for step, seed in ((10, 1), (2, 2), (1, 3)):
        upload(client, write_dump(tmp_path / f"run_step{step}.h5", planted_layers(seed=seed)))
    names = [d["name"] for d in twin(client, "/")["dumps"]]
    assert names == ["run_step1.h5", "run_step2.h5", "run_step10.h5"]
    newest = [d["name"] for d in twin(client, "/?sort=newest")["dumps"]]
    assert newest[0] == "run_step1.h5"
    assert [d["name"] for d in twin(client, "/?q=STEP10")["dumps"]] == ["run_step10.h5"]
    assert twin(client, "/?show=healthy")["dumps"] == []
    html = client.get("/?q=nothing-like-this").get_data(as_text=True)
    assert "No dump matches" in html and "0 of 3 dumps shown" in html
    assert 'name="q"' in html and 'name="sort"' in html and 'name="show"' in html


# --- bounded pages and hostile names ----------------------------------------------------------

def test_a_200000_unit_layer_page_stays_small(client, tmp_path):
    units = 200_000
    rng = np.random.default_rng(6)
    z = rng.normal(size=(8, units)).astype(np.float32)
    z[:, : units // 4] -= 30.0  # a quarter never fire: a finding with 50,000 units
    dump = upload(client, write_dump(tmp_path / "wide.h5", {"wide": {
        "activation": "relu", "preact": z, "output": np.maximum(z, 0),
        "weight": rng.normal(size=(units, 3)).astype(np.float32),
        "bias": np.zeros(units, np.float32)}}))
    limit = 2 * 1024 * 1024
    for url in (f"/dumps/{dump}/layers/0", f"/dumps/{dump}/layers/0?format=json",
                f"/dumps/{dump}/layers/0?finding=dead", f"/dumps/{dump}",
                f"/dumps/{dump}/layers/0/units/0"):
        response = client.get(url)
        assert response.status_code == 200 and len(response.data) < limit, (url, len(response.data))
    data = twin(client, f"/dumps/{dump}/layers/0")
    unit_map = data["figures"]["unit_map"]
    drawn = sum(len(t["x"]) for t in unit_map["data"] if t["type"] == "scatter")
    assert drawn <= MAX_POINTS and unit_map["units"] == units
    assert any(t["type"] == "heatmap" for t in unit_map["data"])
    assert data["weights"]["figures"]["norms"]["data"][0]["type"] == "bar"
    assert len(data["weights"]["figures"]["norms"]["data"][0]["x"]) <= 100
    # ReLU is active where z > 0 (common practice): dead units have no positive input.
    dead = int(np.sum((z <= 0).all(axis=0)))
    assert dead >= units // 4
    assert next(f for f in data["findings"] if f["check"] == "dead")["unit_count"] == dead


HOSTILE = ['<a href="https://example.invalid/">click</a>',
           "ansi\x1b[31mred\x1b]8;;https://example.invalid\x07link\nnext\u202eevil"]


@pytest.fixture(scope="module")
def hostile(client, tmp_path_factory) -> str:
    """An NPZ dump whose layer names carry markup and terminal escapes (an NPZ member name may
    hold any character but its last '/', docs/dump-layout.md)."""
    rng = np.random.default_rng(8)
    z = rng.normal(size=(40, 6)).astype(np.float32)
    z[:, :4] -= 20.0
    arrays = {}
    for name in HOSTILE:
        arrays[f"{name}/preact"] = z
        arrays[f"{name}/output"] = np.maximum(z, 0)
    arrays["actdoc_meta"] = np.array(json.dumps(
        {"layers": [{"name": name, "activation": "relu"} for name in HOSTILE]}))
    path = tmp_path_factory.mktemp("hostile") / "hostile.npz"
    np.savez(path, **arrays)
    return upload(client, path)


def chart_strings(value):
    if isinstance(value, str):
        yield value
    elif isinstance(value, dict):
        for item in value.values():
            yield from chart_strings(item)
    elif isinstance(value, list):
        for item in value:
            yield from chart_strings(item)


def test_names_cannot_become_chart_markup_or_terminal_escapes(client, hostile):
    for url in (f"/dumps/{hostile}", f"/dumps/{hostile}/layers/0",
                f"/dumps/{hostile}/layers/1/units/0"):
        figures = twin(client, url)["figures"]
        for text in chart_strings(figures):
            assert "<a" not in text and "\x1b" not in text and "\n" not in text, (url, text)
        html = client.get(url).get_data(as_text=True)
        assert '<a href="https://example.invalid' not in html
        assert "\x1b" not in html and "\u202e" not in html
        if "/layers/0" not in url:
            assert "ansi\\x1b[31mred" in html  # shown as the escape one would type
    depth = twin(client, f"/dumps/{hostile}")["figures"]["depth"]
    assert depth["data"][0]["x"][0] == "&lt;a href=\"https://example.invalid/\"&gt;click&lt;/a&gt;"
    # The JSON twin keeps the names as they are in the file.
    assert [layer["name"] for layer in twin(client, f"/dumps/{hostile}")["layers"]] == HOSTILE
