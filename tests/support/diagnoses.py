"""Dumps for the dashboard tests of the diagnoses added for real models: a deep logistic net
recorded with its gradients by actdoc.capture, and a spatial layer with a channel that fires
on few positions but many samples.

References: PyTorch 2.13 CPU (torch.autograd, ``z.retain_grad()``) for every gradient; the
9-layer logistic net at the Glorot scale on scikit-learn's bundled digits is the setting of
Glorot & Bengio 2010 (section 4.2), whose input-layer gradient fades by orders of magnitude.
A ReLU channel fires on a sample when any of its positions has z > 0 (common practice).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from actdoc.io.writer import write_dump

GRAD_SAMPLES = 600
DEPTH, WIDTH = 9, 32


def gradient_dump(folder: Path) -> tuple[Path, dict[str, np.ndarray]]:
    """A 9-layer Glorot logistic net on digits recorded by ``capture`` with a summed cross
    entropy; returns the dump and torch.autograd's own dL/dz per layer (``layers.0`` ...)."""
    import torch
    from sklearn.datasets import load_digits
    from sklearn.preprocessing import StandardScaler
    from torch import nn
    from torch.nn import functional as F

    from actdoc.capture import capture

    x, y = load_digits(return_X_y=True)
    x = torch.tensor(StandardScaler().fit_transform(x)[:GRAD_SAMPLES], dtype=torch.float32)
    labels = torch.tensor(y[:GRAD_SAMPLES])
    torch.manual_seed(0)
    sizes = [x.shape[1]] + [WIDTH] * (DEPTH - 1) + [10]
    model = nn.Module()
    model.layers = nn.ModuleList(nn.Linear(a, b) for a, b in zip(sizes[:-1], sizes[1:]))
    for linear in model.layers:
        nn.init.xavier_uniform_(linear.weight)
        nn.init.zeros_(linear.bias)

    def forward(inputs, keep=None):
        for i, linear in enumerate(model.layers):
            z = linear(inputs)
            if keep is not None:
                z.retain_grad()
                keep.append(z)
            inputs = torch.sigmoid(z) if i < DEPTH - 1 else z
        return inputs

    model.forward = forward
    path = folder / "deep_logistic_grad.h5"
    capture(model, x, path, batch_size=200, targets=labels,
            loss_fn=lambda out, t: F.cross_entropy(out, t, reduction="sum"))
    kept: list = []
    F.cross_entropy(forward(x, kept), labels, reduction="sum").backward()
    reference = {f"layers.{i}": z.grad.numpy().copy() for i, z in enumerate(kept)}
    return path, reference


SPATIAL_SAMPLES = 300
RARE_SAMPLES = 72  # channel 0 fires at one position on these samples: 24% of samples


def spatial_dump(folder: Path) -> tuple[Path, np.ndarray]:
    """One ReLU conv layer [samples, 4 channels, 6, 6]: channel 0 fires at one position on 24%
    of the samples (0.67% of its observations), the others on about half their positions.
    Returns the dump and the outputs."""
    rng = np.random.default_rng(21)
    z = rng.normal(0.0, 1.0, (SPATIAL_SAMPLES, 4, 6, 6)).astype(np.float32)
    z[:, 0] = -1.0 - np.abs(z[:, 0])
    rare = rng.choice(SPATIAL_SAMPLES, RARE_SAMPLES, replace=False)
    z[rare, 0, 2, 3] = 1.5
    y = np.maximum(z, 0.0)
    path = write_dump(folder / "spatial.h5", {"conv": {
        "activation": "relu", "preact": z, "output": y,
        "weight": rng.normal(0.0, np.sqrt(2 / 9), (4, 1, 3, 3)).astype(np.float32)}})
    return path, y
