"""The demo trainer's backpropagation against torch.autograd on the same weights and batch.

demo_models.trainer computes its gradients by hand in numpy; torch.autograd differentiates the
same forward pass (torch.nn.functional activations, F.cross_entropy / a squared error) in
float64. Both evaluate the same sums in a different order, so they agree to float64 rounding.
"""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
F = torch.nn.functional

from demo_models.trainer import KINDS, LOSSES, MLP  # noqa: E402

NEGATIVE_SLOPE = 0.1
SIZES = (6, 9, 7, 4)
SAMPLES = 16

#: The torch counterpart of each trainer kind (torch.nn.functional, PyTorch 2.13).
TORCH_ACTIVATIONS = {
    "relu": F.relu,
    "leaky_relu": lambda z: F.leaky_relu(z, negative_slope=NEGATIVE_SLOPE),
    "logistic": torch.sigmoid,
    "tanh": torch.tanh,
    "linear": lambda z: z,
}


def torch_loss(kind_per_layer, params, x, targets, loss):
    """The trainer's forward pass and loss written in torch: z = x W^T + b, y = f(z)."""
    h = torch.from_numpy(x)
    for kind, (weight, bias) in zip(kind_per_layer, zip(params[0::2], params[1::2])):
        h = TORCH_ACTIVATIONS[kind](h @ weight.T + bias)
    if loss == "softmax_cross_entropy":
        # F.cross_entropy applies log-softmax to the logits and averages over the batch
        return F.cross_entropy(h, torch.from_numpy(targets))
    # the trainer's documented mse: 0.5 * sum((y - t)^2) averaged over samples
    return 0.5 * ((h - torch.from_numpy(targets)) ** 2).sum() / h.shape[0]


def test_every_trainer_kind_and_loss_is_covered():
    assert set(TORCH_ACTIVATIONS) == set(KINDS) and set(LOSSES) == {"softmax_cross_entropy", "mse"}


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("kind", KINDS)
def test_loss_and_gradients_match_torch_autograd(kind, loss):
    # torch.autograd (float64) as the reference. Measured differences stay below 1e-15
    # absolute; rtol 1e-10 with atol 1e-12 is float64 rounding with a wide margin, far below
    # any error in a backpropagation formula (a wrong derivative is off by O(1) relative)
    rng = np.random.default_rng(11)
    output_kind = "linear" if loss == "softmax_cross_entropy" else kind
    kinds = [kind, kind, output_kind]
    model = MLP(SIZES, kinds, rng=rng, init="glorot_uniform", bias=0.05,
                negative_slope=NEGATIVE_SLOPE)
    # move the biases off their constant start so every gradient entry is exercised
    for layer in model.layers:
        layer.bias += rng.normal(0.0, 0.3, layer.bias.shape)
    x = rng.normal(size=(SAMPLES, SIZES[0]))
    targets = (rng.integers(0, SIZES[-1], SAMPLES) if loss == "softmax_cross_entropy"
               else rng.normal(size=(SAMPLES, SIZES[-1])))
    value, grads = model.loss_and_gradients(x, targets, loss)

    params = [torch.tensor(p, dtype=torch.float64, requires_grad=True)
              for p in model.parameters()]
    reference = torch_loss(kinds, params, x, targets, loss)
    reference.backward()

    assert value == pytest.approx(reference.item(), rel=1e-12, abs=1e-14)
    assert len(grads) == len(params)
    for ours, param in zip(grads, params):
        assert ours.shape == tuple(param.shape)
        np.testing.assert_allclose(ours, param.grad.numpy(), rtol=1e-10, atol=1e-12)
    # the batch must exercise the kinks where there are any: some units on each side
    if kind in ("relu", "leaky_relu"):
        z = x @ model.layers[0].weight.T + model.layers[0].bias
        assert (z > 0).any() and (z < 0).any()
