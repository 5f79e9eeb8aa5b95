"""What a reader sees: axis titles that say what a bar measures, and panels that explain why
they are empty. Checked on the JSON twins and the pages of dumps written with actdoc's writer."""

from __future__ import annotations

import numpy as np

from actdoc.io.writer import write_dump
from tests.support.web import post_file, wait_until_done


def test_uneven_bins_are_labelled_as_a_density_not_per_unit(client, ready_dump):
    # On this dashboard a "unit" is a neuron: "observations per unit" reads as a per-neuron count
    # although the bars are counts divided by bin width (density; common practice for histograms
    # of unequal bins, as numpy.histogram(density=...) documents).
    figures = client.get(f"/dumps/{ready_dump}/layers/0?format=json").get_json()["figures"]
    for name in ("inputs", "outputs"):
        title = figures[name]["layout"]["yaxis"]["title"]["text"]
        assert "per unit" not in title and "bin width" in title, (name, title)
        bars = figures[name]["data"][0]
        edges_width = np.asarray(bars["width"], dtype=float)
        counts = np.asarray(bars["customdata"], dtype=float)
        assert np.allclose(np.asarray(bars["y"], dtype=float), counts / edges_width)


def test_curve_axis_gets_its_own_round_ticks(client, ready_dump):
    # plotly.js syncs an overlaying axis' ticks to the main axis' grid by default, which gives
    # ticks like 1.67, 3.87, 6.07 (seen in a screenshot); "auto" lets it pick round steps.
    layout = client.get(f"/dumps/{ready_dump}/layers/0?format=json").get_json()[
        "figures"]["inputs"]["layout"]
    assert layout["yaxis2"]["tickmode"] == "auto"


def test_a_layer_with_weights_only_says_its_units_were_not_measured(client, tmp_path):
    rng = np.random.default_rng(3)
    z = rng.normal(size=(64, 5)).astype(np.float32)
    path = write_dump(tmp_path / "weights_only.h5", {
        "hidden": {"activation": "relu", "preact": z, "output": np.maximum(z, 0)},
        "head": {"activation": "tanh", "weight": rng.normal(size=(3, 5)).astype(np.float32)}})
    dump_id = post_file(client, path).get_json()["id"]
    assert wait_until_done(client, dump_id)["status"] == "ready"
    unit_page = client.get(f"/dumps/{dump_id}/layers/1/units/0").get_data(as_text=True)
    assert "no finding" not in unit_page
    assert "not measured" in unit_page
    assert "holds no recorded total inputs or outputs" in unit_page
    layer_page = client.get(f"/dumps/{dump_id}/layers/1").get_data(as_text=True)
    assert "holds no recorded total inputs or outputs" in layer_page


def test_a_spike_at_zero_does_not_flatten_the_rest_of_the_outputs(client, ready_dump):
    # ReLU outputs max(0, z) put every negative input at exactly 0 (common practice); in the
    # planted layer that is most observations, in one narrow bin. On a linear axis the other
    # bars shrink to nothing (seen in a screenshot), so the axis turns logarithmic.
    layout = client.get(f"/dumps/{ready_dump}/layers/0?format=json").get_json()[
        "figures"]["outputs"]["layout"]
    assert layout["yaxis"]["type"] == "log"
    assert "log" in layout["yaxis"]["title"]["text"]
    # The planted logistic layer has no such spike: its axis stays linear.
    other = client.get(f"/dumps/{ready_dump}/layers/1?format=json").get_json()[
        "figures"]["outputs"]["layout"]
    assert other["yaxis"].get("type", "linear") == "linear"
