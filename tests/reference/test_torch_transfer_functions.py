"""actdoc.neurons against PyTorch: every kind's f(z) against torch.nn.functional and f'(z) against
torch.autograd, in float32 and float64, over a wide grid of total inputs including huge |z|.

Tolerance (common practice for comparing two implementations of one elementary function): the
two results may differ by a few units in the last place of the output's scale,
|actdoc - torch| <= ULPS * eps * (1 + |torch|). Measured on this grid the largest difference was
1.6 eps (SiLU, float32), so ULPS = 4 leaves room for other CPUs' libm without hiding an error
in a formula (a wrong formula is off by far more than 1e-6). Two documented differences get their
own allowance, named where they are used.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="PyTorch is the reference here (extra 'torch')")
F = torch.nn.functional

from actdoc.model import ActivationKind as K  # noqa: E402
from actdoc.neurons import (  # noqa: E402
    MAX_GAIN,
    Neuron,
    logistic_saturation_edge,
    tanh_saturation_edge,
)

ULPS = 4.0
DTYPES = (np.float32, np.float64)
#: Dense in the region where the functions bend, plus the exact kink at 0 and values far beyond
#: where exp over- or underflows in either precision (float32 max is about 3.4e38).
Z_GRID = np.concatenate([
    np.linspace(-60.0, 60.0, 24001),
    [-1e30, -1e4, -1e3, -710.0, -100.0, -0.0, 0.0, 100.0, 710.0, 1e3, 1e4, 1e30],
])
LEAKY_SLOPES = (0.01, 0.1, 0.2, 0.5)

#: The torch function each kind corresponds to (torch.nn.functional, PyTorch 2.13 documentation).
TORCH_FUNCTIONS = {
    K.LINEAR: lambda z: z * 1.0,
    K.RELU: F.relu,
    K.LOGISTIC: torch.sigmoid,
    K.STOCHASTIC_BINARY: torch.sigmoid,  # actdoc's f for these units is the firing probability
    K.TANH: torch.tanh,
    K.SOFTPLUS: F.softplus,
    K.GELU: lambda z: F.gelu(z, approximate="none"),
    K.SILU: F.silu,
}

#: torch.nn.functional.softplus returns z itself once z > threshold = 20 (its documented
#: default), where the exact value is z + log1p(exp(-z)): an absolute difference below
#: log1p(exp(-20)) ~ 2.06e-9, visible in float64 only.
SOFTPLUS_LINEARISATION = math.log1p(math.exp(-20.0))
#: actdoc's GELU uses Abramowitz & Stegun 7.1.26 for erf (|error| < 1.5e-7, handbook value), so
#: Phi(z) may be off by 0.75e-7: GELU = z Phi(z) by |z| * 0.75e-7 and GELU' = Phi + z phi
#: (phi exact) by 0.75e-7, against torch's exact erf.
GELU_PHI_ERROR = 0.75e-7


def torch_value_and_gain(function, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """f(z) from torch and f'(z) from torch.autograd (the functions act elementwise, so the
    gradient of sum f(z) is f'(z))."""
    tensor = torch.tensor(z, requires_grad=True)
    value = function(tensor)
    value.sum().backward()
    return value.detach().numpy(), tensor.grad.numpy()


def allowance(kind: K, z: np.ndarray, reference: np.ndarray, gain: bool) -> np.ndarray:
    eps = float(np.finfo(z.dtype).eps)
    allowed = ULPS * eps * (1.0 + np.abs(reference.astype(np.float64)))
    if kind is K.SOFTPLUS:
        allowed = allowed + np.where(z > 20.0, SOFTPLUS_LINEARISATION, 0.0)
    if kind is K.GELU:
        allowed = allowed + (GELU_PHI_ERROR if gain else GELU_PHI_ERROR * np.abs(z.astype(float)))
    return allowed


