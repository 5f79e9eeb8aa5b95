"""actdoc.capture against PyTorch 2.13 CPU as the reference.

Every recorded array is compared with what torch itself computes for the same module on the
same inputs: a Linear/Conv module's own output (z), torch's own activation function applied to
it (y), and the module's own weight and bias tensors. Models cover an MLP with nn.ReLU,
nn.Sigmoid, nn.Tanh and nn.ReLU(inplace=True), functional activations (F.relu, torch.tanh,
x.relu_(), F.leaky_relu with a slope), and a CNN with Conv2d + ReLU.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
nn = torch.nn
F = torch.nn.functional

from actdoc.analysis import analyze  # noqa: E402
from actdoc.capture import capture  # noqa: E402
from actdoc.io import open_dump  # noqa: E402
from actdoc.model import ActivationKind  # noqa: E402


class ModuleMLP(nn.Module):
    def __init__(self):
        super().__init__()
        self.fc1, self.act1 = nn.Linear(12, 20), nn.ReLU(inplace=True)
        self.fc2, self.act2 = nn.Linear(20, 16), nn.Sigmoid()
        self.fc3, self.act3 = nn.Linear(16, 10), nn.Tanh()
        self.fc4, self.act4 = nn.Linear(10, 8), nn.ReLU()
        self.head = nn.Linear(8, 3)

    def forward(self, x):
        x = self.act2(self.fc2(self.act1(self.fc1(x))))
        return self.head(self.act4(self.fc4(self.act3(self.fc3(x)))))


class FunctionalMLP(nn.Module):
    def __init__(self):
        super().__init__()
        self.a, self.b, self.c, self.d = (nn.Linear(6, 9), nn.Linear(9, 7), nn.Linear(7, 5),
                                          nn.Linear(5, 6))

    def forward(self, x):
        x = F.relu(self.a(x))
        x = torch.tanh(self.b(x))
        x = F.leaky_relu(self.c(x), 0.2)
        return self.d(x).relu_()


class SmallCNN(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3)
        self.relu = nn.ReLU(inplace=True)
        self.fc = nn.Linear(4 * 6 * 6, 5)

    def forward(self, x):
        return self.fc(self.relu(self.conv(x)).flatten(1))


def reference(model, x):
    """torch's own z and y per module, computed module by module (no hooks)."""
    with torch.no_grad():
        if isinstance(model, ModuleMLP):
            z1 = model.fc1(x); y1 = torch.relu(z1)
            z2 = model.fc2(y1); y2 = torch.sigmoid(z2)
            z3 = model.fc3(y2); y3 = torch.tanh(z3)
            z4 = model.fc4(y3); y4 = torch.relu(z4)
            return {"fc1": (z1, y1), "fc2": (z2, y2), "fc3": (z3, y3), "fc4": (z4, y4),
                    "head": (model.head(y4), None)}
        za = model.a(x); ya = torch.relu(za)
        zb = model.b(ya); yb = torch.tanh(zb)
        zc = model.c(yb); yc = F.leaky_relu(zc, 0.2)
        zd = model.d(yc)
        return {"a": (za, ya), "b": (zb, yb), "c": (zc, yc), "d": (zd, torch.relu(zd))}


@pytest.mark.parametrize("model_class, kinds", [
    (ModuleMLP, {"fc1": "relu", "fc2": "logistic", "fc3": "tanh", "fc4": "relu",
                 "head": "linear"}),
    (FunctionalMLP, {"a": "relu", "b": "tanh", "c": "leaky_relu", "d": "relu"}),
])
def test_recorded_arrays_are_torchs_own(tmp_path, model_class, kinds):
    torch.manual_seed(3)
    model = model_class()
    x = torch.randn(150, 12 if model_class is ModuleMLP else 6)
    report = capture(model, x, tmp_path / "run.h5", batch_size=64)
    assert dict(report.layers) == kinds and report.samples == 150
    expected = reference(model, x)
    with open_dump(tmp_path / "run.h5") as dump:
        assert [layer.name for layer in dump.layers] == list(kinds)
        for layer in dump.layers:
            z, y = expected[layer.name]
            module = dict(model.named_modules())[layer.name]
            assert layer.info.kind is ActivationKind(kinds[layer.name])
            np.testing.assert_array_equal(layer.sources["preact"].read_all(), z.numpy())
            if y is None:
                assert not layer.info.has("output")
            else:
                np.testing.assert_array_equal(layer.sources["output"].read_all(), y.numpy())
            # each layer's own parameters, not the first layer's
            np.testing.assert_array_equal(layer.sources["weight"].read_all(),
                                          module.weight.detach().numpy())
            np.testing.assert_array_equal(layer.sources["bias"].read_all(),
                                          module.bias.detach().numpy())
            assert layer.info.kind_note == ""
        np.testing.assert_array_equal(dump.probe_input.read_all(), x.numpy())
        if model_class is FunctionalMLP:
            assert dump.layer("c").info.negative_slope == pytest.approx(0.2)


