"""Logistic and tanh units pinned at an asymptote, switching like binary units, or never
leaving the near-linear zone.

A saturated unit's gain f'(z) is near zero, so it passes almost no gradient back (Glorot &
Bengio 2010 observed top-layer logistic units saturating early in training); a unit that never
leaves the near-linear zone adds no nonlinearity.
"""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import UnitInput, UnitVerdict, unit_check
from actdoc.model import SQUASHING_KINDS, ActivationKind

SATURATION_REMEDY = (
    "standardise the inputs; initialise with Glorot & Bengio 2010 (std sqrt(2/(fan_in + "
    "fan_out))); lower the learning rate; add weight decay against weight growth; add a "
    "normalisation layer before the activation (Ioffe & Szegedy 2015); or switch the hidden "
    "layer to tanh (zero-centred) or a rectified kind")


def _shares(unit: UnitInput) -> tuple[np.ndarray, np.ndarray] | None:
    stats = unit.stats
    if stats.low is None:
        return None
    return unit.share(stats.low), unit.share(stats.high)


@unit_check("saturated", rank=2, kinds=SQUASHING_KINDS, critical_by_share=True,
            cause="the total input sits beyond the saturation edge on one side for almost every "
                  "sample: weights or bias grew too large (a high learning rate, no weight "
                  "decay), an initialisation scale too large, or unstandardised inputs",
            remedy=SATURATION_REMEDY)
def saturated(unit: UnitInput) -> UnitVerdict | None:
    shares = _shares(unit)
    if shares is None:
        return None
    low, high = shares
    side = np.fmax(low, high)
    limit = unit.settings.saturated_share
    mask = side >= limit
    lows = int(np.sum(mask & (low >= high)))
    return UnitVerdict(
        mask=mask, values=side, threshold=limit,
        phrase=(f"spend at least {limit:.0%} of observations saturated on one side "
                f"({lows} at the low asymptote, {int(mask.sum()) - lows} at the high one)"))


@unit_check("near_binary", rank=3, kinds=SQUASHING_KINDS | {ActivationKind.STOCHASTIC_BINARY},
            critical_by_share=True,
            cause="the total input is almost always far from zero on either side: the unit has "
                  "become a hard on/off switch (large weights, often after long training with a "
                  "high learning rate and no weight decay)",
            remedy="if a binary code is not intended: add weight decay, lower the learning rate, "
                   "standardise the inputs or add a normalisation layer (Ioffe & Szegedy 2015); "
                   "if it is intended, a binary threshold unit would do the same job")
def near_binary(unit: UnitInput) -> UnitVerdict | None:
    shares = _shares(unit)
    if shares is None:
        return None
    low, high = shares
    both = low + high
    settings = unit.settings
    mask = (both >= settings.near_binary_share) & (np.fmin(low, high) >= settings.near_binary_minority)
    return UnitVerdict(
        mask=mask, values=both, threshold=settings.near_binary_share,
        phrase=(f"are saturated on at least {settings.near_binary_share:.0%} of observations, "
                f"the rarer side on at least {settings.near_binary_minority:.0%}: they act as "
                f"binary threshold units"))


@unit_check("linear_regime", rank=4, kinds=SQUASHING_KINDS,
            cause="the total input stays within the near-linear zone around zero: weights and "
                  "inputs so small that the nonlinearity is never used (an initialisation scale "
                  "far too small, or inputs scaled down)",
            remedy="initialise at the Glorot & Bengio 2010 scale; check the input scaling; if the "
                   "layer is meant to be linear, a linear layer is cheaper and says so")
def linear_regime(unit: UnitInput) -> UnitVerdict | None:
    stats = unit.stats
    if stats.linear is None:
        return None
    limit = unit.settings.linear_regime_share
    n = stats.moments.count
    return UnitVerdict(
        mask=(n > 0) & (stats.linear >= limit * n), values=unit.share(stats.linear),
        threshold=limit,
        phrase=("never let their total input leave the near-linear zone" if limit >= 1.0 else
                f"keep their total input inside the near-linear zone on at least {limit:.0%} "
                f"of observations"))