def assert_close(kind: K, z: np.ndarray, ours: np.ndarray, reference: np.ndarray,
                 gain: bool, reference_error: np.ndarray | float = 0.0) -> None:
    assert ours.dtype == z.dtype, f"{kind.value}: actdoc changed {z.dtype} to {ours.dtype}"
    assert np.isfinite(reference).all(), f"{kind.value}: torch itself gave non-finite values"
    difference = np.abs(ours.astype(np.float64) - reference.astype(np.float64))
    allowed = allowance(kind, z, reference, gain) + reference_error
    bad = np.flatnonzero(~(difference <= allowed))
    what = "f'" if gain else "f"
    assert bad.size == 0, (
        f"{kind.value} {what} in {z.dtype}: {bad.size} inputs off, first z = {z[bad[0]]!r}: "
        f"actdoc {ours[bad[0]]!r}, torch {reference[bad[0]]!r}")


@pytest.mark.parametrize("dtype", DTYPES, ids=lambda d: np.dtype(d).name)
@pytest.mark.parametrize("kind", list(TORCH_FUNCTIONS), ids=lambda k: k.value)
def test_output_and_gain_match_torch(kind, dtype):
    # PyTorch: torch.nn.functional / torch.sigmoid / torch.tanh for f, torch.autograd for f'
    z = Z_GRID.astype(dtype)
    value, gain = torch_value_and_gain(TORCH_FUNCTIONS[kind], z)
    # torch's own rounding in this dtype, measured against its float64 result, widens the
    # allowance: torch 2.13's float32 GELU is off by up to 6.6e-7 at z = -3.4 (its float64
    # value and scipy's z * ndtr(z) agree there, and actdoc's float32 is within 1.5e-7 of them)
    exact_value, exact_gain = torch_value_and_gain(TORCH_FUNCTIONS[kind], z.astype(np.float64))
    value_error = np.abs(value.astype(np.float64) - exact_value)
    gain_error = np.abs(gain.astype(np.float64) - exact_gain)
    neuron = Neuron(kind)
    assert_close(kind, z, neuron.output(z), value, gain=False, reference_error=value_error)
    assert_close(kind, z, neuron.gain(z), gain, gain=True, reference_error=gain_error)


@pytest.mark.parametrize("dtype", DTYPES, ids=lambda d: np.dtype(d).name)
@pytest.mark.parametrize("slope", LEAKY_SLOPES)
def test_leaky_relu_matches_torch_for_several_slopes(slope, dtype):
    # PyTorch: torch.nn.functional.leaky_relu(z, negative_slope); at z = 0 torch's gradient is
    # the slope (its backward tests z > 0), which is also actdoc's convention
    z = Z_GRID.astype(dtype)
    value, gain = torch_value_and_gain(lambda t: F.leaky_relu(t, negative_slope=slope), z)
    neuron = Neuron(K.LEAKY_RELU, negative_slope=slope)
    assert_close(K.LEAKY_RELU, z, neuron.output(z), value, gain=False)
    assert_close(K.LEAKY_RELU, z, neuron.gain(z), gain, gain=True)
    assert neuron.gain(np.array([0.0], dtype))[0] == pytest.approx(slope)


@pytest.mark.parametrize("dtype", DTYPES, ids=lambda d: np.dtype(d).name)
@pytest.mark.parametrize("threshold", (0.0, 1.5, -2.0))
def test_threshold_unit_matches_torch_heaviside(threshold, dtype):
    # PyTorch: torch.heaviside(z - t, 0) is 1 where z > t and 0 at and below t, the firing rule
    # of docs/contract.md section 1; torch defines no derivative for it (autograd refuses), and a
    # step passes no gradient anywhere but its jump (common practice): actdoc's gain is 0
    z = np.concatenate([Z_GRID, [threshold]]).astype(dtype)
    shifted = torch.tensor(z) - torch.tensor(threshold, dtype=torch.tensor(z).dtype)
    reference = torch.heaviside(shifted, torch.zeros((), dtype=shifted.dtype)).numpy()
    neuron = Neuron(K.THRESHOLD, threshold=threshold)
    np.testing.assert_array_equal(neuron.output(z), reference)
    assert neuron.output(z).dtype == z.dtype
    assert not neuron.gain(z).any()
    with pytest.raises(RuntimeError):
        torch.heaviside(torch.tensor(z, requires_grad=True), torch.zeros((), dtype=shifted.dtype)) \
            .sum().backward()


