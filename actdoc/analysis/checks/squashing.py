"""Logistic and tanh units pinned at an asymptote, switching like binary units, or never
leaving the near-linear zone.

A saturated unit's gain f'(z) is near zero, so it passes almost no gradient back (Glorot &
Bengio 2010 observed top-layer logistic units saturating early in training); a unit that never
leaves the near-linear zone adds no nonlinearity.
"""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import (
    LayerInput,
    LayerVerdict,
    UnitInput,
    UnitVerdict,
    layer_check,
    unit_check,
)
from actdoc.model import SQUASHING_KINDS, ActivationKind, Severity


def _saturation_remedy(init: str, switch: str) -> str:
    return ("standardise the inputs; " + init + "; lower the learning rate; add weight decay "
            "against weight growth; add a normalisation layer before the activation (Ioffe & "
            "Szegedy 2015); or switch the hidden layer to " + switch)


SATURATION_REMEDY = _saturation_remedy(
    "initialise logistic layers at 4 times the Glorot & Bengio 2010 scale (std 4 sqrt(2/(fan_in "
    "+ fan_out)); the logistic's slope at 0 is 1/4), not above it",
    "tanh (zero-centred) or a rectified kind")
TANH_SATURATION_REMEDY = _saturation_remedy(
    "initialise with Glorot & Bengio 2010 (std sqrt(2/(fan_in + fan_out)))", "a rectified kind")
SATURATION_CAUSE = (
    "the total input sits beyond the saturation edge for almost every sample: weights or bias "
    "grew too large (a high learning rate, no weight decay), an initialisation scale too large, "
    "or unstandardised inputs")
INPUT_REMEDY = ("standardise each input feature with the training set's mean and standard "
                "deviation (and the probe batch the same way); the first layer's weights can "
                "then stay at their reference scale")
BIAS_REMEDY = ("lower the learning rate; normalisation layers (Ioffe & Szegedy 2015) keep the "
               "bias from having to push that far; larger weights will not help")
LOGISTIC_BIAS_REMEDY = BIAS_REMEDY + ("; a zero-centred hidden activation (tanh) saturates less "
                                      "at the top of a deep net (Glorot & Bengio 2010)")


def saturation_advice(kind: ActivationKind) -> tuple[str, str] | None:
    """Tanh layers are not told to switch to tanh."""
    if kind is ActivationKind.TANH:
        return SATURATION_CAUSE, TANH_SATURATION_REMEDY
    return None


def saturation_story(context, info, settings) -> tuple[str | None, str | None]:
    """The saturation cause (and remedy) the data points to: unstandardised inputs for the
    first layer when the probe shows them; the bias when the layer's weights are not large;
    else (None, None): the registered text."""
    index = info.index
    probe = context.probe
    if index == 0 and probe is not None and probe.stored and probe.features:
        varies = probe.feature_std > 0
        rms = np.sqrt(probe.feature_mean ** 2 + probe.feature_std ** 2)[varies]
        if rms.size and float(rms.max()) > settings.input_scale_limit:
            return (f"the inputs are not standardised (input feature RMS up to "
                    f"{float(rms.max()):.3g}, see the probe_scale finding): total inputs of the "
                    f"first layer are as large as the raw feature values make them",
                    INPUT_REMEDY)
    ratios = context.weight_ratios
    ratio = ratios[index] if index < len(ratios) else None
    if ratio is None or ratio > 1.0:
        return None, None
    return (f"the incoming weights are not large ({ratio:.3g} times the reference scale for the "
            f"kind), so the bias (or the mean of the inputs) pushes the total input past the "
            f"saturation edge: Glorot & Bengio 2010 (Figure 2) saw the top logistic layer of a "
            f"deep net driven to 0 this way early in training, while the layers below still "
            f"gave it little to work with",
            BIAS_REMEDY if info.kind is ActivationKind.TANH else LOGISTIC_BIAS_REMEDY)


def _shares(unit: UnitInput) -> tuple[np.ndarray, np.ndarray] | None:
    stats = unit.stats
    if stats.low is None:
        return None
    return unit.share(stats.low), unit.share(stats.high)


def _binary_mask(low: np.ndarray, high: np.ndarray, settings) -> np.ndarray:
    """Units saturated on at least ``near_binary_share`` with the rarer side on at least
    ``near_binary_minority``: they switch between the asymptotes like binary units."""
    with np.errstate(invalid="ignore"):
        return ((low + high >= settings.near_binary_share)
                & (np.fmin(low, high) >= settings.near_binary_minority))


