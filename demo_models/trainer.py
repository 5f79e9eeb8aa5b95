"""A small numpy-only multilayer perceptron trainer for the demo networks.

The demos must be real trained networks that develop their pathologies the way they do in
practice, yet regenerate in seconds on a laptop without any deep-learning framework. So this
module keeps to the essentials: dense layers, five transfer functions, backpropagation, two
losses, SGD (with optional momentum and weight decay) and Adam, and the classic initialisers.
Everything is driven by one seeded ``numpy.random.Generator``, so a run is fully deterministic.

Weights follow the dump layout: ``weight`` is ``[units, fan_in]`` and a layer computes
``z = x @ weight.T + bias`` and ``y = f(z)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, NamedTuple, Sequence

import numpy as np

KINDS = ("relu", "leaky_relu", "logistic", "tanh", "linear")
LOSSES = ("softmax_cross_entropy", "mse")


def unknown_kind(kind: str) -> ValueError:
    return ValueError(f"unknown layer kind '{kind}'; the trainer knows {', '.join(KINDS)}")


def activate(kind: str, z: np.ndarray, negative_slope: float = 0.01) -> np.ndarray:
    """The transfer function ``f(z)`` of a kind."""
    if kind == "relu":
        return np.maximum(z, 0.0)
    if kind == "leaky_relu":
        return np.where(z > 0, z, negative_slope * z)
    if kind == "logistic":
        # exp of a non-positive number only, so large |z| neither overflows nor warns
        e = np.exp(-np.abs(z))
        return np.where(z >= 0, 1.0 / (1.0 + e), e / (1.0 + e))
    if kind == "tanh":
        return np.tanh(z)
    if kind == "linear":
        return z.copy()
    raise unknown_kind(kind)


def derivative(kind: str, z: np.ndarray, y: np.ndarray, negative_slope: float = 0.01) -> np.ndarray:
    """``f'(z)``, using the already computed output ``y = f(z)`` where that is cheaper."""
    if kind == "relu":
        return (z > 0).astype(z.dtype)
    if kind == "leaky_relu":
        return np.where(z > 0, 1.0, negative_slope).astype(z.dtype)
    if kind == "logistic":
        return y * (1.0 - y)
    if kind == "tanh":
        return 1.0 - y * y
    if kind == "linear":
        return np.ones_like(z)
    raise unknown_kind(kind)


# --- initialisers: each returns a [units, fan_in] weight matrix --------------------------------

def he_normal(rng: np.random.Generator, units: int, fan_in: int) -> np.ndarray:
    """N(0, 2 / fan_in): keeps the second moment of rectified outputs constant across depth
    (He et al. 2015, "Delving deep into rectifiers", equation 10)."""
    return rng.normal(0.0, np.sqrt(2.0 / fan_in), size=(units, fan_in))


def glorot_uniform(rng: np.random.Generator, units: int, fan_in: int) -> np.ndarray:
    """U[-sqrt(6 / (fan_in + fan_out)), +...]: the "normalized initialization" of Glorot and
    Bengio 2010, equation 16, balancing forward and backward variance for tanh-like units."""
    limit = np.sqrt(6.0 / (fan_in + units))
    return rng.uniform(-limit, limit, size=(units, fan_in))


def old_uniform(rng: np.random.Generator, units: int, fan_in: int) -> np.ndarray:
    """U[-1/sqrt(fan_in), 1/sqrt(fan_in)]: the long-standard heuristic that Glorot and Bengio
    2010 (equation 1) studied; its output variance shrinks by a third per layer."""
    limit = 1.0 / np.sqrt(fan_in)
    return rng.uniform(-limit, limit, size=(units, fan_in))


INITIALISERS: dict[str, Callable[[np.random.Generator, int, int], np.ndarray]] = {
    "he_normal": he_normal,
    "glorot_uniform": glorot_uniform,
    "old_uniform": old_uniform,
}


@dataclass
class Dense:
    """One fully connected layer: parameters in the dump layout plus its transfer function."""

    name: str
    kind: str
    weight: np.ndarray
    bias: np.ndarray
    negative_slope: float = 0.01


class Recording(NamedTuple):
    """A layer's total input ``preact`` and output ``output`` on a batch, ``[samples, units]``."""

    preact: np.ndarray
    output: np.ndarray