def test_every_kind_has_a_torch_reference_here():
    # guards the parametrisation: a kind added to actdoc must get its torch counterpart above
    covered = set(TORCH_FUNCTIONS) | {K.LEAKY_RELU, K.THRESHOLD}
    assert covered == set(K)


@pytest.mark.parametrize("kind", [K.GELU, K.SILU, K.LOGISTIC, K.TANH, K.SOFTPLUS],
                         ids=lambda k: k.value)
def test_max_gain_is_the_peak_of_torch_autograd(kind):
    # PyTorch autograd on a fine float64 grid: the largest f' found must equal MAX_GAIN. Near a
    # smooth peak f' differs from its maximum by O(h^2) (h = grid step 1e-5: ~1e-10); softplus'
    # supremum 1 is reached in float64 at large z
    z = np.concatenate([np.arange(-4.0, 4.0, 1e-5), [40.0]])
    _, gain = torch_value_and_gain(TORCH_FUNCTIONS[kind], z)
    assert MAX_GAIN[kind] == pytest.approx(gain.max(), rel=1e-9, abs=1e-12)
    assert Neuron(kind).max_gain == MAX_GAIN[kind]


def test_zone_edges_against_torch_values_and_gradients():
    # PyTorch: torch.sigmoid(ln 99) = 0.99 and torch.tanh(atanh 0.99) = 0.99 (the saturation
    # edges of docs/contract.md section 4); at the near-linear edge autograd's f' must be exactly
    # the configured share of the peak gain (0.25 logistic, 1 tanh)
    logistic_edge = logistic_saturation_edge(0.01)
    tanh_edge = tanh_saturation_edge(0.99)
    edges = torch.tensor([-logistic_edge, logistic_edge], dtype=torch.float64)
    assert torch.sigmoid(edges).tolist() == pytest.approx([0.01, 0.99], abs=1e-15)
    assert torch.tanh(torch.tensor(tanh_edge, dtype=torch.float64)).item() == \
        pytest.approx(0.99, abs=1e-15)
    for share in (0.5, 0.9, 0.99):
        for kind, peak in ((K.LOGISTIC, 0.25), (K.TANH, 1.0)):
            zone = Neuron(kind).linear_zone(share)
            _, gain = torch_value_and_gain(TORCH_FUNCTIONS[kind],
                                           np.array([zone.z_low, zone.z_high]))
            np.testing.assert_allclose(gain, share * peak, rtol=1e-12)
            value, _ = torch_value_and_gain(TORCH_FUNCTIONS[kind],
                                            np.array([zone.z_low, zone.z_high]))
            np.testing.assert_allclose(value, [zone.y_low, zone.y_high], rtol=1e-12, atol=1e-15)


def test_inverses_match_torch_logit_and_atanh_and_undo_torch_forward():
    # PyTorch: torch.logit and torch.atanh are the inverses of sigmoid and tanh; softplus and
    # leaky ReLU have none in torch, so actdoc's inverse must undo torch's forward pass
    y = np.linspace(1e-9, 1.0 - 1e-9, 20001)
    np.testing.assert_allclose(Neuron(K.LOGISTIC).inverse(y), torch.logit(torch.tensor(y)).numpy(),
                               rtol=1e-12, atol=1e-12)
    t = np.linspace(-1.0 + 1e-9, 1.0 - 1e-9, 20001)
    np.testing.assert_allclose(Neuron(K.TANH).inverse(t), torch.atanh(torch.tensor(t)).numpy(),
                               rtol=1e-12, atol=1e-12)
    z = np.linspace(-15.0, 19.0, 3401)  # below torch's softplus linearisation at 20
    through = F.softplus(torch.tensor(z)).numpy()
    np.testing.assert_allclose(Neuron(K.SOFTPLUS).inverse(through), z, rtol=1e-9, atol=1e-9)
    for slope in LEAKY_SLOPES:
        through = F.leaky_relu(torch.tensor(z), negative_slope=slope).numpy()
        np.testing.assert_allclose(Neuron(K.LEAKY_RELU, negative_slope=slope).inverse(through),
                                   z, rtol=1e-14, atol=1e-14)