@unit_check("saturated", rank=2, kinds=SQUASHING_KINDS, critical_by_share=True,
            label_column="saturation_side", cause=SATURATION_CAUSE, remedy=SATURATION_REMEDY,
            advise=saturation_advice)
def saturated(unit: UnitInput) -> UnitVerdict | None:
    """Saturated on either side, the two sides together at ``saturated_share`` (a unit 94.5% at
    one asymptote and 3.3% at the other passes as little gradient as one 97.8% at one), unless
    the rarer side is large enough for the unit to be near-binary."""
    shares = _shares(unit)
    if shares is None:
        return None
    low, high = shares
    both = low + high
    limit = unit.settings.saturated_share
    with np.errstate(invalid="ignore"):
        mask = (both >= limit) & ~_binary_mask(low, high, unit.settings)
        labels = np.where(low >= limit, "low", np.where(high >= limit, "high", "both"))
    labels = np.where(mask, labels, "")
    lows, highs = int(np.sum(labels == "low")), int(np.sum(labels == "high"))
    split = int(mask.sum()) - lows - highs
    cause, remedy = saturation_story(unit.context, unit.info, unit.settings)
    return UnitVerdict(
        mask=mask, values=both, threshold=limit, labels=labels, cause=cause, remedy=remedy,
        phrase=(f"spend at least {limit:.0%} of observations in the saturated zone ({lows} at "
                f"the low asymptote, {highs} at the high one, {split} split across both sides)"))


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
    settings = unit.settings
    return UnitVerdict(
        mask=_binary_mask(low, high, settings), values=low + high,
        threshold=settings.near_binary_share,
        phrase=(f"are saturated on at least {settings.near_binary_share:.0%} of observations, "
                f"the rarer side on at least {settings.near_binary_minority:.0%}: they act as "
                f"binary threshold units"))


@unit_check("linear_regime", rank=4, kinds=SQUASHING_KINDS,
            cause="the total input stays within the near-linear zone around zero: weights and "
                  "inputs so small that the nonlinearity is never used (an initialisation scale "
                  "far too small, or inputs scaled down)",
            remedy="initialise at the Glorot & Bengio 2010 scale (4 times it for the logistic, "
                   "whose slope at 0 is 1/4); check the input scaling; if the layer is meant to "
                   "be linear, a linear layer is cheaper and says so")
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


@layer_check("saturated_layer", kinds=SQUASHING_KINDS,
             cause="most of the layer's total inputs, pooled over units and samples, lie in the "
                   "saturated zone, so the layer passes little gradient back whichever units hold "
                   "them (Glorot & Bengio 2010 saw logistic layers saturate this way): weights "
                   "too large for the inputs, or unstandardised inputs",
             remedy=SATURATION_REMEDY)
def saturated_layer(layer: LayerInput) -> LayerVerdict | None:
    """The pooled share of saturated observations, or the layer's gradient gain, past a limit.

    A unit check can miss a layer whose units are each saturated on, say, 90% of samples; the
    gradient through the layer is still cut to a few percent. Critical when both hold.
    """
    stats, settings = layer.stats, layer.settings
    if stats is None or stats.low is None:
        return None
    observations = float(stats.moments.count.sum())
    if observations == 0:
        return None
    pooled = float(stats.low.sum() + stats.high.sum()) / observations
    gain = layer.gradient_gain
    many = pooled >= settings.layer_saturated_share
    weak = gain is not None and gain < settings.low_gradient_gain
    if not (many or weak):
        return None
    gain_text = "not measured" if gain is None else f"{gain:.3g} of its peak"
    cause, remedy = saturation_story(layer.context, layer.info, settings)
    if remedy is None and layer.info.kind is ActivationKind.TANH:
        remedy = TANH_SATURATION_REMEDY
    return LayerVerdict(
        pooled, settings.layer_saturated_share,
        f"{pooled:.1%} of all total inputs (units x observations) lie in the saturated zone "
        f"(limit {settings.layer_saturated_share:.0%}); the mean gradient gain f'(z) is "
        f"{gain_text} (limit {settings.low_gradient_gain:g})",
        severity=Severity.CRITICAL if many and weak else Severity.WARNING, remedy=remedy,
        cause=cause)