def test_in_place_relu_keeps_the_negative_preacts(tmp_path):
    """nn.ReLU(inplace=True) overwrites the Linear's output tensor; the recorded z must still
    be the Linear's output before it ran (torch's own fc1(x) has negative entries)."""
    torch.manual_seed(4)
    model = ModuleMLP()
    x = torch.randn(200, 12)
    capture(model, x, tmp_path / "inplace.h5")
    with torch.no_grad():
        z = model.fc1(x).numpy()
    with open_dump(tmp_path / "inplace.h5") as dump:
        stored = dump.layer("fc1").sources["preact"].read_all()
        assert (stored < 0).any()
        np.testing.assert_array_equal(stored, z)
        findings = analyze(dump, digest=False)
    assert findings.layer("fc1").info.kind_note == ""
    assert not [f for f in findings.findings if f.check == "in_place_record"]


def test_cnn_channels_first(tmp_path):
    torch.manual_seed(5)
    model = SmallCNN()
    x = torch.randn(40, 1, 8, 8)
    report = capture(model, x, tmp_path / "cnn.h5", batch_size=16)
    assert dict(report.layers) == {"conv": "relu", "fc": "linear"}
    with torch.no_grad():
        z = model.conv(x)
    with open_dump(tmp_path / "cnn.h5") as dump:
        conv = dump.layer("conv")
        assert conv.info.spatial_shape == (6, 6) and conv.info.units == 4
        np.testing.assert_array_equal(conv.sources["preact"].read_all(), z.numpy())
        np.testing.assert_array_equal(conv.sources["output"].read_all(), torch.relu(z).numpy())
        np.testing.assert_array_equal(conv.sources["weight"].read_all(),
                                      model.conv.weight.detach().numpy())


def test_dataloader_and_second_run_leave_nothing_behind(tmp_path):
    torch.manual_seed(6)
    model = ModuleMLP()
    model.train()
    data = torch.utils.data.TensorDataset(torch.randn(90, 12), torch.zeros(90))
    loader = torch.utils.data.DataLoader(data, batch_size=32)
    first = capture(model, loader, tmp_path / "one.h5")
    second = capture(model, loader, tmp_path / "two.h5")
    assert first.layers == second.layers and first.samples == second.samples == 90
    assert all(not module._forward_hooks for module in model.modules())
    assert model.training and all(module.training for module in model.modules())
    with h5py.File(tmp_path / "one.h5", "r") as a, h5py.File(tmp_path / "two.h5", "r") as b:
        for name in a["layers"]:
            for array in a["layers"][name]:
                np.testing.assert_array_equal(a["layers"][name][array][()],
                                              b["layers"][name][array][()])


def test_failure_removes_hooks_and_leaves_no_file(tmp_path):
    model = ModuleMLP()
    with pytest.raises(RuntimeError):
        capture(model, torch.randn(10, 5), tmp_path / "bad.h5")  # wrong input width
    assert all(not module._forward_hooks for module in model.modules())
    assert not (tmp_path / "bad.h5").exists()
    (tmp_path / "keep.h5").write_bytes(b"precious")
    with pytest.raises(FileExistsError):
        capture(model, torch.randn(10, 12), tmp_path / "keep.h5")
    assert (tmp_path / "keep.h5").read_bytes() == b"precious"
    assert all(not module._forward_hooks for module in model.modules())


def test_old_snippet_pattern_is_flagged(tmp_path):
    """Keeping a reference to z (no copy) while nn.ReLU(inplace=True) runs stores y as z: the
    writer warns and the opened dump carries the note (in-place capture, common practice)."""
    from actdoc.io.writer import DumpWriter, InPlaceWarning

    torch.manual_seed(7)
    fc, act = nn.Linear(5, 6), nn.ReLU(inplace=True)
    kept = {}
    fc.register_forward_hook(lambda m, i, o: kept.__setitem__("z", o))
    with torch.no_grad():
        y = act(fc(torch.randn(64, 5)))
    z = kept["z"].numpy()  # the same storage, overwritten by the in-place ReLU
    with pytest.warns(InPlaceWarning, match="fc1"):
        with DumpWriter(tmp_path / "snippet.h5") as out:
            out.add_layer("fc1", "relu", weight=fc.weight.detach().numpy(),
                          bias=fc.bias.detach().numpy(), preact=z, output=y.numpy())
    with open_dump(tmp_path / "snippet.h5") as dump:
        assert "in-place" in dump.layer("fc1").info.kind_note
        findings = analyze(dump, digest=False)
    assert "in-place" in findings.layer("fc1").info.kind_note
    assert [f.layer for f in findings.findings if f.check == "in_place_record"] == ["fc1"]