class MLP:
    """A stack of dense layers; the last is usually ``linear`` (logits or regression output).

    ``sizes`` lists the input width then every layer's units; ``kinds`` has one entry per
    layer. ``init`` names an initialiser of ``INITIALISERS`` (one for all layers, or one per
    layer) and ``bias`` is the constant every bias starts at (one value or one per layer).
    """

    def __init__(
        self,
        sizes: Sequence[int],
        kinds: Sequence[str],
        *,
        rng: np.random.Generator,
        init: str | Sequence[str] = "he_normal",
        bias: float | Sequence[float] = 0.0,
        negative_slope: float = 0.01,
        names: Sequence[str] | None = None,
    ):
        if len(kinds) != len(sizes) - 1:
            raise ValueError(f"{len(sizes) - 1} layers need {len(sizes) - 1} kinds, got {len(kinds)}")
        depth = len(kinds)
        inits = [init] * depth if isinstance(init, str) else list(init)
        biases = [bias] * depth if np.isscalar(bias) else list(bias)
        if names is None:
            names = [f"hidden{i + 1}" for i in range(depth - 1)] + ["output"]
        self.layers: list[Dense] = []
        for i, kind in enumerate(kinds):
            if kind not in KINDS:
                raise unknown_kind(kind)
            weight = INITIALISERS[inits[i]](rng, sizes[i + 1], sizes[i])
            self.layers.append(Dense(
                name=names[i], kind=kind, weight=weight,
                bias=np.full(sizes[i + 1], float(biases[i])), negative_slope=negative_slope,
            ))

    def parameters(self) -> list[np.ndarray]:
        """Every trainable array, in the order ``loss_and_gradients`` returns their gradients."""
        return [p for layer in self.layers for p in (layer.weight, layer.bias)]

    def forward(self, x: np.ndarray) -> list[Recording]:
        """Every layer's ``(preact, output)`` on ``x``, in forward order."""
        trace = []
        for layer in self.layers:
            z = x @ layer.weight.T + layer.bias
            x = activate(layer.kind, z, layer.negative_slope)
            trace.append(Recording(z, x))
        return trace

    def predict(self, x: np.ndarray) -> np.ndarray:
        return self.forward(x)[-1].output

    def record(self, x: np.ndarray) -> dict[str, Recording]:
        """Per-layer pre-activations and outputs on a probe batch, keyed by layer name."""
        return {layer.name: rec for layer, rec in zip(self.layers, self.forward(x))}

    def dump_layers(self, x: np.ndarray, dtype: type = np.float32) -> dict[str, dict]:
        """The layer mapping ``actdoc.io.writer.write_dump`` takes, recorded on ``x``."""
        out = {}
        for layer, rec in zip(self.layers, self.forward(x)):
            spec = {
                "activation": layer.kind,
                "weight": layer.weight.astype(dtype),
                "bias": layer.bias.astype(dtype),
                "preact": rec.preact.astype(dtype),
                "output": rec.output.astype(dtype),
            }
            if layer.kind == "leaky_relu":
                spec["negative_slope"] = layer.negative_slope
            out[layer.name] = spec
        return out

    def loss_and_gradients(
        self, x: np.ndarray, targets: np.ndarray, loss: str
    ) -> tuple[float, list[np.ndarray]]:
        """Mean loss over the batch and its gradient for every array of ``parameters()``.

        ``softmax_cross_entropy`` takes integer class labels and applies the softmax to the last
        layer's output; ``mse`` takes a ``[samples, outputs]`` target and averages
        ``0.5 * sum((y - t)**2)`` over samples.
        """
        trace = self.forward(x)
        value, delta_y = output_loss(trace[-1].output, targets, loss)
        grads: list[np.ndarray] = []
        inputs = [x] + [rec.output for rec in trace[:-1]]
        for layer, rec, layer_input in zip(reversed(self.layers), reversed(trace), reversed(inputs)):
            delta_z = delta_y * derivative(layer.kind, rec.preact, rec.output, layer.negative_slope)
            grads.append(delta_z.sum(axis=0))
            grads.append(delta_z.T @ layer_input)
            delta_y = delta_z @ layer.weight
        grads.reverse()
        return value, grads


