"""Transfer functions against scipy/numpy references and closed-form zone edges."""

import math
import warnings

import numpy as np
import pytest
from scipy import special, stats

from actdoc.model import ActivationKind as K
from actdoc.neurons import MAX_GAIN, Neuron, logistic_saturation_edge, tanh_saturation_edge

Z = np.linspace(-30, 30, 6001)


def test_logistic_and_logit_match_scipy():
    # reference: scipy.special.expit / logit
    n = Neuron(K.LOGISTIC)
    np.testing.assert_allclose(n.output(Z), special.expit(Z), rtol=1e-12, atol=0)
    y = np.linspace(1e-9, 1 - 1e-9, 1001)
    np.testing.assert_allclose(n.inverse(y), special.logit(y), rtol=1e-9, atol=1e-12)


def test_large_inputs_raise_no_warnings_and_keep_float32():
    big = np.array([-1e30, -1e4, -100.0, 0.0, 100.0, 1e4, 1e30], dtype=np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for kind in K:
            n = Neuron(kind)
            out, gain = n.output(big), n.gain(big)
            assert out.dtype == np.float32 and gain.dtype == np.float32, kind
            assert np.isfinite(gain).all(), kind
        assert Neuron(K.LOGISTIC).inverse(np.array([0.0, 1.0])).tolist() == [-math.inf, math.inf]
        assert Neuron(K.TANH).inverse(np.array([-1.0, 1.0])).tolist() == [-math.inf, math.inf]


def test_saturation_edges():
    # derived: logistic(z) = 0.99 at z = ln 99; tanh(z) = 0.99 at z = atanh 0.99
    assert logistic_saturation_edge(0.01) == pytest.approx(math.log(99), rel=1e-12)
    assert logistic_saturation_edge(0.01) == pytest.approx(4.59512, abs=1e-5)
    assert tanh_saturation_edge(0.99) == pytest.approx(2.64665, abs=1e-5)
    zone = Neuron(K.LOGISTIC).saturation_zone(0.01, 0.99)
    assert special.expit(zone.z_high) == pytest.approx(0.99, rel=1e-12)
    zone = Neuron(K.TANH).saturation_zone(0.01, 0.99)
    assert np.tanh(zone.z_low) == pytest.approx(-0.99, rel=1e-12)


@pytest.mark.parametrize("kind", [K.LOGISTIC, K.TANH])
@pytest.mark.parametrize("share", [0.5, 0.9, 0.99])
def test_linear_zone_is_where_gain_reaches_the_share(kind, share):
    # definition: f'(z) >= share * max f'; checked on a dense grid with the scipy derivative
    n = Neuron(kind)
    zone = n.linear_zone(share)
    grid = np.linspace(-10, 10, 200001)
    if kind is K.LOGISTIC:
        s = special.expit(grid)
        gain = s * (1 - s)
    else:
        gain = 1 - np.tanh(grid) ** 2
    inside = grid[gain >= share * n.max_gain]
    assert inside.min() == pytest.approx(zone.z_low, abs=1e-4)
    assert inside.max() == pytest.approx(zone.z_high, abs=1e-4)
    assert n.output(np.array(zone.z_high)) == pytest.approx(zone.y_high, rel=1e-12)


def test_max_gains():
    # logistic: s(1-s) peaks at s = 1/2 with 1/4; tanh: 1 - tanh^2 peaks at 1 (z = 0)
    assert MAX_GAIN[K.LOGISTIC] == 0.25 and MAX_GAIN[K.TANH] == 1.0
    grid = np.linspace(-8, 8, 1600001)
    for kind in (K.LOGISTIC, K.TANH, K.SILU):
        assert Neuron(kind).gain(grid).max() == pytest.approx(MAX_GAIN[kind], rel=1e-9), kind
    # GELU' = Phi + z phi with scipy.stats.norm; peak at z = sqrt 2 (GELU'' = phi (2 - z^2))
    reference = stats.norm.cdf(grid) + grid * stats.norm.pdf(grid)
    assert reference.max() == pytest.approx(MAX_GAIN[K.GELU], rel=1e-9)
    assert grid[reference.argmax()] == pytest.approx(math.sqrt(2), abs=1e-4)


@pytest.mark.parametrize("kind", list(K))
def test_gain_is_the_derivative(kind):
    # central finite differences of f (common practice), away from kinks and the step
    n = Neuron(kind)
    z = np.linspace(-6, 6, 1201) + 0.0013
    h = 1e-6
    numeric = (n.output(z + h) - n.output(z - h)) / (2 * h)
    np.testing.assert_allclose(n.gain(z), numeric, atol=2e-6)


def test_smooth_kinds_match_reference_formulas():
    # softplus = log(1 + e^z) (numpy logaddexp); GELU = z Phi(z) with scipy.stats.norm.cdf;
    # SiLU = z expit(z) with scipy.special.expit
    np.testing.assert_allclose(Neuron(K.SOFTPLUS).output(Z), np.logaddexp(0, Z), rtol=1e-12)
    np.testing.assert_allclose(Neuron(K.GELU).output(Z), Z * stats.norm.cdf(Z), atol=5e-6)
    np.testing.assert_allclose(Neuron(K.SILU).output(Z), Z * special.expit(Z), rtol=1e-12,
                               atol=1e-300)
    np.testing.assert_allclose(Neuron(K.SOFTPLUS).gain(Z), special.expit(Z), rtol=1e-12)


@pytest.mark.parametrize("kind", [K.LINEAR, K.LOGISTIC, K.TANH, K.SOFTPLUS, K.LEAKY_RELU])
def test_inverse_round_trip(kind):
    n = Neuron(kind, negative_slope=0.2)
    z = np.linspace(-5, 5, 1001)
    np.testing.assert_allclose(n.inverse(n.output(z)), z, atol=1e-9)


def test_not_invertible_kinds_say_so():
    for kind in (K.RELU, K.THRESHOLD, K.GELU, K.SILU, K.STOCHASTIC_BINARY):
        with pytest.raises(ValueError):
            Neuron(kind).inverse(np.ones(3))


def test_threshold_and_stochastic_units():
    # a threshold unit fires when z > theta, the same as bias = -theta (docs/contract.md section 1)
    z = np.array([-1.0, 0.4, 0.5, 0.6, 2.0])
    assert Neuron(K.THRESHOLD, threshold=0.5).output(z).tolist() == [0, 0, 0, 1, 1]
    assert Neuron(K.THRESHOLD).output(z - 0.5).tolist() == [0, 0, 0, 1, 1]
    # the stochastic binary unit's firing probability is logistic(z) (scipy.special.expit)
    np.testing.assert_allclose(Neuron(K.STOCHASTIC_BINARY).output(z), special.expit(z))
