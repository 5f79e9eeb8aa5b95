"""The forward pass of weight-only checkpoints against scikit-learn's own MLPClassifier.

scikit-learn's MLPClassifier is trained on its bundled digits (load_digits) with plain SGD at a
high learning rate, which silences many ReLU units while the network still classifies well.
Its ``coefs_`` and ``intercepts_`` are saved as a state dict (safetensors via the safetensors
package's numpy ``save_file``, and NPZ as docs/contract.md section 3 describes), the inputs as a
``.npy`` probe. actdoc's forward pass must reproduce scikit-learn's own hidden activations
(``MLPClassifier._forward_pass``, the function ``predict`` uses) and its softmax outputs
(``predict_proba``, public), and actdoc's dead units must be exactly the units scikit-learn's
activations leave at zero on every sample.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

sklearn = pytest.importorskip("sklearn", reason="scikit-learn is the reference here")

from actdoc.analysis import analyze  # noqa: E402
from actdoc.cli import main  # noqa: E402
from actdoc.forward import with_forward_pass  # noqa: E402
from actdoc.io import open_dump  # noqa: E402
from tests.support.digits import train_dying_relu_mlp  # noqa: E402


@pytest.fixture(scope="module")
def trained():
    clf, X, activations = train_dying_relu_mlp()
    return clf, X, activations


def state_dict(clf) -> dict[str, np.ndarray]:
    # scikit-learn stores coefs_[i] as [fan_in, units]; the state-dict layout is [units, fan_in]
    names = ["hidden1", "hidden2", "out"]
    out = {}
    for name, w, b in zip(names, clf.coefs_, clf.intercepts_):
        out[f"{name}.weight"] = np.ascontiguousarray(w.T)
        out[f"{name}.bias"] = b
    return out


@pytest.fixture(params=["safetensors", "npz"])
def checkpoint(request, trained, tmp_path):
    clf, X, _ = trained
    path = tmp_path / f"mlp.{request.param}"
    if request.param == "safetensors":
        from safetensors.numpy import save_file

        save_file(state_dict(clf), str(path))
    else:
        with open(path, "wb") as handle:
            np.savez(handle, **state_dict(clf))
    np.save(tmp_path / "probe.npy", X)
    return path, tmp_path / "probe.npy"


def test_forward_pass_reproduces_sklearn(trained, checkpoint):
    clf, X, activations = trained
    path, probe = checkpoint
    with open_dump(path, activations=["relu"]) as dump:
        forward = with_forward_pass(dump, probe=probe)
        try:
            assert forward.samples == X.shape[0]
            for layer, expected in zip(forward.layers[:2], activations[1:3]):
                y = np.concatenate([b[1].copy() for b in layer.paired_blocks(500)])
                np.testing.assert_allclose(y, expected, rtol=1e-12, atol=1e-12)
            z = np.concatenate([b[0].copy() for b in forward.layers[2].paired_blocks(500)])
            softmax = np.exp(z - z.max(axis=1, keepdims=True))
            softmax /= softmax.sum(axis=1, keepdims=True)
            np.testing.assert_allclose(softmax, clf.predict_proba(X), rtol=1e-10, atol=1e-12)
            findings = analyze(forward, digest=False)
        finally:
            forward.close()
    for name, acts in zip(("hidden1", "hidden2"), activations[1:3]):
        silent = set(np.flatnonzero((acts > 0).sum(axis=0) == 0).tolist())
        dead = {u for f in findings.for_layer(name) if f.check == "dead" for u in f.units}
        assert dead == silent
    assert silent  # the high learning rate did silence units (else the test proves little)


def test_command_line_probe_gives_the_same_dead_sets(trained, checkpoint, capsys):
    _, _, activations = trained
    path, probe = checkpoint
    assert main(["analyze", str(path), "--activation", "relu", "--probe", str(probe),
                 "--format", "json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["source"]["samples"] == activations[0].shape[0]
    for name, acts in zip(("hidden1", "hidden2"), activations[1:3]):
        silent = sorted(np.flatnonzero((acts > 0).sum(axis=0) == 0).tolist())
        dead = [f["units"] for f in document["findings"]
                if f["layer"] == name and f["check"] == "dead"]
        assert dead == [silent]
        layer = next(entry for entry in document["layers"] if entry["name"] == name)
        assert "forward pass over the probe file probe.npy" in layer["activation_note"]


def test_probe_in_a_confined_child_gives_the_same_document(checkpoint, capsys):
    """--time-limit runs the forward pass in the child process: the same findings document."""
    path, probe = checkpoint
    common = ["analyze", str(path), "--activation", "relu", "--probe", str(probe), "--format",
              "json"]
    assert main(common) == 0
    plain = json.loads(capsys.readouterr().out)
    assert main(common + ["--time-limit", "300"]) == 0
    confined = json.loads(capsys.readouterr().out)
    assert confined == plain


def test_synthetic_probe_is_loud(trained, checkpoint, capsys):
    path, _ = checkpoint
    assert main(["analyze", str(path), "--activation", "relu", "--synthetic-probe", "300",
                 "--format", "json"]) == 0
    captured = capsys.readouterr()
    assert "WARNING" in captured.err and "SYNTHETIC" in captured.err
    document = json.loads(captured.out)
    assert document["source"]["samples"] == 300
    assert all("SYNTHETIC" in layer["activation_note"] for layer in document["layers"])


@pytest.mark.parametrize("args, message", [
    (["--probe", "missing.npy"], "no such probe file"),
    (["--probe", "narrow.npy"], "takes 64 inputs but the probe file narrow.npy gives 10"),
    (["--probe", "probe.npy", "--synthetic-probe", "10"], "not both"),
])
def test_probe_errors_are_one_sentence(checkpoint, capsys, monkeypatch, args, message):
    path, probe = checkpoint
    np.save(probe.parent / "narrow.npy", np.zeros((5, 10)))
    monkeypatch.chdir(probe.parent)
    assert main(["analyze", str(path), "--activation", "relu", *args]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1


def save_with_embedded_probe(kind: str, clf, X, path) -> None:
    """The state dict with the probe inside the file itself (docs/dump-layout.md, "Forward pass
    over a probe"): ``probe/input`` in NPZ and HDF5; in safetensors ``probe/input`` or
    ``probe.input``."""
    tensors = state_dict(clf)
    if kind == "npz":
        with open(path, "wb") as handle:
            np.savez(handle, **tensors, **{"probe/input": X})
    elif kind == "hdf5":
        import h5py

        with h5py.File(path, "w") as handle:
            for name, array in tensors.items():
                handle[name] = array
            handle.create_group("probe")["input"] = X
    else:
        from safetensors.numpy import save_file

        save_file({**tensors, kind.split(":")[1]: np.ascontiguousarray(X)}, str(path))


@pytest.mark.parametrize("kind", ["npz", "hdf5", "safetensors:probe/input",
                                  "safetensors:probe.input"])
def test_a_probe_stored_in_a_state_dict_is_run_without_the_option(trained, tmp_path, capsys,
                                                                  kind):
    """An upload cannot pass --probe: the state dict's own probe gives the forward-pass findings,
    whose dead sets are the units scikit-learn's own hidden activations never lift above 0."""
    clf, X, activations = trained
    path = tmp_path / ("mlp." + kind.split(":")[0].replace("hdf5", "h5"))
    save_with_embedded_probe(kind, clf, X, path)
    assert main(["analyze", str(path), "--activation", "relu", "--format", "json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["source"]["samples"] == X.shape[0]
    for name, acts in zip(("hidden1", "hidden2"), activations[1:3]):
        silent = sorted(np.flatnonzero((acts > 0).sum(axis=0) == 0).tolist())
        assert silent
        dead = [f["units"] for f in document["findings"]
                if f["layer"] == name and f["check"] == "dead"]
        assert dead == [silent]
        layer = next(entry for entry in document["layers"] if entry["name"] == name)
        assert "forward pass" in layer["activation_note"]
