"""The Compare page (formerly Drift) and its JSON twin, the Shelf's picker and its demo notes.

References come from the planted arrays through numpy: a ReLU unit whose total input is never
positive never fires (dead; common practice), so the units that "became dead" between two dumps
are a set difference of those computed straight from the arrays.
"""

from __future__ import annotations

import math

import numpy as np
from markupsafe import escape

from actdoc.io.writer import write_dump
from actdoc.web import create_app
from actdoc.web.drift import short_labels
from actdoc.web.embed import first_sentence
from tests.support.web import DEAD_UNITS, planted_layers, post_file, wait_until_done

#: Units of hidden1 planted dead in the later checkpoint on top of DEAD_UNITS.
NEWLY_DEAD = (15, 18, 22)


def upload_ready(client, path) -> str:
    response = post_file(client, path)
    assert response.status_code == 201, response.get_json()
    assert wait_until_done(client, response.get_json()["id"])["status"] == "ready"
    return response.get_json()["id"]


def later_layers() -> dict:
    """The planted layers with more units of hidden1 pushed below zero on every sample."""
    layers = planted_layers(seed=8)
    z1 = layers["hidden1"]["preact"]
    z1[:, list(NEWLY_DEAD)] -= 12.0
    layers["hidden1"]["output"] = np.maximum(z1, 0)
    return layers


def never_positive(z: np.ndarray) -> set[int]:
    return set(np.flatnonzero(~(z > 0).any(axis=0)).tolist())


def test_drift_page_shows_shares_and_changed_units(client, tmp_path):
    early_layers, late_layers = planted_layers(seed=7), later_layers()
    early = upload_ready(client, write_dump(tmp_path / "ckpt2.h5", early_layers))
    late = upload_ready(client, write_dump(tmp_path / "ckpt10.h5", late_layers))
    # Given in the wrong order: the page puts ckpt2 before ckpt10 (natural name order).
    twin = client.get(f"/drift?dump={late}&dump={early}&format=json").get_json()
    assert [d["name"] for d in twin["dumps"]] == ["ckpt2.h5", "ckpt10.h5"]
    assert twin["labels"] == ["ckpt2", "ckpt10"]

    dead_before = never_positive(early_layers["hidden1"]["preact"])
    dead_after = never_positive(late_layers["hidden1"]["preact"])
    assert dead_before == set(DEAD_UNITS) and dead_after == dead_before | set(NEWLY_DEAD)
    changes = twin["steps"][0]["changes"]
    became_dead = [c for c in changes if c["layer"] == "hidden1" and c["after"] == "dead"
                   and c["before"] is None]
    assert len(became_dead) == 1 and set(became_dead[0]["units"]) == dead_after - dead_before
    assert became_dead[0]["sentence"] == "hidden1: 3 units became dead: 15, 18, 22"

    hidden1 = twin["layers"][0]
    dead_row = next(row for row in hidden1["rows"] if row["check"] == "dead")
    assert dead_row["counts"] == [len(dead_before), len(dead_after)]
    assert math.isclose(dead_row["shares"][1], len(dead_after) / 24)
    assert hidden1["figure"]["data"][0]["y"] == dead_row["shares"]
    assert twin["comparison"]["layers"][0]["checks"]["dead"]["counts"] == dead_row["counts"]

    html = client.get(f"/compare?dump={early},{late}").get_data(as_text=True)
    assert "Compare 2 dumps" in html and 'id="figure-layer-0"' in html
    # The page's earlier address still answers with the same page.
    assert client.get(f"/drift?dump={early},{late}").get_data(as_text=True) == html
    assert "became dead" in html and f"/dumps/{late}/layers/0/units/15" in html
    assert "Read with care" in html


def test_drift_refuses_what_it_cannot_compare(client, ready_dump, tmp_path):
    fewer = planted_layers(seed=3)
    fewer.pop("readout")
    other = upload_ready(client, write_dump(tmp_path / "two_layers.h5", fewer))
    response = client.get(f"/drift?dump={ready_dump}&dump={other}&format=json")
    assert response.status_code == 400
    assert response.get_json()["error"] == ("planted.h5 and two_layers.h5 cannot be compared: "
                                            "layer 'readout' is in planted.h5 but not in "
                                            "two_layers.h5")
    page = client.get(f"/drift?dump={ready_dump}&dump={other}")
    assert page.status_code == 400 and "cannot be compared" in page.get_data(as_text=True)
    one = client.get(f"/drift?dump={ready_dump}&dump={ready_dump}&format=json")
    assert one.status_code == 400
    assert one.get_json()["error"] == "pick at least two ready dumps to compare; got 1"
    assert client.get(f"/drift?dump={ready_dump}&dump=nothing").status_code == 404


def test_shelf_offers_ready_dumps_for_comparison(client, ready_dump):
    html = client.get("/").get_data(as_text=True)
    assert 'id="drift-form"' in html and 'action="/compare"' in html
    assert f'name="dump" value="{ready_dump}" form="drift-form"' in html
    assert "compare the demo checkpoints" not in html


def test_demo_shelf_shows_titles_and_links_the_checkpoint_series(workspace_dir):
    from demo_models import DEMOS

    client = create_app(workspace_dir, demo=True).test_client()
    shelf = client.get("/?format=json").get_json()
    for dump in shelf["dumps"]:
        demo = next(d for d in DEMOS if dump["name"] in d.files)
        assert dump["demo"]["title"] == demo.title
        assert dump["demo"]["checkpoint"] == demo.files.index(dump["name"]) + 1
    html = client.get("/").get_data(as_text=True)
    assert str(escape(DEMOS[0].description)) in html  # the whole description, not a sentence
    [series] = shelf["demo_series"]
    for dump in shelf["dumps"]:
        wait_until_done(client, dump["id"])
    twin = client.get(series["url"] + "&format=json").get_json()
    assert [d["name"] for d in twin["dumps"]] == [f"relu_dying_step{i}.h5" for i in range(1, 6)]
    # docs/demo.md: the dead share of the second layer climbs from one unit to about half.
    hidden2 = next(layer for layer in twin["layers"] if layer["name"] == "hidden2")
    dead = next(row for row in hidden2["rows"] if row["check"] == "dead")["counts"]
    assert dead[0] == 1 and 0.4 <= dead[-1] / hidden2["units"] <= 0.6
    assert dead == sorted(dead)


def test_labels_drop_the_shared_prefix_and_sentences_end_at_the_first_stop():
    assert short_labels(["run_step1.h5", "run_step2.h5"]) == ["step1", "step2"]
    assert short_labels(["a.h5", "b.npz"]) == ["a", "b"]
    # Cutting would make two labels alike: keep the stems; alike stems get their position.
    assert short_labels(["net_a.h5", "net_a.npz"]) == ["net_a (1)", "net_a (2)"]
    assert short_labels(["run_1.h5", "run_1.npz", "run_2.h5"]) == [
        "run_1 (1)", "run_1 (2)", "run_2 (3)"]
    assert short_labels(["x_1.h5", "y_1.h5"]) == ["x_1", "y_1"]
    assert first_sentence("Rate 1e-3 for 0.5 epochs. Then more.") == "Rate 1e-3 for 0.5 epochs."
    assert first_sentence("No stop here") == "No stop here"
