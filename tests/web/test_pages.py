"""The pages and their JSON twins, checked against numpy, scipy and the planted dump."""

from __future__ import annotations

import json
import math

import numpy as np
from scipy.special import logit

from actdoc.model import CAVEAT
from actdoc.web.embed import embed_json
from actdoc.web.plotly_bundle import trimmed_bundle
from tests.support.web import DEAD_UNITS, SAMPLES, planted_layers


def test_home_lists_dumps_with_verdicts_and_an_upload_area(client, ready_dump):
    page = client.get("/")
    assert page.status_code == 200
    html = page.get_data(as_text=True)
    assert 'type="file"' in html and 'id="dropzone"' in html and "planted.h5" in html
    twin = client.get("/?format=json").get_json()
    assert twin["dumps"][0]["verdicts"]["critical"] >= 1


def test_overview_shows_layers_charts_findings_downloads_and_the_caveat(client, ready_dump):
    html = client.get(f"/dumps/{ready_dump}").get_data(as_text=True)
    for part in ("hidden1", "hidden2", "readout", "findings.csv", "findings.md",
                 "findings.json", 'id="figure-depth"', 'id="figure-signal"',
                 "/plotly.min.js", "Read with care"):
        assert part in html, part
    assert CAVEAT.split(":")[0] in html
    twin = client.get(f"/dumps/{ready_dump}?format=json").get_json()
    assert [layer["name"] for layer in twin["layers"]] == ["hidden1", "hidden2", "readout"]
    assert twin["top_findings"][0]["severity"] == "critical"
    assert twin["caveat"] == CAVEAT
    dead_share = twin["layers"][0]["fractions"]["dead"]
    assert math.isclose(dead_share, len(DEAD_UNITS) / 24)


def test_layer_page_marks_the_saturated_and_near_linear_zones(client, ready_dump):
    twin = client.get(f"/dumps/{ready_dump}/layers/1?format=json").get_json()
    figure = twin["figures"]["inputs"]
    bands = sorted((s["x0"], s["x1"]) for s in figure["layout"]["shapes"])
    # Logistic saturation edges at +-logit(0.99) = +-ln 99 (scipy) for the 0.01 margin.
    edges = [x for band in bands for x in band if abs(abs(x) - logit(0.99)) < 1e-9]
    assert len(edges) == 2
    # Near-linear zone: s(1-s) >= 0.9 * 0.25 gives |z| <= 2 atanh(sqrt(0.1)) ~ 0.655
    # (from the logistic derivative s' = s(1-s); value 0.655 from memory, checked here).
    linear = [band for band in bands if band[0] < 0 < band[1] and band[1] < 1]
    assert len(linear) == 1
    assert math.isclose(linear[0][1], 2 * math.atanh(math.sqrt(0.1)), rel_tol=1e-9)
    assert abs(linear[0][1] - 0.655) < 1e-3
    curve = figure["data"][1]
    z, y = np.array(curve["x"]), np.array(curve["y"])
    from scipy.special import expit
    assert np.allclose(y, expit(z), atol=1e-6)


def test_unit_table_sorts_filters_and_pages_on_the_server(client, ready_dump):
    url = f"/dumps/{ready_dump}/layers/0"
    table = client.get(f"{url}?format=json&sort=active_fraction&per_page=5").get_json()["units"]
    assert table["total"] == 24 and table["pages"] == 5 and len(table["rows"]) == 5
    assert [row["unit"] for row in table["rows"]] == list(DEAD_UNITS[:5])
    assert all(row["active_fraction"] == 0 for row in table["rows"])
    last = client.get(f"{url}?format=json&sort=active_fraction&per_page=5&page=99").get_json()
    assert last["units"]["page"] == 5 and len(last["units"]["rows"]) == 4
    desc = client.get(f"{url}?format=json&sort=active_fraction&order=desc").get_json()["units"]
    shares = [row["active_fraction"] for row in desc["rows"]]
    assert shares == sorted(shares, reverse=True)
    dead = client.get(f"{url}?format=json&state=dead").get_json()["units"]
    assert [row["unit"] for row in dead["rows"]] == list(DEAD_UNITS)
    assert client.get(f"{url}?page=two").status_code == 400
    html = client.get(url).get_data(as_text=True)
    assert html.count('<tr>') <= 60 and "Unit roster" in html and 'id="figure-unit_map"' in html


def test_unit_page_reads_the_units_own_column(client, ready_dump):
    z = planted_layers()["hidden2"]["preact"][:, 0]
    twin = client.get(f"/dumps/{ready_dump}/layers/1/units/0?format=json").get_json()
    bars = twin["figures"]["preact"]["data"][0]
    counts, edges = np.histogram(z, bins=len(bars["y"]))  # numpy as the reference
    assert bars["y"] == counts.tolist()
    assert np.allclose(bars["x"], (edges[:-1] + edges[1:]) / 2, rtol=1e-5)
    assert sum(bars["y"]) == SAMPLES
    assert twin["state"] == "saturated"
    assert any(f["check"] == "saturated" for f in twin["findings"])
    w = planted_layers()["hidden2"]["weight"][0]
    assert math.isclose(twin["weights"]["norm"], float(np.linalg.norm(w)), rel_tol=1e-5)
    html = client.get(f"/dumps/{ready_dump}/layers/1/units/0").get_data(as_text=True)
    assert "Unit card" in html and "Read with care" in html


def test_out_of_range_layers_and_units_are_404(client, ready_dump):
    assert client.get(f"/dumps/{ready_dump}/layers/9").status_code == 404
    response = client.get(f"/dumps/{ready_dump}/layers/0/units/24?format=json")
    assert response.status_code == 404
    assert "24 units" in response.get_json()["error"]


def test_plotly_comes_from_the_installed_package(client):
    """The installed plotly package's plotly.min.js, cut only in its trace list
    (actdoc.web.plotly_bundle; tests/web/test_plotly_bundle.py checks the cut)."""
    import plotly

    response = client.get("/assets/plotly.min.js")
    assert response.status_code == 200
    shipped = (plotly.__path__[0] + "/package_data/plotly.min.js")
    with open(shipped, encoding="utf-8") as handle:
        assert response.data == trimmed_bundle(handle.read()).encode("utf-8")
    response.close()


def test_embedded_json_cannot_close_its_script_block():
    tricky = {"name": "</script><script>alert(1)</script>", "sep": "a\u2028b\u2029c & d",
              "nan": float("nan")}
    text = str(embed_json(tricky))
    for forbidden in ("<", ">", "&", "\u2028", "\u2029"):
        assert forbidden not in text
    back = json.loads(text)
    assert back["name"] == tricky["name"] and back["sep"] == tricky["sep"]
    assert back["nan"] is None
