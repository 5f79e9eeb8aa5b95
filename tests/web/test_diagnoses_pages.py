"""The diagnoses added for real models, where users read them: the probe batch and its findings
on the Survey, gradient RMS across depth, related findings as links, and the new per-unit
measures (saturated side, samples fired on, gradient RMS) in the roster and on the unit card.

References: torch.autograd (PyTorch 2.13 CPU) for every gradient (tests/support/diagnoses.py);
numpy on the stored arrays for the probe's figures (numpy.std, ddof=0) and the per-unit shares;
the saturated zone of tanh is |y| >= tanh_saturation_level (0.99, docs/checks.md); the demo
tanh_raw_inputs.h5 feeds raw, unstandardised features (docs/demo.md).
"""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path

import h5py
import numpy as np
import pytest

from actdoc.web import create_app
from tests.support.diagnoses import RARE_SAMPLES, SPATIAL_SAMPLES, spatial_dump
from tests.support.web import post_file, wait_until_done

DEMO = Path(__file__).resolve().parents[2] / "demo_models" / "dumps"


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    return create_app(tmp_path_factory.mktemp("diagnoses-ws")).test_client()


def upload(client, path: Path) -> str:
    response = post_file(client, path)
    assert response.status_code == 201, response.get_json()
    body = wait_until_done(client, response.get_json()["id"], timeout=300)
    assert body["status"] == "ready", body
    return body["id"]


@pytest.fixture(scope="module")
def grad(client, tmp_path_factory):
    pytest.importorskip("torch", reason="PyTorch records the gradient dump (extra 'torch')")
    from tests.support.diagnoses import gradient_dump

    path, reference = gradient_dump(tmp_path_factory.mktemp("grad"))
    return upload(client, path), reference


@pytest.fixture(scope="module")
def tanh(client):
    return upload(client, DEMO / "tanh_raw_inputs.h5")


@pytest.fixture(scope="module")
def spatial(client, tmp_path_factory):
    path, outputs = spatial_dump(tmp_path_factory.mktemp("spatial"))
    return upload(client, path), outputs


def twin(client, url: str) -> dict:
    response = client.get(url + ("&" if "?" in url else "?") + "format=json")
    assert response.status_code == 200, response.get_json()
    return response.get_json()


class Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.hrefs, self.ids = [], set()

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.add(attrs["id"])
        if tag == "a" and attrs.get("href", "").startswith("/"):
            self.hrefs.append(attrs["href"])


def links(html: str) -> Links:
    parser = Links()
    parser.feed(html)
    return parser


def rms(values: np.ndarray, axis=None) -> np.ndarray:
    return np.sqrt(np.mean(np.asarray(values, dtype=np.float64) ** 2, axis=axis))


# --- the probe batch --------------------------------------------------------------------------

def test_survey_shows_the_probe_batch_and_its_findings(client, tanh):
    data = twin(client, f"/dumps/{tanh}")
    with h5py.File(DEMO / "tanh_raw_inputs.h5", "r") as f:
        x = f["probe/input"][()].astype(np.float64)
    probe = data["probe"]
    assert probe["samples"] == x.shape[0] and probe["features"] == x.shape[1]
    assert probe["feature_std_max"] == pytest.approx(np.std(x, axis=0).max(), rel=1e-6)
    assert probe["feature_abs_mean_max"] == pytest.approx(np.abs(x.mean(axis=0)).max(),
                                                          rel=1e-6)
    checks = {f["check"] for f in probe["findings"]}
    assert {"probe_scale", "probe_size"} <= checks    # raw features, 512 samples (docs/demo.md)
    assert all(f["layer"] == "probe/input" and f["layer_index"] is None and f["probe"]
               for f in probe["findings"])
    html = client.get(f"/dumps/{tanh}").get_data(as_text=True)
    panel = html.split('id="probe"', 1)[1].split("</section>", 1)[0]
    assert "inputs not standardised" in panel and "probe batch too small" in panel
    assert f"{x.shape[0]:,}" in panel
    # the same findings in "Look here first" point at the probe panel, not at a layer
    assert f'href="/dumps/{tanh}#probe">probe batch</a>' in html
    assert "/layers/None" not in html


@pytest.mark.parametrize("fixture", ["tanh", "spatial", "grad"])
def test_every_link_of_every_page_answers(client, request, fixture):
    """A finding whose layer is no model layer (probe/input) must break no page or link."""
    value = request.getfixturevalue(fixture)
    dump_id = value if isinstance(value, str) else value[0]
    layers = twin(client, f"/dumps/{dump_id}")["layers"]
    pages = [f"/dumps/{dump_id}"] + [f"/dumps/{dump_id}/layers/{l['index']}" for l in layers]
    pages += [f"/dumps/{dump_id}/layers/{l['index']}/units/0" for l in layers]
    seen = set()
    for page in pages:
        response = client.get(page)
        assert response.status_code == 200, page
        for href in links(response.get_data(as_text=True)).hrefs:
            target = href.split("#", 1)[0]
            if target in seen or "download=1" in target:
                continue
            seen.add(target)
            assert client.get(target).status_code == 200, (page, href)


# --- gradients --------------------------------------------------------------------------------

