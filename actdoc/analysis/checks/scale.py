"""Layer-level scale checks: the signal across depth, and the incoming weights' scale.

He et al. 2015 (ICCV, section 2.2) show that with Var(w) = 1/fan_in a ReLU layer halves the
second moment of its input, so the signal fades geometrically with depth; with Var(w) =
2/fan_in it keeps its scale. Glorot & Bengio 2010 (AISTATS, eq. 16) give the normalised scale
for logistic and tanh layers.
"""

from __future__ import annotations

import math

from actdoc.analysis.checks import LayerInput, LayerVerdict, layer_check


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


@layer_check("vanishing_signal",
             cause="the output scale shrinks layer by layer: weights initialised below the scale "
                   "their activation needs (e.g. Var(w) = 1/fan_in for ReLU, He et al. 2015), or "
                   "squashing layers stacked deep",
             remedy="initialise with He et al. 2015 for rectified layers and Glorot & Bengio 2010 "
                    "for logistic and tanh; add normalisation layers (Ioffe & Szegedy 2015) or "
                    "residual connections")
def vanishing_signal(layer: LayerInput) -> LayerVerdict | None:
    return _signal(layer, 1.0 / layer.settings.signal_limit, shrinking=True)


@layer_check("exploding_signal",
             cause="the output scale grows layer by layer: weights initialised or grown above "
                   "the scale their activation needs (a high learning rate, no weight decay)",
             remedy="initialise with He et al. 2015 or Glorot & Bengio 2010; lower the learning "
                    "rate; add weight decay or normalisation layers (Ioffe & Szegedy 2015)")
def exploding_signal(layer: LayerInput) -> LayerVerdict | None:
    return _signal(layer, layer.settings.signal_limit, shrinking=False)


@layer_check("init_scale",
             cause="the incoming weights' spread is far from the reference scale for the "
                   "layer's activation: an initialisation scheme meant for another activation, "
                   "or weights that grew (high learning rate, no weight decay) or shrank (strong "
                   "weight decay) in training",
             remedy="initialise rectified layers with He et al. 2015 (std sqrt(2/fan_in)) and "
                    "logistic, tanh and linear layers with Glorot & Bengio 2010 (std sqrt(2/"
                    "(fan_in + fan_out))); tune the learning rate and weight decay")
def init_scale(layer: LayerInput) -> LayerVerdict | None:
    weights = layer.weights
    if weights is None or not weights.reference_std or not math.isfinite(weights.std):
        return None
    ratio = weights.std / weights.reference_std
    factor = layer.settings.init_scale_factor
    if 1.0 / factor <= ratio <= factor:
        return None
    limit = factor if ratio > factor else 1.0 / factor
    direction = "above" if ratio > factor else "below"
    return LayerVerdict(ratio, limit, (
        f"incoming weight std {weights.std:.3g} is {ratio:.3g} times the {weights.reference} "
        f"reference {weights.reference_std:.3g}, {direction} the factor {factor:g}"))
