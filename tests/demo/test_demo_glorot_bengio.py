"""Glorot & Bengio 2010 (AISTATS), Figure 2, reproduced at small scale with the demo trainer.

The paper trains logistic networks with four hidden layers of 1000 units, initialised with the
standard U[-1/sqrt(n), 1/sqrt(n)], and plots each hidden layer's mean output during training:
the top hidden layer's mean drops quickly towards 0 (it saturates) while the lower layers stay
around 0.5. Here: four hidden layers of 64 units on the greenhouse scenario, plain SGD at rate 2
(a usual rate for logistic networks trained by mini-batch SGD, from memory), batches of 32.
"""

from __future__ import annotations

import numpy as np
import pytest

from demo_models.generate import DATA_SEED, PROBE_ROWS, TRAIN_ROWS
from demo_models.scenario import make_split
from demo_models.trainer import MLP, SGD, train

HIDDEN = ("hidden1", "hidden2", "hidden3", "hidden4")


@pytest.fixture(scope="module")
def data():
    return make_split(TRAIN_ROWS, PROBE_ROWS, DATA_SEED)


def mean_outputs(model: MLP, x: np.ndarray) -> list[float]:
    recorded = model.record(x)
    return [float(recorded[name].output.mean()) for name in HIDDEN]


def trace(data, seed: int, epochs: int = 3) -> list[list[float]]:
    """Each hidden layer's mean output on the probe rows, at start and after each epoch."""
    rng = np.random.default_rng(seed)
    model = MLP((7, 64, 64, 64, 64, 3), ["logistic"] * 4 + ["linear"], rng=rng,
                init="old_uniform")
    means = [mean_outputs(model, data.probe_x)]
    train(model, SGD(2.0), data.train_x, data.train_labels, rng=rng, epochs=epochs,
          batch_size=32, after_epoch=lambda _, m: means.append(mean_outputs(m, data.probe_x)))
    return means


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_top_hidden_layer_is_driven_to_zero_while_lower_layers_stay_near_half(data, seed):
    means = np.array(trace(data, seed))
    # At initialisation every layer's mean output is close to 0.5 (small weights, zero biases).
    np.testing.assert_allclose(means[0], 0.5, atol=0.05)
    # Early in training (within three epochs) the top layer's mean falls close to 0 ...
    lowest = int(np.argmin(means[:, 3]))
    assert means[lowest, 3] < 0.05
    # ... while the three lower layers stay near or above 0.5 at that moment.
    assert np.all(means[lowest, :3] > 0.4)
