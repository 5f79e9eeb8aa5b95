"""Weight archives in state-dict style (docs/contract.md section 3) written from a real torch model.

A torch module's ``state_dict()`` is saved the two ways users do it outside torch: as NPZ with
``np.savez(path, **{k: v.numpy()})`` and as HDF5 with one root dataset per dotted name. actdoc
must read back the same layers in torch's registration (forward) order, with torch's weights and
biases bit for bit, torch's fan-in and fan-out, and the kinds given by ``activations=``.
"""

from __future__ import annotations

import math

import h5py
import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
nn = torch.nn

from actdoc.analysis import analyze  # noqa: E402
from actdoc.io import open_dump  # noqa: E402


class Classifier(nn.Module):
    """Names chosen so that alphabetical or natural order is not the forward order, with a
    nested Sequential (dotted names with two dots) and a BatchNorm whose rank-1 ``weight`` and
    buffers (running_mean, running_var, num_batches_tracked) are not layers of units."""

    def __init__(self):
        super().__init__()
        self.input_proj = nn.Linear(10, 32)
        self.encoder = nn.Sequential(nn.Linear(32, 24), nn.ReLU(), nn.Linear(24, 16))
        self.norm = nn.BatchNorm1d(16)
        self.classifier = nn.Linear(16, 4)


#: The Linear modules in the order torch registers them (its state_dict order).
FORWARD = ("input_proj", "encoder.0", "encoder.2", "classifier")


@pytest.fixture(scope="module")
def model() -> Classifier:
    torch.manual_seed(5)
    net = Classifier()
    net.norm.train()
    with torch.no_grad():  # one training-mode pass so BatchNorm's buffers are not at defaults
        net.norm(torch.randn(8, 16))
    return net


def state_arrays(model: Classifier) -> dict[str, np.ndarray]:
    # the NPZ recipe of the task: np.savez(path, **{k: v.detach().numpy() ...})
    return {k: v.detach().numpy() for k, v in model.state_dict().items()}


def save_npz(model: Classifier, path) -> None:
    np.savez(path, **state_arrays(model))


def save_hdf5(model: Classifier, path) -> None:
    # creation order tracked, so the file remembers torch's order (h5py lists names
    # alphabetically otherwise)
    with h5py.File(path, "w", track_order=True) as handle:
        for key, value in state_arrays(model).items():
            handle.create_dataset(key, data=value)


SAVERS = {"npz": (save_npz, "weights.npz"), "hdf5": (save_hdf5, "weights.h5")}
#: Kinds named layer by layer, so that a check does not depend on the order actdoc reads.
PER_LAYER_KINDS = [f"{name}=relu" for name in FORWARD[:-1]] + [f"{FORWARD[-1]}=linear"]
def save(fmt: str, model: Classifier, folder):
    saver, name = SAVERS[fmt]
    saver(model, folder / name)
    return folder / name


@pytest.fixture(params=list(SAVERS))
def archive(request, model, tmp_path):
    return request.param, save(request.param, model, tmp_path)


def test_state_dict_keys_are_what_this_test_assumes(model):
    # PyTorch: Module.state_dict() names parameters and buffers "<module path>.<name>" in
    # registration order
    keys = list(model.state_dict())
    assert keys[:6] == ["input_proj.weight", "input_proj.bias", "encoder.0.weight",
                        "encoder.0.bias", "encoder.2.weight", "encoder.2.bias"]
    assert {"norm.weight", "norm.running_mean", "norm.num_batches_tracked"} <= set(keys)
    assert keys[-2:] == ["classifier.weight", "classifier.bias"]


@pytest.mark.parametrize("fmt", ["npz", "hdf5"])
def test_layers_follow_torch_order_and_default_kinds(model, fmt, tmp_path):
    # PyTorch: state_dict order is the modules' registration order, here the forward order
    with open_dump(save(fmt, model, tmp_path), activations=["relu"]) as dump:
        assert [layer.name for layer in dump.layers] == list(FORWARD)
        # --activation relu: every layer but the last; the last defaults to linear, which
        # actdoc reports as inferred (nothing declared it)
        assert [layer.info.kind.value for layer in dump.layers] == \
            ["relu", "relu", "relu", "linear"]
        assert [layer.info.kind_source.value for layer in dump.layers] == \
            ["declared", "declared", "declared", "inferred"]


def test_parameters_and_fans_equal_torch(model, archive):
    fmt, path = archive
    with open_dump(path, activations=["relu"]) as dump:
        assert dump.format == fmt
        assert sorted(layer.name for layer in dump.layers) == sorted(FORWARD)
        for layer in dump.layers:
            linear = model.get_submodule(layer.name)
            # torch's tensors, bit for bit (float32 stays float32)
            np.testing.assert_array_equal(layer.weight(), linear.weight.detach().numpy())
            np.testing.assert_array_equal(layer.bias(), linear.bias.detach().numpy())
            assert layer.weight().dtype == np.float32
            # nn.Linear(in_features, out_features): weight is [out_features, in_features]
            assert (layer.fan_in, layer.fan_out) == (linear.in_features, linear.out_features)
            assert layer.info.units == linear.out_features
            assert layer.info.samples == 0


def test_per_layer_kinds_override(archive):
    _, path = archive
    specs = ["input_proj=tanh", "encoder.0=tanh", "encoder.2=logistic", "classifier=relu"]
    with open_dump(path, activations=specs) as dump:
        kinds = {layer.name: layer.info.kind.value for layer in dump.layers}
    assert kinds == {"input_proj": "tanh", "encoder.0": "tanh", "encoder.2": "logistic",
                     "classifier": "relu"}


def test_weights_only_analysis_measures_torch_weights(model, archive):
    # the weight summary is computed from torch's tensors: population std (torch.std with
    # unbiased=False), row norms (torch.linalg.vector_norm over each row), He et al. 2015 eq. 10
    # reference sqrt(2 / fan_in) for ReLU, Glorot & Bengio 2010 eq. 16 sqrt(2 / (in + out)) for
    # the linear head
    _, path = archive
    with open_dump(path, activations=PER_LAYER_KINDS) as dump:
        findings = analyze(dump)
    for name in FORWARD:
        linear = model.get_submodule(name)
        summary = findings.layer(name).weights
        assert summary.std == pytest.approx(linear.weight.std(unbiased=False).item(), rel=1e-6)
        torch_norms = torch.linalg.vector_norm(linear.weight.detach().double(), dim=1)
        np.testing.assert_allclose(summary.row_norms, torch_norms.numpy(), rtol=1e-12)
        fan_in, fan_out = linear.in_features, linear.out_features
        reference = math.sqrt(2.0 / fan_in) if name != "classifier" else \
            math.sqrt(2.0 / (fan_in + fan_out))
        assert summary.reference_std == pytest.approx(reference, rel=1e-12)
    # no activations were stored: no unit-level verdicts can be drawn
    assert all(not f.units for f in findings.findings)
