"""Gradient flow across depth, where the dump stores dL/dz (the optional ``grad`` array).

Backpropagation multiplies the gradient by each layer's weights and f'(z) on its way down
(Rumelhart, Hinton & Williams 1986), so in a deep stack of saturating layers the lower layers'
gradients can be orders of magnitude smaller than the top's, and those layers barely learn
(Glorot & Bengio 2010, section 4.2, compare back-propagated gradients across layers). The
forward checks cannot see this: a logistic stack whose outputs sit near 0.5 keeps its output
RMS while its gradient vanishes.
"""

from __future__ import annotations

from actdoc.analysis.checks import LayerInput, LayerVerdict, layer_check
from actdoc.analysis.summary import gradient_rms
from actdoc.model import Severity


@layer_check("gradient_flow",
             cause="the gradient dL/dz shrinks (or grows) on its way down: each layer multiplies "
                   "it by its weights and by f'(z), so saturated or near-zero-gain layers and "
                   "weights off their reference scale compound over depth",
             remedy="use an activation whose gain does not vanish (tanh over the logistic, a "
                    "rectified kind), initialise at the reference scale for the kind, add "
                    "normalisation layers (Ioffe & Szegedy 2015) or residual connections (He et "
                    "al. 2016); for exploding gradients also clip them")
def gradient_flow(layer: LayerInput) -> LayerVerdict | None:
    """This layer's RMS of dL/dz against the last layer with a gradient (the output side)."""
    reference = layer.context.gradient_reference
    rms = gradient_rms(layer.stats)
    if reference is None or rms is None or reference[0] == layer.info.name or not reference[1]:
        return None
    limit = layer.settings.gradient_limit
    ratio = rms / reference[1]
    if 1.0 / limit <= ratio <= limit:
        return None
    vanishing = ratio < 1.0 / limit
    severe = ratio < 1.0 / limit ** 2 if vanishing else ratio > limit ** 2
    return LayerVerdict(
        ratio, 1.0 / limit if vanishing else limit,
        f"the RMS of dL/dz is {rms:.3g}, {ratio:.3g} times that of layer '{reference[0]}' "
        f"({reference[1]:.3g}): the gradient {'vanishes' if vanishing else 'explodes'} on its "
        f"way down (limit {limit:g}x)",
        severity=Severity.CRITICAL if severe else Severity.WARNING)