def test_gradient_chart_and_numbers_are_torch_autograds(client, grad):
    dump_id, reference = grad
    data = twin(client, f"/dumps/{dump_id}")
    rows = {row["name"]: row for row in data["gradients"]}
    top = rms(reference["layers.8"])
    for name, values in reference.items():
        assert rows[name]["rms"] == pytest.approx(rms(values), rel=1e-5)
        assert rows[name]["ratio"] == pytest.approx(rms(values) / top, rel=1e-5)
    flow = {f["layer"]: f["severity"] for f in data["top_findings"] + data["other_findings"]
            if f["check"] == "gradient_flow"}
    # the limit is 100x (docs/checks.md, gradient_limit); Glorot & Bengio 2010: it fades
    assert flow == {name: rows[name]["finding"] for name in rows if rows[name]["finding"]}
    assert set(flow) == {n for n, v in reference.items() if rms(v) / top < 1 / 100}
    assert "layers.0" in flow
    figure = data["figures"]["gradient"]
    assert figure["data"][0]["y"] == pytest.approx([rms(v) for v in reference.values()],
                                                   rel=1e-5)
    assert figure["layout"]["shapes"][0]["y0"] == pytest.approx(top / 100, rel=1e-5)
    html = client.get(f"/dumps/{dump_id}").get_data(as_text=True)
    panel = html.split('id="gradient-flow"', 1)[1].split("</section>", 1)[0]
    assert "The chart's numbers" in panel and "<table" in panel   # the text alternative
    assert panel.count("<tr>") == 1 + len(reference)
    assert "gradient RMS" in html.split("What the measures mean", 1)[1]


def test_layer_page_and_unit_card_show_gradient_rms(client, grad):
    dump_id, reference = grad
    data = twin(client, f"/dumps/{dump_id}/layers/0")
    assert data["layer"]["gradient_rms"] == pytest.approx(rms(reference["layers.0"]), rel=1e-5)
    assert "gradient_rms" in data["units"]["columns"]
    expected = rms(reference["layers.0"], axis=0)
    for row in data["units"]["rows"]:
        assert row["gradient_rms"] == pytest.approx(expected[row["unit"]], rel=1e-5)
    html = client.get(f"/dumps/{dump_id}/layers/0").get_data(as_text=True)
    assert "gradient RMS (dL/dz)</span>" in html and ">gradient RMS" in html
    card = twin(client, f"/dumps/{dump_id}/layers/0/units/5")
    assert card["row"]["gradient_rms"] == pytest.approx(expected[5], rel=1e-5)
    assert card["labels"]["gradient_rms"] == "gradient RMS"


def test_no_gradient_panel_without_grad(client, tanh):
    data = twin(client, f"/dumps/{tanh}")
    assert data["gradients"] is None and data["figures"]["gradient"] is None
    assert 'id="gradient-flow"' not in client.get(f"/dumps/{tanh}").get_data(as_text=True)
    assert "gradient_rms" not in twin(client, f"/dumps/{tanh}/layers/0")["units"]["columns"]


# --- related findings -------------------------------------------------------------------------

def test_related_findings_link_to_each_other(client, grad, tanh):
    for dump_id in (grad[0], tanh):
        layers = twin(client, f"/dumps/{dump_id}")["layers"]
        linked = 0
        for layer in layers:
            url = f"/dumps/{dump_id}/layers/{layer['index']}"
            data = twin(client, url)
            html = client.get(url).get_data(as_text=True)
            found = links(html)
            checks = {f["check"] for f in data["findings"]}
            for finding in data["findings"]:
                assert {r["check"] for r in finding["related_links"]} == (
                    set(finding["related"]) & checks)
                for link in finding["related_links"]:
                    assert f"{url}#{link['anchor']}" in found.hrefs
                    assert link["anchor"] in found.ids     # the target block is on the page
                    linked += 1
        assert linked > 0


# --- per-unit measures ------------------------------------------------------------------------

def test_roster_shows_the_saturated_side_from_the_stored_outputs(client, tanh):
    with h5py.File(DEMO / "tanh_raw_inputs.h5", "r") as f:
        y = f["layers/hidden1/output"][()].astype(np.float64)
    low, high = np.mean(y <= -0.99, axis=0), np.mean(y >= 0.99, axis=0)
    data = twin(client, f"/dumps/{tanh}/layers/0?per_page=500")
    columns = data["units"]["columns"]
    assert columns.index("saturation_side") == columns.index("high_fraction") + 1
    for row in data["units"]["rows"]:
        unit = row["unit"]
        assert row["low_fraction"] == pytest.approx(low[unit])
        assert row["high_fraction"] == pytest.approx(high[unit])
        if row["state"] == "saturated":
            side = ("low" if low[unit] >= 0.95 else "high" if high[unit] >= 0.95 else "both")
            assert row["saturation_side"] == side
        else:
            assert row["saturation_side"] == ""
    html = client.get(f"/dumps/{tanh}/layers/0").get_data(as_text=True)
    assert ">saturated side" in html
    card = client.get(f"/dumps/{tanh}/layers/0/units/1").get_data(as_text=True)
    assert re.search(r"<dt>saturated side</dt><dd>(low|high|both)</dd>", card)


def test_a_spatial_channel_reports_the_samples_it_fires_on(client, spatial):
    dump_id, y = spatial
    expected = np.mean((y > 0).reshape(SPATIAL_SAMPLES, 4, -1).any(axis=2), axis=0)
    assert expected[0] == pytest.approx(RARE_SAMPLES / SPATIAL_SAMPLES)
    data = twin(client, f"/dumps/{dump_id}/layers/0")
    assert "sample_active_fraction" in data["units"]["columns"]
    for row in data["units"]["rows"]:
        assert row["sample_active_fraction"] == pytest.approx(expected[row["unit"]])
    assert data["units"]["labels"]["sample_active_fraction"] == "samples fired on"
    html = client.get(f"/dumps/{dump_id}/layers/0").get_data(as_text=True)
    assert "samples fired on" in html.split("What the measures mean", 1)[1]
