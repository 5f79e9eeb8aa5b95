"""Checks from the weights alone, for layers with no recorded activations (no probe).

A weight archive without a probe still shows three faults:

- ``rarely_fires``: a first-layer rectified (or threshold) unit whose firing probability under
  standardised inputs is below the dormant share. With inputs x ~ N(0, I) the total input
  z = w.x + b is normal with mean b and variance ||w||^2, so P(z > theta) = Phi((b - theta) /
  ||w||) (the sum of independent normals is normal: any probability handbook). It holds for
  convolution channels too (every position sees the same kernel). Deeper layers see outputs of
  earlier layers, not standardised inputs, so they are left to a forward pass over a probe.
- ``zero_weights``: incoming weights all exactly zero: the unit outputs the constant f(b)
  whatever its input.
- ``duplicate``: incoming weights and bias exactly equal to an earlier unit's: both compute the
  same function and receive the same gradient, so training can never tell them apart (the
  symmetry that random initialisation exists to break; Goodfellow, Bengio & Courville 2016,
  Deep Learning, section 8.4, from memory).

These run only on layers without activations; with recorded or computed activations the
measured checks (dead, dormant, constant) see more. They name no exclusive state.
"""

from __future__ import annotations

import math

import numpy as np

from actdoc.analysis.checks import UnitInput, UnitVerdict, unit_check
from actdoc.model import RECTIFIED_KINDS, ActivationKind

FIRING_KINDS = RECTIFIED_KINDS | {ActivationKind.THRESHOLD}
_erfc = np.frompyfunc(math.erfc, 1, 1)


def firing_probability(weight: np.ndarray, bias: np.ndarray | None,
                       threshold: float = 0.0) -> np.ndarray:
    """P(w.x + b > threshold) per unit for x ~ N(0, I): Phi((b - threshold) / ||w||).

    A unit with all-zero weights fires with probability 1 when b > threshold, else 0.
    Computed with math.erfc, exact to double precision far into the tails.
    """
    w = np.asarray(weight, np.float64).reshape(weight.shape[0], -1)
    b = np.zeros(w.shape[0]) if bias is None else np.asarray(bias, np.float64)
    norm = np.sqrt(np.einsum("ij,ij->i", w, w))
    margin = b - threshold
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(norm > 0, margin / np.where(norm > 0, norm, 1.0), 0.0)
    p = 0.5 * _erfc(-t / math.sqrt(2.0)).astype(np.float64)
    return np.where(norm > 0, p, (margin > 0).astype(np.float64))


def _parameters(unit: UnitInput) -> tuple[np.ndarray, np.ndarray | None] | None:
    """The layer's [units, fan_in] weights and bias, when this is a weights-only layer."""
    if unit.stats is not None or unit.weight is None:
        return None
    weight = np.asarray(unit.weight)
    return weight.reshape(weight.shape[0], -1), unit.bias


@unit_check("rarely_fires", kinds=FIRING_KINDS, static=True,
            cause="under standardised inputs the unit's total input z ~ N(b, ||w||^2) is "
                  "almost never above zero: its bias is strongly negative for the size of its "
                  "weights (a bias that drifted down in training, or inputs far from "
                  "standardised that the weights were fitted to)",
            remedy="run the checkpoint on a probe of real inputs (--probe FILE) to see whether "
                   "the unit is dead or dormant in use; standardise the inputs; re-initialise "
                   "the unit (actdoc repair) or lower the learning rate")
def rarely_fires(unit: UnitInput) -> UnitVerdict | None:
    found = _parameters(unit)
    if found is None or unit.info.index != 0:
        return None
    weight, bias = found
    threshold = unit.info.threshold if unit.info.kind is ActivationKind.THRESHOLD else 0.0
    p = firing_probability(weight, bias, threshold)
    limit = unit.settings.dormant_active_share
    finite = np.isfinite(weight).all(axis=1)
    return UnitVerdict(
        mask=finite & (p < limit), values=p, threshold=limit,
        phrase=(f"would fire on fewer than {limit:.1%} of standardised inputs (P(z > 0) = "
                f"Phi(b/||w||) for x ~ N(0, I), computed from the weights alone)"))


@unit_check("zero_weights", static=True,
            cause="every incoming weight is exactly zero: the unit ignores its input and "
                  "outputs the constant f(b); weights pruned or clipped to zero, or a unit "
                  "never initialised",
            remedy="re-initialise the unit's incoming weights (He et al. 2015 for rectified "
                   "kinds, Glorot & Bengio 2010 otherwise; actdoc repair does this) or remove it")
def zero_weights(unit: UnitInput) -> UnitVerdict | None:
    found = _parameters(unit)
    if found is None:
        return None
    weight, bias = found
    values = np.zeros(weight.shape[0]) if bias is None else np.asarray(bias, np.float64)
    return UnitVerdict(mask=~np.any(weight != 0, axis=1), values=values, threshold=0.0,
                       phrase="have all-zero incoming weights: each outputs the constant f(b)")


def duplicate_of(weight: np.ndarray, bias: np.ndarray | None) -> np.ndarray:
    """For each unit, the lowest index of a unit with exactly the same incoming weights and
    bias (itself when it has no twin); -1 for units with non-finite or all-zero weights."""
    rows = weight if bias is None else np.column_stack([weight, np.asarray(bias)])
    rows = np.ascontiguousarray(rows, dtype=np.float64) + 0.0  # -0.0 and 0.0 compare equal
    usable = np.isfinite(rows).all(axis=1) & np.any(weight != 0, axis=1)
    first = np.full(rows.shape[0], -1, np.int64)
    index = np.flatnonzero(usable)
    if index.size == 0:
        return first
    _, inverse = np.unique(rows[index], axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    leaders = np.full(inverse.max() + 1, np.iinfo(np.int64).max)
    np.minimum.at(leaders, inverse, index)
    first[index] = leaders[inverse]
    return first


@unit_check("duplicate", static=True,
            cause="the unit's incoming weights and bias equal an earlier unit's exactly: the "
                  "two compute the same function and get the same gradient, so training cannot "
                  "separate them (units initialised alike, or copied)",
            remedy="initialise every unit with independent random weights; re-initialise the "
                   "copies (actdoc repair) or remove them")
def duplicate(unit: UnitInput) -> UnitVerdict | None:
    found = _parameters(unit)
    if found is None:
        return None
    first = duplicate_of(*found)
    copies = (first >= 0) & (first != np.arange(first.size))
    return UnitVerdict(mask=copies, values=first.astype(np.float64), threshold=0.0,
                       phrase="duplicate an earlier unit's incoming weights and bias exactly "
                              "(each finding value is the index of the unit copied)",
                       aggregate="max")
