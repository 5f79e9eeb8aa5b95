"""actdoc.capture's ``grad`` arrays (dL/dz) against torch.autograd, PyTorch 2.13 CPU.

The reference for every gradient is torch.autograd itself on the same model and inputs:
``z.retain_grad()`` on each Linear/Conv output of a forward pass written out by hand, then
``loss.backward()``. The deep logistic case follows Glorot & Bengio 2010 (AISTATS, section 4.2):
a 9-layer logistic net at the Glorot scale on scikit-learn's bundled digits has an input-layer
gradient orders of magnitude below its output's, and actdoc's gradient_flow check must say so
from a dump capture recorded.
"""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
nn = torch.nn
F = torch.nn.functional

from actdoc.analysis import analyze  # noqa: E402
from actdoc.capture import capture  # noqa: E402
from actdoc.io import open_dump  # noqa: E402
from tests.capture.test_capture_torch import ModuleMLP, SmallCNN  # noqa: E402


def autograd_reference(model: ModuleMLP, x, labels, reduction="sum"):
    """torch.autograd's dL/dz per module of ModuleMLP (out-of-place activations, so each
    retained z keeps its own gradient)."""
    zs = {}

    def keep(name, z):
        z.retain_grad()
        zs[name] = z
        return z

    y1 = torch.relu(keep("fc1", model.fc1(x)))
    y2 = torch.sigmoid(keep("fc2", model.fc2(y1)))
    y3 = torch.tanh(keep("fc3", model.fc3(y2)))
    y4 = torch.relu(keep("fc4", model.fc4(y3)))
    logits = keep("head", model.head(y4))
    F.cross_entropy(logits, labels, reduction=reduction).backward()
    grads = {name: z.grad.numpy().copy() for name, z in zs.items()}
    model.zero_grad(set_to_none=True)
    return grads


def stored(path, array="grad"):
    with open_dump(path) as dump:
        return {layer.name: layer.sources[array].read_all() for layer in dump.layers
                if layer.info.has(array)}


def test_batched_gradients_are_torch_autograds(tmp_path):
    """A summed loss makes each row's dL/dz independent of the batching: 150 samples in
    batches of 64 must give what autograd gives on all 150 at once (nn.ReLU(inplace=True) on
    fc1 included: the gradient is taken at z, not at the overwritten tensor)."""
    torch.manual_seed(11)
    model = ModuleMLP()
    x, labels = torch.randn(150, 12), torch.randint(0, 3, (150,))
    report = capture(model, x, tmp_path / "g.h5", batch_size=64, targets=labels,
                     loss_fn=lambda out, y: F.cross_entropy(out, y, reduction="sum"))
    assert report.gradients
    got = stored(tmp_path / "g.h5")
    expected = autograd_reference(model, x, labels)
    assert set(got) == set(expected)
    for name in expected:
        np.testing.assert_allclose(got[name], expected[name], rtol=1e-5, atol=1e-7)
        assert np.abs(got[name]).max() > 0
    # the recorded z stays the module's own output (negative entries survive the in-place ReLU)
    with torch.no_grad():
        np.testing.assert_array_equal(stored(tmp_path / "g.h5", "preact")["fc1"],
                                      model.fc1(x).numpy())


def test_dataloader_pairs_mean_loss_and_nothing_left_behind(tmp_path):
    """(inputs, targets) batches with the default mean loss: each batch's rows carry that
    batch's own 1/size factor, exactly as autograd computes it per batch. Parameters' .grad,
    hooks and training flags stay as they were; a second run writes the same file."""
    torch.manual_seed(12)
    model = ModuleMLP()
    model.train()
    x, labels = torch.randn(90, 12), torch.randint(0, 3, (90,))
    loader = torch.utils.data.DataLoader(torch.utils.data.TensorDataset(x, labels),
                                         batch_size=32)
    first = capture(model, loader, tmp_path / "one.h5", loss_fn=F.cross_entropy)
    second = capture(model, loader, tmp_path / "two.h5", loss_fn=F.cross_entropy)
    assert first.samples == second.samples == 90
    assert all(parameter.grad is None for parameter in model.parameters())
    assert all(not module._forward_hooks for module in model.modules())
    assert model.training and all(module.training for module in model.modules())
    got, again = stored(tmp_path / "one.h5"), stored(tmp_path / "two.h5")
    model.eval()
    for start in range(0, 90, 32):
        rows = slice(start, start + 32)
        expected = autograd_reference(model, x[rows], labels[rows], reduction="mean")
        for name, grad in expected.items():
            np.testing.assert_allclose(got[name][rows], grad, rtol=1e-5, atol=1e-8)
    for name in got:
        np.testing.assert_array_equal(got[name], again[name])


