"""Layer-level scale checks: the signal across depth, and the incoming weights' scale.

He et al. 2015 (ICCV, section 2.2) show that with Var(w) = 1/fan_in a ReLU layer halves the
second moment of its input, so the signal fades geometrically with depth; with Var(w) =
2/fan_in it keeps its scale. Glorot & Bengio 2010 (AISTATS, eq. 16) give the normalised scale
for tanh layers (slope 1 at 0); the logistic's slope at 0 is 1/4, so its layers need 4 times it.
"""

from __future__ import annotations

import math

from dataclasses import replace

from actdoc.analysis.checks import LayerInput, LayerVerdict, layer_check
from actdoc.model import RECTIFIED_KINDS, Severity


def _signal(layer: LayerInput, limit: float, shrinking: bool) -> LayerVerdict | None:
    """The layer's output RMS against the first measured layer's, if past ``limit``."""
    if layer.output_scale is None or not layer.reference_scale:
        return None
    if layer.reference_name == layer.info.name or math.isnan(layer.output_scale):
        return None
    # an infinite RMS (finite outputs whose squares overflow) is past any limit upwards
    ratio = layer.output_scale / layer.reference_scale
    if (ratio >= limit) if shrinking else (ratio <= limit):
        return None
    return LayerVerdict(ratio, limit, (
        f"output RMS {layer.output_scale:.3g} is {ratio:.3g} times that of the first measured "
        f"layer '{layer.reference_name}' (limit {limit:.3g})"))


VANISHING_CAUSE = (
    "the output scale shrinks layer by layer: weights initialised below the scale their "
    "activation needs (e.g. Var(w) = 1/fan_in for ReLU, He et al. 2015), or squashing layers "
    "stacked deep")
VANISHING_REMEDY = (
    "initialise with He et al. 2015 for rectified layers and Glorot & Bengio 2010 for tanh (4x "
    "for the logistic); add normalisation layers (Ioffe & Szegedy 2015) or residual connections "
    "(He et al. 2016)")
#: Forward scale only: said in every vanishing_signal summary.
FORWARD_ONLY = ("this check measures the forward output RMS only, not the gradient (see "
                "gradient_flow, where the dump stores grad)")


@layer_check("vanishing_signal", cause=VANISHING_CAUSE, remedy=VANISHING_REMEDY)
def vanishing_signal(layer: LayerInput) -> LayerVerdict | None:
    """The forward output RMS against the first layer's; the cause follows this layer's data.

    Dead units are the cause when most of them are dead (small weights are not: they may be
    far too large); depth is the cause when a rectified layer's weights sit at He scale.
    """
    verdict = _signal(layer, 1.0 / layer.settings.signal_limit, shrinking=True)
    if verdict is None:
        return None
    cause, remedy = _vanishing_story(layer)
    return replace(verdict, summary=f"{verdict.summary}; {FORWARD_ONLY}", cause=cause,
                   remedy=remedy)


def weight_ratio(layer: LayerInput) -> float | None:
    """Incoming weight std over the reference for the layer's kind (None: not known)."""
    weights = layer.weights
    if weights is None or not weights.reference_std or not math.isfinite(weights.std):
        return None
    return weights.std / weights.reference_std


def predicted_rms_ratio(layer: LayerInput) -> float | None:
    """The output RMS ratio to the first measured layer that the weights alone predict for a
    rectified stack: the product of (weight std / He std) over the layers after the first up
    to this one (He et al. 2015, eq. 10: each layer scales the second moment by
    n Var(w) / 2). None where a layer between has no weights."""
    ratios = layer.context.weight_ratios
    start = layer.context.reference_index
    if start is None or not ratios:
        return None
    between = ratios[start + 1:layer.info.index + 1]
    if not between or any(r is None for r in between):
        return None
    return float(math.prod(between))


