"""The demo trainer against outside references: finite differences, scipy, scikit-learn, the
initialisers' published formulas and Adam's published update."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import special, stats

from demo_models.scenario import make_split
from demo_models.trainer import (
    INITIALISERS,
    KINDS,
    LOSSES,
    MLP,
    SGD,
    Adam,
    accuracy,
    activate,
    output_loss,
    train,
)


def small_net(kind: str, loss: str, seed: int = 0) -> MLP:
    """Two hidden layers of ``kind``; the output is linear for cross-entropy, ``kind`` for MSE."""
    output_kind = "linear" if loss == "softmax_cross_entropy" else kind
    return MLP((4, 5, 4, 3), [kind, kind, output_kind], rng=np.random.default_rng(seed),
               init="glorot_uniform", bias=0.1)


def batch(loss: str, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    x = rng.normal(size=(6, 4))
    targets = rng.integers(0, 3, 6) if loss == "softmax_cross_entropy" else rng.normal(size=(6, 3))
    return x, targets


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("kind", KINDS)
def test_backprop_matches_central_differences(kind, loss):
    # Central differences, (L(p + h) - L(p - h)) / 2h, have truncation error O(h^2) and
    # rounding error about 1e-16 / h; in float64 with h = 1e-6 both stay near 1e-10, so the
    # analytic gradient must agree to 1e-5 relative, 1e-8 absolute (common practice).
    rng = np.random.default_rng(1)
    model = small_net(kind, loss)
    x, targets = batch(loss, rng)
    _, grads = model.loss_and_gradients(x, targets, loss)
    h = 1e-6
    for param, grad in zip(model.parameters(), grads):
        assert grad.shape == param.shape
        numeric = np.zeros_like(param)
        for index in np.ndindex(param.shape):
            saved = param[index]
            param[index] = saved + h
            up, _ = model.loss_and_gradients(x, targets, loss)
            param[index] = saved - h
            down, _ = model.loss_and_gradients(x, targets, loss)
            param[index] = saved
            numeric[index] = (up - down) / (2 * h)
        np.testing.assert_allclose(grad, numeric, rtol=1e-5, atol=1e-8)
        assert np.abs(grad).max() > 1e-4  # the check is not vacuous: gradients are not ~0


def test_cross_entropy_matches_scikit_learn_log_loss():
    from sklearn.metrics import log_loss

    rng = np.random.default_rng(3)
    logits = rng.normal(scale=4.0, size=(50, 3))
    labels = rng.integers(0, 3, 50)
    value, grad = output_loss(logits, labels, "softmax_cross_entropy")
    # scikit-learn's log_loss on scipy's softmax probabilities is the reference value.
    assert value == pytest.approx(log_loss(labels, special.softmax(logits, axis=1),
                                           labels=[0, 1, 2]), rel=1e-12)
    # d/dlogits of mean cross-entropy is (softmax - one_hot) / samples (a textbook identity).
    expected = (special.softmax(logits, axis=1) - np.eye(3)[labels]) / 50
    np.testing.assert_allclose(grad, expected, rtol=1e-12, atol=1e-15)


def test_mse_matches_scikit_learn():
    from sklearn.metrics import mean_squared_error

    rng = np.random.default_rng(4)
    y, t = rng.normal(size=(40, 3)), rng.normal(size=(40, 3))
    value, _ = output_loss(y, t, "mse")
    # ours is 0.5 * sum over outputs, mean over samples; scikit-learn's is the mean over both.
    assert value == pytest.approx(0.5 * 3 * mean_squared_error(t, y), rel=1e-12)


def test_transfer_functions_match_scipy_and_numpy():
    z = np.linspace(-800.0, 800.0, 4001)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # large |z| must neither overflow nor warn
        logistic = activate("logistic", z)
    # scipy flushes the far tail to 0 where ours keeps subnormals; both are 0 to 1e-300.
    np.testing.assert_allclose(logistic, special.expit(z), rtol=1e-14, atol=1e-300)
    np.testing.assert_array_equal(activate("tanh", z), np.tanh(z))
    np.testing.assert_array_equal(activate("relu", z), np.maximum(z, 0))
    np.testing.assert_allclose(activate("leaky_relu", z, 0.2), np.where(z > 0, z, 0.2 * z))


@pytest.mark.parametrize("name, reference", [
    # He et al. 2015 (ICCV), eq. 10: zero-mean Gaussian with std sqrt(2 / fan_in).
    ("he_normal", lambda fan_in, units: stats.norm(0.0, np.sqrt(2.0 / fan_in))),
    # Glorot & Bengio 2010 (AISTATS), eq. 16: U[-sqrt(6/(fan_in+fan_out)), +sqrt(...)].
    ("glorot_uniform", lambda fan_in, units: stats.uniform(
        -np.sqrt(6.0 / (fan_in + units)), 2 * np.sqrt(6.0 / (fan_in + units)))),
    # Glorot & Bengio 2010, eq. 1: the standard heuristic U[-1/sqrt(n), 1/sqrt(n)].
    ("old_uniform", lambda fan_in, units: stats.uniform(-1 / np.sqrt(fan_in), 2 / np.sqrt(fan_in))),
])
def test_initialisers_follow_their_published_distributions(name, reference):
    units, fan_in = 300, 120
    weights = INITIALISERS[name](np.random.default_rng(5), units, fan_in)
    assert weights.shape == (units, fan_in)
    # Kolmogorov-Smirnov against the exact distribution (scipy.stats): accepted ...
    assert stats.kstest(weights.ravel(), reference(fan_in, units).cdf).pvalue > 1e-3
    # ... while the same draw rescaled by 10% is rejected, so the test has power.
    assert stats.kstest(1.1 * weights.ravel(), reference(fan_in, units).cdf).pvalue < 1e-6


def test_adam_first_step_moves_every_parameter_by_the_rate():
    # Kingma & Ba 2015, section 2.1: with bias correction the first step is
    # lr * m_hat / sqrt(v_hat) = lr * g / |g|, so each parameter moves by lr against its gradient.
    rng = np.random.default_rng(6)
    params = [rng.normal(size=(3, 4)), rng.normal(size=3)]
    before = [p.copy() for p in params]
    grads = [rng.normal(size=(3, 4)), rng.normal(size=3)]
    Adam(lr=0.01).step(params, grads)
    for p, b, g in zip(params, before, grads):
        np.testing.assert_allclose(p - b, -0.01 * np.sign(g), rtol=1e-6)


def test_sgd_momentum_follows_the_heavy_ball_recurrence():
    # v <- mu v - lr g; p <- p + v (Polyak's heavy ball; equal to PyTorch's SGD with momentum
    # for a constant rate, from memory of its documentation).
    p = [np.array([1.0, -2.0])]
    g1, g2 = np.array([0.5, 1.0]), np.array([-1.0, 0.25])
    optimizer = SGD(lr=0.1, momentum=0.9)
    optimizer.step(p, [g1])
    optimizer.step(p, [g2])
    expected = np.array([1.0, -2.0]) - 0.1 * g1 - 0.1 * (0.9 * g1 + g2)
    np.testing.assert_allclose(p[0], expected, rtol=1e-14)


def test_training_is_deterministic_for_a_seed():
    data = make_split(600, 100, seed=3)

    def run(seed):
        rng = np.random.default_rng(seed)
        model = MLP((7, 16, 3), ["relu", "linear"], rng=rng)
        train(model, Adam(1e-2), data.train_x, data.train_labels, rng=rng, epochs=3, batch_size=32)
        return model.parameters()

    first, again, other = run(11), run(11), run(12)
    for a, b in zip(first, again):
        np.testing.assert_array_equal(a, b)
    assert not all(np.array_equal(a, c) for a, c in zip(first, other))


def test_trainer_learns_as_well_as_scikit_learn_on_the_scenario():
    """Same task, same architecture, same optimiser settings: scikit-learn's MLPClassifier is
    the reference; our accuracy on held-out rows must be within 3 points of it."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPClassifier

    data = make_split(4000, 1000, seed=21)
    rng = np.random.default_rng(0)
    model = MLP((7, 64, 64, 3), ["relu", "relu", "linear"], rng=rng)
    train(model, Adam(1e-3), data.train_x, data.train_labels, rng=rng, epochs=20, batch_size=64)
    ours = accuracy(model, data.probe_x, data.probe_labels)

    reference = MLPClassifier(hidden_layer_sizes=(64, 64), activation="relu", solver="adam",
                              learning_rate_init=1e-3, batch_size=64, max_iter=20, alpha=0.0,
                              random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        reference.fit(data.train_x, data.train_labels)
    theirs = reference.score(data.probe_x, data.probe_labels)
    majority = np.bincount(data.probe_labels).max() / len(data.probe_labels)
    assert theirs > majority + 0.2  # the reference itself learned the task
    assert ours >= theirs - 0.03


def test_record_and_dump_layers_hold_the_forward_pass():
    rng = np.random.default_rng(7)
    model = MLP((3, 4, 2), ["leaky_relu", "linear"], rng=rng, negative_slope=0.2)
    x = rng.normal(size=(5, 3))
    recorded = model.record(x)
    z = x @ model.layers[0].weight.T + model.layers[0].bias
    np.testing.assert_allclose(recorded["hidden1"].preact, z)
    np.testing.assert_allclose(recorded["hidden1"].output, np.where(z > 0, z, 0.2 * z))
    layers = model.dump_layers(x)
    assert list(layers) == ["hidden1", "output"]
    assert layers["hidden1"]["negative_slope"] == 0.2
    assert layers["hidden1"]["weight"].shape == (4, 3) and layers["output"]["preact"].shape == (5, 2)
    assert all(a.dtype == np.float32 for spec in layers.values() for a in spec.values()
               if isinstance(a, np.ndarray))