def output_loss(y: np.ndarray, targets: np.ndarray, loss: str) -> tuple[float, np.ndarray]:
    """Mean loss of outputs ``y`` and its gradient with respect to ``y``."""
    samples = y.shape[0]
    if loss == "softmax_cross_entropy":
        shifted = y - y.max(axis=1, keepdims=True)
        log_norm = np.log(np.exp(shifted).sum(axis=1, keepdims=True))
        log_prob = shifted - log_norm
        labels = np.asarray(targets, dtype=int)
        value = -log_prob[np.arange(samples), labels].mean()
        grad = np.exp(log_prob)
        grad[np.arange(samples), labels] -= 1.0
        return float(value), grad / samples
    if loss == "mse":
        diff = y - targets
        return float(0.5 * (diff * diff).sum() / samples), diff / samples
    raise ValueError(f"unknown loss '{loss}'; the trainer knows {', '.join(LOSSES)}")


class SGD:
    """Mini-batch gradient descent, with optional heavy-ball momentum and L2 weight decay."""

    def __init__(self, lr: float, momentum: float = 0.0, weight_decay: float = 0.0):
        self.lr, self.momentum, self.weight_decay = lr, momentum, weight_decay
        self._velocity: list[np.ndarray] | None = None

    def step(self, params: list[np.ndarray], grads: list[np.ndarray]) -> None:
        if self._velocity is None:
            self._velocity = [np.zeros_like(p) for p in params]
        for p, g, v in zip(params, grads, self._velocity):
            if self.weight_decay:
                g = g + self.weight_decay * p
            v *= self.momentum
            v -= self.lr * g
            p += v


class Adam:
    """Adam (Kingma and Ba 2015, Algorithm 1), with optional L2 weight decay on the gradient."""

    def __init__(self, lr: float = 1e-3, beta1: float = 0.9, beta2: float = 0.999,
                 eps: float = 1e-8, weight_decay: float = 0.0):
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps
        self.weight_decay = weight_decay
        self._moments: list[tuple[np.ndarray, np.ndarray]] | None = None
        self._t = 0

    def step(self, params: list[np.ndarray], grads: list[np.ndarray]) -> None:
        if self._moments is None:
            self._moments = [(np.zeros_like(p), np.zeros_like(p)) for p in params]
        self._t += 1
        correction1 = 1.0 - self.beta1 ** self._t
        correction2 = 1.0 - self.beta2 ** self._t
        for p, g, (m, v) in zip(params, grads, self._moments):
            if self.weight_decay:
                g = g + self.weight_decay * p
            m *= self.beta1
            m += (1.0 - self.beta1) * g
            v *= self.beta2
            v += (1.0 - self.beta2) * g * g
            p -= self.lr * (m / correction1) / (np.sqrt(v / correction2) + self.eps)


def train(
    model: MLP,
    optimizer: SGD | Adam,
    x: np.ndarray,
    targets: np.ndarray,
    *,
    rng: np.random.Generator,
    epochs: int,
    batch_size: int,
    loss: str = "softmax_cross_entropy",
    schedule: Callable[[int], float] | None = None,
    after_epoch: Callable[[int, MLP], None] | None = None,
) -> list[float]:
    """Train for ``epochs`` passes over shuffled mini-batches; returns each epoch's mean loss.

    ``schedule(epoch)`` sets the optimizer's rate at the start of each epoch; ``after_epoch``
    sees the model after each epoch (used to record checkpoints and activation traces).
    """
    history = []
    params = model.parameters()
    for epoch in range(epochs):
        if schedule is not None:
            optimizer.lr = schedule(epoch)
        order = rng.permutation(len(x))
        total = 0.0
        for start in range(0, len(x), batch_size):
            batch = order[start:start + batch_size]
            value, grads = model.loss_and_gradients(x[batch], targets[batch], loss)
            optimizer.step(params, grads)
            total += value * len(batch)
        history.append(total / len(x))
        if after_epoch is not None:
            after_epoch(epoch, model)
    return history


def accuracy(model: MLP, x: np.ndarray, labels: np.ndarray) -> float:
    """Share of samples whose largest output is the true class."""
    return float((model.predict(x).argmax(axis=1) == labels).mean())
