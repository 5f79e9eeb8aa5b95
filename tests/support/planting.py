"""Planted pathologies with known ground truth, for the engine's precision and recall tests.

Outputs are computed with reference formulas (scipy.special.expit, numpy tanh/maximum, the
normal CDF from scipy.stats), not with actdoc's own transfer functions. Each planted unit sits
far from every decision edge (the margins are stated beside each role).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

from actdoc.model import ActivationKind as K

LOGISTIC_EDGE = math.log(99.0)       # logistic saturation edge for margin 0.01
TANH_EDGE = math.atanh(0.99)         # tanh saturation edge for level 0.99
LINEAR_EDGE = {K.LOGISTIC: 2 * math.atanh(math.sqrt(0.1)), K.TANH: math.atanh(math.sqrt(0.1))}
SAT_EDGE = {K.LOGISTIC: LOGISTIC_EDGE, K.TANH: TANH_EDGE, K.STOCHASTIC_BINARY: LOGISTIC_EDGE}

#: role -> check the unit must be named by ("" for healthy units)
ROLES = {
    K.RELU: ["dead", "dormant", "", "constant", "", "dead"],
    K.LEAKY_RELU: ["dead", "", "dormant", "", "constant"],
    K.LOGISTIC: ["saturated", "", "near_binary", "linear_regime", "constant", "saturated", ""],
    K.TANH: ["", "saturated", "near_binary", "linear_regime", "constant", "saturated"],
    K.THRESHOLD: ["dead", "", "constant", ""],
    K.STOCHASTIC_BINARY: ["dead", "near_binary", "", ""],
    K.LINEAR: ["", "constant", ""],
    K.SOFTPLUS: ["constant", "", ""],
    K.GELU: ["", "", "constant"],
    K.SILU: ["constant", ""],
}


def reference_output(kind: K, z: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    if kind is K.RELU:
        return np.maximum(z, 0)
    if kind is K.LEAKY_RELU:
        return np.where(z > 0, z, 0.01 * z)
    if kind is K.LOGISTIC:
        return special.expit(z)
    if kind is K.TANH:
        return np.tanh(z)
    if kind is K.THRESHOLD:
        return (z > 0).astype(np.float64)
    if kind is K.STOCHASTIC_BINARY:
        return (rng.random(z.shape) < special.expit(z)).astype(np.float64)
    if kind is K.SOFTPLUS:
        return np.logaddexp(0, z)
    if kind is K.GELU:
        return z * stats.norm.cdf(z)
    if kind is K.SILU:
        return z * special.expit(z)
    return z


def planted_preact(kind: K, role: str, rows: int, slot: int, rng) -> np.ndarray:
    """Total inputs of one unit playing ``role`` (slot varies the healthy units' spread)."""
    e = SAT_EDGE.get(kind, 1.0)
    if role == "dead":  # 3 below zero at least (rectified, threshold) / p < 2e-6 (stochastic)
        return -(3 * e) - np.abs(rng.normal(0, 0.5, rows))
    if role == "dormant":  # 0.5% of rows at +1, the rest at least 1 below zero; the active
        # rows are consecutive, so a spatial unit fires on 0.5% of samples too (docs/checks.md)
        z = -1 - np.abs(rng.normal(0, 1, rows))
        z[:rows // 200] = 1.0
        return z
    if role == "saturated":  # twice the edge, on the side of the slot's parity
        side = 1 if slot % 2 else -1
        return side * (2 * e + np.abs(rng.normal(0, 0.2 * e, rows)))
    if role == "near_binary":  # 30% / 70% split at twice the edge
        sign = np.where(rng.random(rows) < 0.3, -1.0, 1.0)
        return sign * (2 * e + np.abs(rng.normal(0, 0.2 * e, rows)))
    if role == "linear_regime":  # within half the near-linear edge
        half = 0.5 * LINEAR_EDGE[kind]
        return np.clip(rng.normal(0, 0.3 * half, rows), -half, half)
    if role == "constant":
        return np.full(rows, 1.5 if kind not in SAT_EDGE else 0.3 * e)
    return rng.normal(0.2 * (slot % 3), 0.4 * e if kind in SAT_EDGE else 1.0 + 0.1 * slot, rows)


def plant(kind: K, dtype=np.float32, spatial: tuple[int, ...] = (), arrays=("preact", "output"),
          observations: int = 2000, seed: int = 0):
    """A layer spec for ``dump_from_arrays`` and the planted truth {check: set of units}."""
    rng = np.random.default_rng(seed)
    roles = ROLES[kind]
    z = np.stack([planted_preact(kind, role, observations, i, rng)
                  for i, role in enumerate(roles)], axis=1)
    if kind is K.STOCHASTIC_BINARY and arrays == ("output",):
        roles = ["dead", "", "constant", ""]  # no firing probability without z
        y = (rng.random(z.shape) < 0.5).astype(np.float64)
        y[:, 0], y[:, 2] = 0.0, 1.0
    else:
        y = reference_output(kind, z, rng)
    positions = math.prod(spatial)
    samples = observations // positions

    def layout(values):
        cast = values.astype(dtype)
        if spatial:
            cast = np.moveaxis(cast.reshape(samples, *spatial, len(roles)), -1, 1)
        return np.ascontiguousarray(cast)

    spec = {"activation": kind.value}
    if "preact" in arrays:
        spec["preact"] = layout(z)
    if "output" in arrays:
        spec["output"] = layout(y)
    truth: dict[str, set[int]] = {}
    for unit, role in enumerate(roles):
        if role:
            truth.setdefault(role, set()).add(unit)
    return spec, truth
