"""Helpers for the scale tests: one recording written whole and as uneven shards.

The arrays are synthetic demo data (random total inputs through numpy's own functions) with
planted pathologies whose verdict is known by construction: relu units whose input is shifted
far below zero never fire; logistic units shifted far above zero sit in the upper saturated zone.
"""

from __future__ import annotations

import numpy as np

SAMPLES = 9000
#: Uneven sample ranges, so shard boundaries fall inside blocks and histogram strides.
SHARD_BOUNDS = ((0, 2500), (2500, 6100), (6100, SAMPLES))
DEAD_UNITS = (0, 1, 2)
SATURATED_UNITS = (3, 7)


def logistic(z: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * z))  # the identity s(z) = (1 + tanh(z/2)) / 2


def recording(seed: int = 11) -> dict[str, dict]:
    """Three layers: dense relu, spatial (channels-first) relu conv, dense logistic."""
    rng = np.random.default_rng(seed)
    z1 = rng.normal(0.2, 1.0, (SAMPLES, 24)).astype(np.float32)
    z1[:, list(DEAD_UNITS)] -= 40.0
    z2 = rng.normal(0.0, 1.0, (SAMPLES, 4, 3, 2)).astype(np.float32)
    z3 = rng.normal(0.0, 2.0, (SAMPLES, 10)).astype(np.float32)
    z3[:, list(SATURATED_UNITS)] += 30.0
    return {
        "fc1": {"activation": "relu", "preact": z1, "output": np.maximum(z1, 0),
                "weight": rng.normal(0, 0.3, (24, 16)).astype(np.float32),
                "bias": np.zeros(24, np.float32)},
        "conv": {"activation": "relu", "preact": z2, "output": np.maximum(z2, 0),
                 "weight": rng.normal(0, 0.2, (4, 24, 1, 1)).astype(np.float32)},
        "head": {"activation": "logistic", "preact": z3, "output": logistic(z3),
                 "weight": rng.normal(0, 0.3, (10, 24)).astype(np.float32)},
    }


def sliced(layers: dict[str, dict], start: int, stop: int) -> dict[str, dict]:
    """The same layers holding samples ``start:stop`` (parameters unchanged)."""
    return {name: {key: value[start:stop] if key in ("preact", "output") else value
                   for key, value in spec.items()} for name, spec in layers.items()}