def _vanishing_story(layer: LayerInput) -> tuple[str | None, str | None]:
    settings = layer.settings
    ratio = weight_ratio(layer)
    factor = settings.init_scale_factor
    silent = layer.named_share("dead") + layer.named_share("dormant")
    if silent >= settings.critical_share:
        scale = "" if ratio is None else (
            f"; the incoming weights are {ratio:.3g} times the {layer.weights.reference} "
            f"scale, so small weights are not the cause")
        return (f"{silent:.0%} of this layer's units are dead or dormant (see those findings): "
                f"the signal vanishes because they output zero{scale}",
                "treat the dead units (see the dead finding: a lower learning rate, He "
                "initialisation, a leaky variant, normalisation layers); the scale recovers "
                "with them")
    pinned = layer.named_share("saturated")
    if pinned >= settings.critical_share:
        return (f"{pinned:.0%} of this layer's units are saturated (see that finding): their "
                f"outputs sit at an asymptote for every sample, so the layer's output scale is "
                f"that of the asymptote, whatever the weights",
                "treat the saturated units (see the saturated finding); the scale recovers "
                "with them")
    predicted = predicted_rms_ratio(layer)
    if (predicted is not None and predicted >= 1.0 / settings.signal_limit
            and layer.info.kind in RECTIFIED_KINDS):
        return (f"the weights from the first layer up to this one are close to the He et al. "
                f"2015 scale (their product predicts an RMS ratio of {predicted:.3g}, He et al. "
                f"2015 eq. 10), so the initialisation is not the cause: in a deep plain stack "
                f"units die and each layer's gain drifts in training, and the product of many "
                f"such gains shrinks with depth",
                "add residual connections (He et al. 2016) or normalisation layers (Ioffe & "
                "Szegedy 2015), or use fewer layers; re-initialising at He scale will not help")
    if predicted is not None and layer.info.kind in RECTIFIED_KINDS:
        return (f"the incoming weights of the layers up to this one are below the He et al. "
                f"2015 scale: their product predicts an RMS ratio of {predicted:.3g} (He et al. "
                f"2015 eq. 10), as observed", None)
    if ratio is not None and ratio < 1.0 / factor:
        return (f"the incoming weights are {ratio:.3g} times the {layer.weights.reference} "
                f"scale: too small for the activation to keep the signal's scale", None)
    return None, None


@layer_check("exploding_signal",
             cause="the output scale grows layer by layer: weights initialised or grown above "
                   "the scale their activation needs (a high learning rate, no weight decay)",
             remedy="initialise with He et al. 2015 or Glorot & Bengio 2010; lower the learning "
                    "rate; add weight decay or normalisation layers (Ioffe & Szegedy 2015)")
def exploding_signal(layer: LayerInput) -> LayerVerdict | None:
    return _signal(layer, layer.settings.signal_limit, shrinking=False)


INIT_REMEDY = ("initialise rectified layers with He et al. 2015 (std sqrt(2/fan_in)), tanh "
               "and linear layers with Glorot & Bengio 2010 (std sqrt(2/(fan_in + fan_out))) "
               "and logistic layers with 4 times that (the logistic's slope at 0 is 1/4); "
               "tune the learning rate and weight decay")
#: Unit checks a weight scale too large (or too small) would explain.
LARGE_SIGNS = ("saturated", "near_binary", "dead")
SMALL_SIGNS = ("linear_regime",)


@layer_check("init_scale",
             cause="the incoming weights' spread is far from the reference scale for the "
                   "layer's activation: an initialisation scheme meant for another activation, "
                   "or weights that grew (high learning rate, no weight decay) or shrank (strong "
                   "weight decay) in training",
             remedy=INIT_REMEDY)
def init_scale(layer: LayerInput) -> LayerVerdict | None:
    """The weight std against the reference for the kind (4x Glorot for the logistic).

    Trained weights drift from their initial scale, so a scale off the reference is only
    information unless the layer's units show what such a scale does (saturated, near-binary
    or dead units for a large one, units stuck in the linear zone for a small one): then it
    is a warning naming them.
    """
    ratio = weight_ratio(layer)
    if ratio is None:
        return None
    weights = layer.weights
    factor = layer.settings.init_scale_factor
    if 1.0 / factor <= ratio <= factor:
        return None
    large = ratio > factor
    limit = factor if large else 1.0 / factor
    direction = "above" if large else "below"
    signs = {c: layer.named_share(c) for c in (LARGE_SIGNS if large else SMALL_SIGNS)}
    signs = {c: share for c, share in signs.items() if share > 0}
    shown = sum(signs.values()) >= layer.settings.warning_share
    if shown:
        listed = ", ".join(f"{share:.0%} {check}" for check, share in signs.items())
        tail = f"; the layer's units show it ({listed})"
    else:
        shows = "saturated, near-binary or dead units" if large else "units in the linear regime"
        tail = (f"; no unit on this layer shows what such a scale does ({shows}), and trained "
                f"weights drift from their initial scale, so this is for information")
    return LayerVerdict(ratio, limit, (
        f"incoming weight std {weights.std:.3g} is {ratio:.3g} times the {weights.reference} "
        f"reference {weights.reference_std:.3g}, {direction} the factor {factor:g}{tail}"),
        severity=Severity.WARNING if shown else Severity.INFO)