def test_cnn_gradient_has_the_channels_first_shape(tmp_path):
    torch.manual_seed(13)
    model = SmallCNN()
    x, labels = torch.randn(24, 1, 8, 8), torch.randint(0, 5, (24,))
    capture(model, x, tmp_path / "cnn.h5", batch_size=10, targets=labels,
            loss_fn=lambda out, y: F.cross_entropy(out, y, reduction="sum"))
    zc = model.conv(x)
    zc.retain_grad()
    logits = model.fc(torch.relu(zc).flatten(1))
    F.cross_entropy(logits, labels, reduction="sum").backward()
    got = stored(tmp_path / "cnn.h5")
    assert got["conv"].shape == (24, 4, 6, 6)
    np.testing.assert_allclose(got["conv"], zc.grad.numpy(), rtol=1e-5, atol=1e-7)


def test_bad_gradient_requests_are_one_sentence(tmp_path):
    model = ModuleMLP()
    x = torch.randn(20, 12)
    with pytest.raises(ValueError, match="targets: given without loss_fn"):
        capture(model, x, tmp_path / "a.h5", targets=torch.zeros(20, dtype=torch.long))
    with pytest.raises(ValueError, match="the probe brought no targets"):
        capture(model, x, tmp_path / "b.h5", loss_fn=F.cross_entropy)
    with pytest.raises(ValueError, match="targets: 19 rows for a probe of 20 samples"):
        capture(model, x, tmp_path / "c.h5", loss_fn=F.cross_entropy,
                targets=torch.zeros(19, dtype=torch.long))
    with pytest.raises(ValueError, match="loss_fn: expected a scalar tensor"):
        capture(model, x, tmp_path / "d.h5", targets=torch.zeros(20, dtype=torch.long),
                loss_fn=lambda out, y: F.cross_entropy(out, y, reduction="none"))
    assert not any(tmp_path.iterdir())
    assert all(not module._forward_hooks for module in model.modules())


class DeepLogistic(nn.Module):
    """9 Linear layers, logistic between them, Glorot-uniform weights and zero biases
    (Glorot & Bengio 2010's setting, torch.nn.init.xavier_uniform_)."""

    def __init__(self, sizes):
        super().__init__()
        self.layers = nn.ModuleList(nn.Linear(a, b) for a, b in zip(sizes[:-1], sizes[1:]))
        for linear in self.layers:
            nn.init.xavier_uniform_(linear.weight)
            nn.init.zeros_(linear.bias)

    def forward(self, x):
        for linear in self.layers[:-1]:
            x = torch.sigmoid(linear(x))
        return self.layers[-1](x)


def test_gradient_flow_fires_on_a_glorot_logistic_net_recorded_by_capture(tmp_path):
    from sklearn.datasets import load_digits
    from sklearn.preprocessing import StandardScaler

    x, y = load_digits(return_X_y=True)
    x = torch.tensor(StandardScaler().fit_transform(x)[:1200], dtype=torch.float32)
    labels = torch.tensor(y[:1200])
    torch.manual_seed(0)
    model = DeepLogistic([64] + [64] * 8 + [10])
    capture(model, x, tmp_path / "deep.h5", batch_size=300, targets=labels,
            loss_fn=lambda out, t: F.cross_entropy(out, t, reduction="sum"))
    grads = stored(tmp_path / "deep.h5")
    names = list(grads)
    top = np.sqrt(np.mean(grads[names[-1]].astype(np.float64) ** 2))
    first = np.sqrt(np.mean(grads[names[0]].astype(np.float64) ** 2))
    assert first / top < 1e-4   # Glorot & Bengio 2010, Figure 7: fading towards the input
    with open_dump(tmp_path / "deep.h5") as dump:
        findings = analyze(dump, digest=False)
    flow = {f.layer: f for f in findings.findings if f.check == "gradient_flow"}
    assert names[0] in flow and flow[names[0]].severity.value == "critical"
    assert flow[names[0]].measure == pytest.approx(first / top, rel=1e-3)
    assert names[-1] not in flow
