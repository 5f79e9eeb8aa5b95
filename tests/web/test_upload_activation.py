"""An upload declares activation kinds: the multipart field ``activation`` of POST /api/dumps
(docs/dashboard.md, "HTTP API additions"), in the command line's ``--activation`` syntax.

scikit-learn's MLPClassifier is trained on its bundled digits (load_digits) with plain SGD at a
high learning rate, which silences ReLU units (as in tests/reference/test_sklearn_forward.py).
Its ``coefs_``/``intercepts_`` are saved as a state-dict NPZ (docs/contract.md section 3) with
the inputs as ``probe/input``. A state dict says nothing of its kinds, so without the field every
layer is linear; uploaded with ``activation=relu`` the confined child must give the findings
document of ``actdoc analyze FILE --activation relu``, whose dead units are exactly the units
scikit-learn's own hidden activations (``MLPClassifier._forward_pass``) never lift above 0.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

sklearn = pytest.importorskip("sklearn", reason="scikit-learn is the reference here")

from actdoc.cli import main  # noqa: E402
from actdoc.web import create_app  # noqa: E402
from tests.support.digits import train_dying_relu_mlp  # noqa: E402
from tests.support.web import wait_until_done  # noqa: E402

NAMES = ("hidden1", "hidden2", "out")


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    clf, X, activations = train_dying_relu_mlp()
    # scikit-learn keeps coefs_[i] as [fan_in, units]; a state dict holds [units, fan_in].
    arrays = {"probe/input": X}
    for name, w, b in zip(NAMES, clf.coefs_, clf.intercepts_):
        arrays[f"{name}.weight"] = np.ascontiguousarray(w.T)
        arrays[f"{name}.bias"] = b
    path = tmp_path_factory.mktemp("statedict") / "digits_state.npz"
    with open(path, "wb") as handle:
        np.savez(handle, **arrays)
    return path, activations


def upload(client, path, *kinds):
    with open(path, "rb") as handle:
        return client.post("/api/dumps", data={"file": (handle, path.name),
                                               "activation": list(kinds)},
                           content_type="multipart/form-data")


def command_line(path, capsys, *options) -> dict:
    assert main(["analyze", str(path), *options, "--format", "json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_declared_kinds_give_the_findings_of_the_command_line(trained, tmp_path, capsys):
    path, activations = trained
    plain = command_line(path, capsys, "--activation", "relu")
    client = create_app(tmp_path / "ws").test_client()
    answer = upload(client, path, "relu")
    assert answer.status_code == 201
    assert answer.get_json()["activation"] == ["relu"]
    done = wait_until_done(client, answer.get_json()["id"], timeout=120)
    assert done["status"] == "ready", done["error"]
    assert done["activation"] == ["relu"]
    uploaded = client.get(f"/api/dumps/{done['id']}/findings.json").get_json()
    assert uploaded == plain
    assert [layer["activation"] for layer in uploaded["layers"]] == ["relu", "relu", "linear"]
    for name, acts in zip(NAMES, activations[1:3]):
        silent = sorted(np.flatnonzero((acts > 0).sum(axis=0) == 0).tolist())
        assert silent  # the high learning rate did silence units (else the test proves little)
        dead = [f["units"] for f in uploaded["findings"]
                if f["layer"] == name and f["check"] == "dead"]
        assert dead == [silent]


def test_layer_kinds_in_one_field_or_many_equal_the_repeated_option(trained, tmp_path, capsys):
    """``relu, hidden2=tanh`` in one field is ``--activation relu --activation hidden2=tanh``."""
    path, _ = trained
    plain = command_line(path, capsys, "--activation", "relu", "--activation", "hidden2=tanh")
    client = create_app(tmp_path / "ws").test_client()
    done = wait_until_done(client, upload(client, path, "relu, hidden2=tanh").get_json()["id"],
                           timeout=120)
    assert done["status"] == "ready", done["error"]
    assert done["activation"] == ["relu", "hidden2=tanh"]
    uploaded = client.get(f"/api/dumps/{done['id']}/findings.json").get_json()
    assert uploaded == plain
    assert [layer["activation"] for layer in uploaded["layers"]] == ["relu", "tanh", "linear"]


def test_without_the_field_a_state_dict_is_linear(trained, tmp_path, capsys):
    path, _ = trained
    plain = command_line(path, capsys)
    client = create_app(tmp_path / "ws").test_client()
    done = wait_until_done(client, upload(client, path).get_json()["id"], timeout=120)
    assert done["status"] == "ready", done["error"]
    assert done["activation"] == []
    uploaded = client.get(f"/api/dumps/{done['id']}/findings.json").get_json()
    assert uploaded == plain
    assert {layer["activation"] for layer in uploaded["layers"]} == {"linear"}


@pytest.mark.parametrize("kinds, words", [
    (("rectifier",), "unknown activation 'rectifier'"),
    (("hidden1=softmaxx",), "unknown activation 'softmaxx'"),
    (("relu", "tanh"), "the field 'activation' gives more than one kind for every layer"),
])
def test_an_invalid_kind_is_a_400_with_one_sentence_and_nothing_stored(trained, tmp_path, kinds,
                                                                       words):
    path, _ = trained
    app = create_app(tmp_path / "ws")
    client = app.test_client()
    answer = upload(client, path, *kinds)
    assert answer.status_code == 400
    error = answer.get_json()["error"]
    assert error.startswith("digits_state.npz") and words in error and "\n" not in error
    workspace = app.extensions["actdoc"].workspace
    assert workspace.list() == []
    assert list((workspace.root / "tmp").iterdir()) == []


def test_a_layer_the_file_does_not_hold_fails_the_dump_with_the_readers_sentence(trained,
                                                                                tmp_path):
    path, _ = trained
    client = create_app(tmp_path / "ws").test_client()
    done = wait_until_done(client, upload(client, path, "hidden9=relu").get_json()["id"],
                           timeout=120)
    assert done["status"] == "failed"
    assert done["error"] == ("digits_state.npz, layer 'hidden9': an activation kind was declared "
                             "for a layer the dump does not hold; its layers are hidden1, "
                             "hidden2, out")


def test_the_same_bytes_with_other_kinds_are_a_409_and_the_stored_dump_stays(trained, tmp_path):
    path, _ = trained
    app = create_app(tmp_path / "ws")
    client = app.test_client()
    first = upload(client, path, "relu").get_json()
    assert wait_until_done(client, first["id"], timeout=120)["status"] == "ready"
    stored = client.get(f"/api/dumps/{first['id']}/findings.json").get_data()

    other = upload(client, path, "tanh")
    assert other.status_code == 409
    assert other.get_json()["error"] == (
        "digits_state.npz: these bytes are already on the shelf, analysed with relu; delete "
        "that dump first to analyse them with tanh")
    page = client.post("/upload", data={"file": (open(path, "rb"), path.name),
                                        "activation": "hidden1=tanh"},
                       content_type="multipart/form-data", headers={"Accept": "text/html"})
    assert page.status_code == 409 and "already on the shelf" in page.get_data(as_text=True)

    for kinds in (("relu",), ()):  # the stored kinds, or none: the stored dump
        again = upload(client, path, *kinds)
        assert again.status_code == 201 and again.get_json()["duplicate"] is True
        assert again.get_json()["id"] == first["id"]
    assert [record.id for record in app.extensions["actdoc"].workspace.list()] == [first["id"]]
    assert client.get(f"/api/dumps/{first['id']}/findings.json").get_data() == stored


def test_a_catalog_from_before_the_field_gains_it_empty(tmp_path):
    """A catalog written before kinds were stored (no ``activations`` column) opens with every
    dump's kinds empty, as they were uploaded."""
    import sqlite3

    from actdoc.workspace.catalog import Catalog

    path = tmp_path / "catalog.sqlite3"
    with sqlite3.connect(path) as db:
        db.execute("CREATE TABLE dumps (id TEXT PRIMARY KEY, name TEXT NOT NULL, sha256 TEXT "
                   "NOT NULL UNIQUE, size INTEGER NOT NULL, format TEXT NOT NULL, status TEXT "
                   "NOT NULL, progress REAL NOT NULL DEFAULT 0, error TEXT, created REAL NOT "
                   "NULL, layers INTEGER NOT NULL DEFAULT 0, samples INTEGER NOT NULL DEFAULT 0, "
                   "critical INTEGER, warning INTEGER, healthy INTEGER)")
        db.execute("INSERT INTO dumps (id, name, sha256, size, format, status, created) "
                   "VALUES ('a1', 'old.h5', 'ab', 10, 'hdf5', 'queued', 0)")
    db.close()
    record = Catalog(path).get("a1")
    assert record.activations == () and record.to_dict()["activation"] == []


def test_an_uploaded_safetensors_state_dict_says_so(trained, tmp_path, capsys):
    """The dump object's and the findings' ``format`` name the reader that opened the file
    (docs/dashboard.md): ``safetensors`` here, with its ``probe.input`` run as the probe."""
    save_file = pytest.importorskip("safetensors.numpy").save_file
    npz, _ = trained
    with np.load(npz) as arrays:
        tensors = {("probe.input" if key == "probe/input" else key): np.ascontiguousarray(value)
                   for key, value in arrays.items()}
    path = tmp_path / "digits_state.safetensors"
    save_file(tensors, str(path))
    plain = command_line(path, capsys, "--activation", "relu")
    client = create_app(tmp_path / "ws").test_client()
    answer = upload(client, path, "relu")
    assert answer.status_code == 201 and answer.get_json()["format"] == "safetensors"
    done = wait_until_done(client, answer.get_json()["id"], timeout=120)
    assert done["status"] == "ready", done["error"]
    uploaded = client.get(f"/api/dumps/{done['id']}/findings.json").get_json()
    assert uploaded == plain and uploaded["source"]["format"] == "safetensors"
    assert uploaded["source"]["samples"] == 1797  # load_digits holds 1797 images
