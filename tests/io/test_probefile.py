"""Probe files for the forward pass (docs/dump-layout.md, "Forward pass"): .npy, HDF5 and NPZ
read back equal to numpy's own arrays; a weights-only dump with /probe/input is run over it
without options, and its activations equal numpy's x @ W.T + b and np.maximum (numpy as the
reference); bad probe files get one sentence."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from actdoc.errors import ActdocError
from actdoc.forward import with_forward_pass
from actdoc.io import open_dump
from actdoc.io.writer import write_dump
from actdoc.probefile import SyntheticProbe, open_probe

RNG = np.random.default_rng(8)
X = RNG.normal(size=(300, 5)).astype(np.float32)


def test_formats_read_back_equal(tmp_path):
    np.save(tmp_path / "a.npy", X)
    with h5py.File(tmp_path / "b.h5", "w") as handle:
        handle.create_dataset("probe/input", data=X)
        handle.create_dataset("other", data=np.zeros(3))
    with h5py.File(tmp_path / "c.h5", "w") as handle:
        handle.create_dataset("inputs", data=X)
    with open(tmp_path / "d.npz", "wb") as handle:
        np.savez(handle, x=X)
    with open(tmp_path / "e.npz", "wb") as handle:
        np.savez(handle, **{"probe/input": X, "labels": np.arange(300)})
    for name in ("a.npy", "b.h5", "c.h5", "d.npz", "e.npz"):
        source = open_probe(tmp_path / name)
        try:
            np.testing.assert_array_equal(source.read_all(), X)
            np.testing.assert_array_equal(source.read_samples(40, 90), X[40:90])
        finally:
            source.close()


@pytest.mark.parametrize("write, message", [
    (lambda p: p.write_bytes(b"hello"), "not a probe file"),
    (lambda p: np.save(p, np.arange(4)), "expected a non-empty array [samples, features]"),
    (lambda p: np.save(p, np.array([["a"]])), "is not a real number type"),
])
def test_bad_probe_files(tmp_path, write, message):
    path = tmp_path / "probe.npy"
    write(path)
    with pytest.raises(ActdocError, match=message.replace("[", r"\[").replace("]", r"\]")):
        open_probe(path)


def test_weights_only_dump_runs_over_its_own_probe(tmp_path):
    w1, b1 = RNG.normal(size=(7, 5)), RNG.normal(size=7)
    w2 = RNG.normal(size=(3, 7))
    write_dump(tmp_path / "w.h5", {"fc1": {"activation": "relu", "weight": w1, "bias": b1},
                                   "fc2": {"activation": "linear", "weight": w2}},
               probe_input=X)
    with open_dump(tmp_path / "w.h5") as dump:
        forward = with_forward_pass(dump)
        assert forward is not dump and forward.samples == 300
        z1 = forward.layer("fc1").sources["preact"].read_all()
        y1 = forward.layer("fc1").sources["output"].read_all()
        y2 = forward.layer("fc2").sources["output"].read_all()
        assert "/probe/input" in forward.layer("fc1").info.kind_note
    x = X.astype(np.float64)
    np.testing.assert_allclose(z1, x @ w1.T + b1, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(y1, np.maximum(x @ w1.T + b1, 0), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(y2, np.maximum(x @ w1.T + b1, 0) @ w2.T, rtol=1e-12, atol=1e-12)


def test_synthetic_probe_is_standard_normal_and_stable():
    probe = SyntheticProbe(5000, 3, seed=4)
    whole = probe.read_all()
    np.testing.assert_array_equal(probe.read_samples(1000, 2500), whole[1000:2500])
    # mean within 4 standard errors of 0, variance within 4 of 1 (normal moments, common practice)
    assert np.all(np.abs(whole.mean(axis=0)) < 4 / np.sqrt(5000))
    assert np.all(np.abs(whole.var(axis=0) - 1) < 4 * np.sqrt(2 / 5000))


def test_npz_member_past_the_limit_is_refused_before_reading(tmp_path):
    with open(tmp_path / "big.npz", "wb") as handle:
        np.savez_compressed(handle, x=np.zeros((2000, 100)))
    with pytest.raises(ActdocError, match="past the limit of 1000"):
        open_probe(tmp_path / "big.npz", limit=1000)


def test_unasked_probe_that_does_not_chain_keeps_the_weights_only_analysis(tmp_path):
    write_dump(tmp_path / "conv.h5", {"conv": {"activation": "relu",
                                               "weight": RNG.normal(size=(4, 1, 3, 3))}},
               probe_input=X)
    with open_dump(tmp_path / "conv.h5") as dump:
        assert with_forward_pass(dump) is dump
        with pytest.raises(ActdocError, match="convolution kernel"):
            with_forward_pass(dump, probe=None, synthetic=10)
