"""Total inputs far past the saturation edge get an asinh z axis labelled in z; ordinary ones
keep a plain axis. Checked on the JSON twins of a dump written with actdoc's writer."""

from __future__ import annotations

import math

import numpy as np
import pytest

from actdoc.io.writer import write_dump
from actdoc.web import create_app
from tests.support.web import post_file, wait_until_done

SAMPLES = 200
#: Tanh saturates where |tanh z| > 0.99 (the default level): |z| > atanh(0.99) = ln(199) / 2
#: ~ 2.6467 (the identity atanh x = ln((1 + x) / (1 - x)) / 2, Abramowitz & Stegun 4.6.22).
TANH_EDGE = math.log(199) / 2


def asinh(x: float) -> float:
    """asinh x = ln(x + sqrt(x^2 + 1)) (Abramowitz & Stegun 4.6.20), written out rather than
    taken from numpy, which the figures use."""
    return math.copysign(math.log(abs(x) + math.sqrt(x * x + 1)), x)


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    """One app for the module: the dump is analysed once, every test reads its pages."""
    return create_app(tmp_path_factory.mktemp("wide-workspace")).test_client()


@pytest.fixture(scope="module")
def wide_and_narrow(client, tmp_path_factory):
    rng = np.random.default_rng(5)
    # Inputs up to about +-5000, as from unscaled raw features: far past 20 x the edge.
    wide = (rng.standard_normal((SAMPLES, 6)) * 2000.0).astype(np.float32)
    narrow = rng.standard_normal((SAMPLES, 6)).astype(np.float32)
    path = write_dump(tmp_path_factory.mktemp("wide") / "wide.h5", {
        "wide": {"activation": "tanh", "preact": wide, "output": np.tanh(wide)},
        "narrow": {"activation": "tanh", "preact": narrow, "output": np.tanh(narrow)}})
    dump_id = post_file(client, path).get_json()["id"]
    assert wait_until_done(client, dump_id)["status"] == "ready"
    return dump_id, wide


def inputs_figure(client, url: str) -> dict:
    twin = client.get(f"{url}?format=json").get_json()
    return twin["figures"].get("inputs") or twin["figures"]["preact"]


def test_wide_layer_has_an_asinh_axis_with_ticks_in_z(client, wide_and_narrow):
    dump_id, _ = wide_and_narrow
    figure = inputs_figure(client, f"/dumps/{dump_id}/layers/0")
    axis = figure["layout"]["xaxis"]
    assert "asinh" in axis["title"]["text"]
    assert axis["tickmode"] == "array"
    ticks = dict(zip(axis["ticktext"], axis["tickvals"]))
    for text, z in (("0", 0.0), ("1k", 1e3), ("−1k", -1e3)):
        assert math.isclose(ticks[text], asinh(z / 0.05), abs_tol=1e-9), text
    assert len(ticks) <= 11
    # The saturated bands start at the tanh edge, placed on the same axis.
    bands = [s for s in figure["layout"]["shapes"] if s.get("legendgroup") == "saturated"]
    inner = sorted(min((s["x0"], s["x1"]), key=abs) for s in bands)
    assert np.allclose(inner, [-asinh(TANH_EDGE / 0.05), asinh(TANH_EDGE / 0.05)])
    # The curve is tanh of z, drawn at asinh(z / 0.05).
    curve = figure["data"][1]
    z = np.asarray(curve["customdata"], dtype=float)
    assert np.allclose(curve["y"], np.tanh(z), atol=1e-6)
    assert np.allclose(curve["x"], [asinh(v / 0.05) for v in z])


def test_wide_layer_bars_are_counts_of_equally_wide_bins(client, wide_and_narrow):
    dump_id, _ = wide_and_narrow
    bars = inputs_figure(client, f"/dumps/{dump_id}/layers/0")["data"][0]
    widths = np.asarray(bars["width"], dtype=float)
    counts = np.asarray(bars["customdata"], dtype=float)
    # The engine's bins are even steps of asinh(z / 0.05): equally wide on this axis, so a
    # bar's height is its count and, the widths being equal, its area is proportional to it.
    assert np.allclose(widths, widths[0])
    assert np.allclose(bars["y"], counts)
    assert counts.sum() == SAMPLES * 6
    assert bars["hovertext"][-1].startswith("z above")  # the outer bin holds the overflow


def test_unit_card_of_a_wide_unit_bins_evenly_on_the_asinh_axis(client, wide_and_narrow):
    dump_id, wide = wide_and_narrow
    figure = inputs_figure(client, f"/dumps/{dump_id}/layers/0/units/2")
    assert figure["layout"]["xaxis"]["tickmode"] == "array"
    bars = figure["data"][0]
    assert np.allclose(bars["width"], bars["width"][0])
    assert sum(bars["customdata"]) == SAMPLES
    # numpy.histogram over the same edges, recovered from the bars, as the reference count.
    centres, widths = np.asarray(bars["x"], float), np.asarray(bars["width"], float)
    placed = np.append(centres - widths / 2, centres[-1] + widths[-1] / 2)
    edges = 0.05 * np.sinh(placed)
    edges[[0, -1]] = wide[:, 2].min(), wide[:, 2].max()
    expected, _ = np.histogram(wide[:, 2], bins=edges)
    assert list(bars["customdata"]) == expected.tolist()


def test_narrow_layer_keeps_a_plain_axis_and_zone_names_in_the_legend(client, wide_and_narrow):
    dump_id, _ = wide_and_narrow
    layout = inputs_figure(client, f"/dumps/{dump_id}/layers/1")["layout"]
    axis = layout["xaxis"]
    assert axis["title"]["text"] == "total input z" and "tickvals" not in axis
    # The view holds both saturation edges (at 1.5 x the edge) on a plain z axis.
    assert axis["range"][0] <= -1.5 * TANH_EDGE + 1e-9 and axis["range"][1] >= 1.5 * TANH_EDGE - 1e-9
    named = sorted(s["name"] for s in layout["shapes"] if s.get("showlegend"))
    assert named == ["near-linear", "saturated"]
    assert not layout.get("annotations")  # no labels on the chart to run into each other
