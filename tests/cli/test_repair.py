"""``actdoc repair``: recycling dead and dormant units as ReDo does (Sokar et al. 2023, ICML,
Algorithm 1: fresh incoming weights, outgoing weights zeroed), checked with outside references.

The network is scikit-learn's MLPClassifier trained on its bundled digits (load_digits) with SGD
at a high learning rate, which silences many ReLU units. The repaired weights are loaded back
into scikit-learn (``coefs_``/``intercepts_``) and into PyTorch (``load_state_dict`` of the
safetensors file, read with safetensors' own torch ``load_file``): the outputs must not move
(``predict_proba``; torch's forward) and the recycled units must fire on the probe again
(scikit-learn's own hidden activations).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

sklearn = pytest.importorskip("sklearn", reason="scikit-learn is the reference here")
safetensors_numpy = pytest.importorskip("safetensors.numpy", reason="the 'safetensors' package")

from actdoc.cli import main  # noqa: E402
from actdoc.io import open_dump  # noqa: E402
from actdoc.io.writer import write_dump  # noqa: E402
from tests.support.digits import train_dying_relu_mlp  # noqa: E402

NAMES = ("hidden1", "hidden2", "out")


@pytest.fixture(scope="module")
def trained():
    clf, X, _ = train_dying_relu_mlp()
    return clf, X


def hidden(clf, X):
    return clf._forward_pass([X] + [None] * (clf.n_layers_ - 1))[1:-1]


def save(clf, path):
    arrays = {}
    for name, w, b in zip(NAMES, clf.coefs_, clf.intercepts_):
        arrays[f"{name}.weight"], arrays[f"{name}.bias"] = np.ascontiguousarray(w.T), b
    safetensors_numpy.save_file(arrays, str(path))


def load(clf, path):
    from safetensors.numpy import load_file

    arrays = load_file(str(path))
    fixed = copy.deepcopy(clf)
    fixed.coefs_ = [np.ascontiguousarray(arrays[f"{n}.weight"].T) for n in NAMES]
    fixed.intercepts_ = [arrays[f"{n}.bias"] for n in NAMES]
    return fixed


@pytest.fixture
def files(trained, tmp_path):
    clf, X = trained
    save(clf, tmp_path / "mlp.safetensors")
    np.save(tmp_path / "probe.npy", X)
    return tmp_path / "mlp.safetensors", tmp_path / "probe.npy"


def run(source, probe, output, *extra):
    return main(["repair", str(source), "--activation", "relu", "--probe", str(probe),
                 "--output", str(output), *extra])


def test_dead_only_keeps_every_output_and_revives(trained, files, tmp_path, capsys):
    clf, X = trained
    source, probe = files
    before = source.read_bytes()
    assert run(source, probe, tmp_path / "fixed.safetensors", "--dead-only") == 0
    report = capsys.readouterr().out
    assert source.read_bytes() == before  # the input is never touched
    fixed = load(clf, tmp_path / "fixed.safetensors")
    np.testing.assert_allclose(fixed.predict_proba(X), clf.predict_proba(X), rtol=0, atol=1e-12)
    old, new = hidden(clf, X), hidden(fixed, X)
    for layer, (a, b) in enumerate(zip(old, new)):
        dead = np.flatnonzero((a > 0).sum(axis=0) == 0)
        assert dead.size  # the learning rate did silence units
        np.testing.assert_array_equal(recycled_units(clf, fixed, layer), dead)
        np.testing.assert_array_equal(fixed.coefs_[layer + 1][dead], 0.0)  # outgoing zeroed
        revived = int((b[:, dead] > 0).any(axis=0).sum())
        # a fresh He-initialised unit fires on about half its inputs (common practice), so
        # nearly every recycled unit fires somewhere on 1797 samples
        assert revived >= 0.8 * dead.size
        line = next(text for text in report.splitlines() if text.startswith(NAMES[layer]))
        assert f"recycled {dead.size} dead" in line and f"{revived} of them active again" in line
    assert "unchanged on 1797 of 1797" in report


def recycled_units(clf, fixed, layer):
    """Units whose incoming weights were redrawn: changed entries that are not zeroed rows
    (the outgoing weights of recycled units one layer down are zeros; fresh draws never are)."""
    old, new = clf.coefs_[layer], fixed.coefs_[layer]
    return np.flatnonzero(np.any((new != old) & (new != 0), axis=0))


def test_dormant_units_move_outputs_only_where_they_fired(trained, files, tmp_path, capsys):
    clf, X = trained
    source, probe = files
    assert run(source, probe, tmp_path / "fixed.safetensors", "--seed", "3") == 0
    fixed = load(clf, tmp_path / "fixed.safetensors")
    old = hidden(clf, X)
    touched = np.zeros(len(X), bool)
    for layer, a in enumerate(old):
        touched |= np.any(a[:, recycled_units(clf, fixed, layer)] != 0, axis=1)
    same = ~touched
    assert touched.any() and same.any()  # dormant units fired on some samples, not all
    np.testing.assert_allclose(fixed.predict_proba(X)[same], clf.predict_proba(X)[same],
                               rtol=0, atol=1e-12)
    assert f"unchanged on {same.sum()} of 1797" in capsys.readouterr().out


def test_torch_loads_the_repaired_state_dict(trained, files, tmp_path):
    torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
    from safetensors.torch import load_file

    clf, X = trained
    source, probe = files
    assert run(source, probe, tmp_path / "fixed.safetensors", "--dead-only") == 0
    nn = torch.nn
    model = nn.Sequential()
    for name, w in zip(NAMES, clf.coefs_):
        model.add_module(name, nn.Linear(w.shape[0], w.shape[1], dtype=torch.float64))
    model.load_state_dict(load_file(str(tmp_path / "fixed.safetensors")))  # strict: same keys

    def forward(net, x):
        x = torch.relu(net.hidden1(x))
        return net.out(torch.relu(net.hidden2(x)))

    with torch.no_grad():
        logits = forward(model, torch.from_numpy(X)).numpy()
    reference = clf.predict_proba(X)
    softmax = np.exp(logits - logits.max(axis=1, keepdims=True))
    np.testing.assert_allclose(softmax / softmax.sum(axis=1, keepdims=True), reference,
                               rtol=0, atol=1e-10)


def test_layout_dump_with_probe_becomes_a_fixed_dump(trained, tmp_path, capsys):
    clf, X = trained
    layers = {name: {"activation": "relu" if name != "out" else "linear",
                     "weight": np.ascontiguousarray(w.T), "bias": b}
              for name, w, b in zip(NAMES, clf.coefs_, clf.intercepts_)}
    write_dump(tmp_path / "weights.h5", layers, probe_input=X)
    assert main(["repair", str(tmp_path / "weights.h5"), "--output",
                 str(tmp_path / "fixed.h5"), "--dead-only"]) == 0
    with open_dump(tmp_path / "fixed.h5") as dump:
        assert dump.samples == len(X)
        assert [layer.name for layer in dump.layers] == list(NAMES)
        y = dump.layer("hidden1").sources["output"].read_all()
    dead = np.flatnonzero((hidden(clf, X)[0] > 0).sum(axis=0) == 0)
    revived = int((y[:, dead] > 0).any(axis=0).sum())
    assert dead.size and revived >= 0.8 * dead.size
    assert f"{revived} of them active again" in capsys.readouterr().out


def write_conv(tmp_path):
    with open(tmp_path / "conv.npz", "wb") as handle:
        np.savez(handle, **{"conv.weight": np.ones((4, 1, 3, 3)), "fc.weight": np.ones((2, 4))})
    np.save(tmp_path / "images.npy", np.ones((5, 9)))
    return ["repair", str(tmp_path / "conv.npz"), "--probe", str(tmp_path / "images.npy")]


def write_activations_only(tmp_path):
    z = np.random.default_rng(0).normal(size=(20, 3))
    write_dump(tmp_path / "acts.h5", {"a": {"activation": "relu", "preact": z},
                                      "b": {"preact": z}})
    return ["repair", str(tmp_path / "acts.h5")]


@pytest.mark.parametrize("make, message", [
    (write_conv, "is a convolution kernel"),
    (write_activations_only, "has no weights"),
    (lambda p: ["repair", str(p / "mlp.safetensors"), "--activation", "relu"], "has no probe"),
])
def test_what_it_cannot_repair_gets_one_sentence(files, tmp_path, capsys, make, message):
    args = make(tmp_path)
    assert main([*args, "--output", str(tmp_path / "out.bin")]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not (tmp_path / "out.bin").exists()


def test_never_overwrites(files, tmp_path, capsys):
    source, probe = files
    before = source.read_bytes()
    assert run(source, probe, source) == 2
    assert "never overwrites its input" in capsys.readouterr().err
    assert run(source, probe, source, "--overwrite") == 2
    assert source.read_bytes() == before
    (tmp_path / "taken.safetensors").write_bytes(b"keep")
    assert run(source, probe, tmp_path / "taken.safetensors") == 2
    assert "already exists" in capsys.readouterr().err
    assert (tmp_path / "taken.safetensors").read_bytes() == b"keep"
    assert run(source, probe, tmp_path / "taken.safetensors", "--overwrite") == 0
    with open_dump(tmp_path / "taken.safetensors") as dump:
        assert [layer.name for layer in dump.layers] == list(NAMES)
