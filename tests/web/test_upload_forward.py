"""Uploaded weight-only checkpoints get the forward pass the command line gives them.

scikit-learn's MLPClassifier is trained on its bundled digits (load_digits) with plain SGD at a
high learning rate, which silences ReLU units (as in tests/reference/test_sklearn_forward.py).
Its ``coefs_``/``intercepts_`` are saved as a weights-only dump (docs/contract.md sections 1-2:
weights, biases and declared kinds, no activations) with the inputs as ``/probe/input``. Uploaded
to the dashboard, the confined child must run the forward pass over that probe as
``actdoc analyze`` does: the same findings document, and dead units exactly the units
scikit-learn's own hidden activations (``MLPClassifier._forward_pass``, what ``predict`` uses)
leave at zero on every sample. The upload read limits still bound what the file may declare.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

sklearn = pytest.importorskip("sklearn", reason="scikit-learn is the reference here")

from actdoc.cli import main  # noqa: E402
from actdoc.io.limits import ReadLimits  # noqa: E402
from actdoc.io.writer import write_dump, write_npz  # noqa: E402
from actdoc.web import create_app  # noqa: E402
from tests.support.digits import train_dying_relu_mlp  # noqa: E402
from tests.support.web import post_file, wait_until_done  # noqa: E402

NAMES = ("hidden1", "hidden2", "out")


@pytest.fixture(scope="module")
def trained():
    clf, X, activations = train_dying_relu_mlp()
    return clf, X, activations


def weights_only_layers(clf) -> dict:
    """scikit-learn keeps coefs_[i] as [fan_in, units]; the dump layout wants [units, fan_in].
    The read-out is stored as linear (its z are the logits softmax is applied to)."""
    kinds = ("relu", "relu", "linear")
    return {name: {"activation": kind, "weight": np.ascontiguousarray(w.T), "bias": b}
            for name, kind, w, b in zip(NAMES, kinds, clf.coefs_, clf.intercepts_)}


@pytest.fixture(params=["h5", "npz"])
def checkpoint(request, trained, tmp_path):
    clf, X, _ = trained
    path = tmp_path / f"digits_mlp.{request.param}"
    writer = write_dump if request.param == "h5" else write_npz
    return writer(path, weights_only_layers(clf), probe_input=X)


def test_an_uploaded_checkpoint_gets_the_findings_of_the_command_line(
        trained, checkpoint, tmp_path, capsys):
    _, X, activations = trained
    assert main(["analyze", str(checkpoint), "--format", "json"]) == 0
    plain = json.loads(capsys.readouterr().out)

    client = create_app(tmp_path / "ws").test_client()
    done = wait_until_done(client, post_file(client, checkpoint).get_json()["id"], timeout=120)
    assert done["status"] == "ready", done["error"]
    assert done["layers"] == 3 and done["samples"] == X.shape[0]
    uploaded = client.get(f"/api/dumps/{done['id']}/findings.json").get_json()
    assert uploaded == plain

    silenced = False
    for name, acts in zip(NAMES, activations[1:3]):
        silent = sorted(np.flatnonzero((acts > 0).sum(axis=0) == 0).tolist())
        dead = [f["units"] for f in uploaded["findings"]
                if f["layer"] == name and f["check"] == "dead"]
        assert dead == ([silent] if silent else [])
        silenced = silenced or bool(silent)
        layer = next(entry for entry in uploaded["layers"] if entry["name"] == name)
        assert "forward pass over the dump's /probe/input" in layer["activation_note"]
    assert silenced  # the high learning rate did silence units (else the test proves little)


def test_the_upload_read_limits_still_bound_a_checkpoint(trained, tmp_path):
    """The probe of 1797 x 64 float64 inputs is a 920 KB member: past a 100 KB member limit
    the readers refuse the file before any forward pass runs."""
    clf, X, _ = trained
    path = write_npz(tmp_path / "digits_mlp.npz", weights_only_layers(clf), probe_input=X)
    client = create_app(tmp_path / "ws",
                        read_limits=ReadLimits(member_bytes=100_000)).test_client()
    done = wait_until_done(client, post_file(client, path).get_json()["id"], timeout=120)
    assert done["status"] == "failed"
    assert done["error"].startswith("digits_mlp.npz") and "100000 bytes" in done["error"]
