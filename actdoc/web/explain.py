"""The measures in plain words, and the thresholds an analysis actually ran with.

The words follow the definitions in docs/checks.md and the code that computes each measure
(analysis/summary.py, analysis/moments.py); the thresholds come from the Findings themselves,
so values changed with ``--set`` or ``--config`` show as changed.
"""

from __future__ import annotations

from typing import Any, Mapping

from actdoc.analysis.defaults import TABLE

#: Term -> plain explanation, in the order a page lists them.
GLOSSARY: dict[str, str] = {
    "total input z": (
        "what a unit adds up before its activation: the weighted sum of its inputs plus its "
        "bias (the pre-activation). The output is y = f(z)."),
    "active fraction": (
        "the share of probe observations on which the unit's output is not switched off "
        "(relu: y > 0; leaky relu: z > 0; binary kinds: the unit fires)."),
    "low / high fraction": (
        "the share of observations with the output in the saturated zone at the low or the "
        "high end of a logistic or tanh curve, where the curve is flat."),
    "saturated side": (
        "for a saturated unit, where its saturated observations lie: low (at the bottom "
        "asymptote), high (at the top one) or both (split between the two, each side under "
        "the limit alone but together over it). Either way the curve is flat there and "
        "passes almost no gradient."),
    "samples fired on": (
        "for a convolutional channel: the share of probe samples on which the channel is "
        "active at one position or more. A channel active on few positions can still fire "
        "somewhere on most samples (it detects something rare in place, not nothing); "
        "one that fires on no sample is dead."),
    "gradient RMS": (
        "the root mean square of dL/dz, the gradient of the loss with respect to the total "
        "input, over the probe observations (only when the dump stores it, the optional "
        "grad array). Across depth it shows how much of the learning signal reaches each "
        "layer; the gradient-flow check flags a layer whose RMS is more than the "
        "gradient_limit times smaller (or larger) than the last layer's."),
    "linear fraction": (
        "the share of observations with z in the near-linear zone, where the slope is nearly "
        "its largest and the unit behaves almost like a linear one."),
    "gradient gain": (
        "the average slope f'(z) of the activation over the probe observations, divided by "
        "its largest possible slope. It says how much of the gradient arriving at the "
        "outputs passes back through the activation: 1 passes it whole (a linear unit, an "
        "always-active relu), near 0 blocks it (saturated or silent units)."),
    "output scale": (
        "the root mean square of the layer's outputs over all units and observations: how "
        "large the signal is that the next layer receives."),
    "dormant score": (
        "a unit's mean absolute output divided by the average of that over the layer's "
        "units (Sokar et al. 2023). 1 is an ordinary unit; a score near 0 means the unit "
        "contributes almost nothing next to its neighbours."),
    "bimodality": (
        "the bimodality coefficient (g² + 1) / (k + 3(n−1)² / ((n−2)(n−3))) of the outputs, "
        "from their skewness g and excess kurtosis k (Pfister et al. 2013): about 0.33 for a "
        "bell curve, 0.56 for a flat spread, 1 for outputs that take only two values. Above "
        "0.56 suggests two clumps: the unit acts like an on/off switch."),
    "observations ÷ bin width": (
        "on charts whose bars are of unequal width, each bar's height is its count divided "
        "by its width, so a wide bar does not look tall just for being wide; the area of a "
        "bar is its count."),
}


def settings_in_effect(settings: Mapping[str, float]) -> list[dict[str, Any]]:
    """Every threshold row with the value this analysis used and whether it was changed from
    the default (by ``--set``, ``--config`` or ``Settings.replace``)."""
    rows = []
    for row in TABLE:
        used = settings.get(row.name, row.default)
        rows.append({"name": row.name, "value": used, "default": row.default,
                     "changed": used != row.default, "meaning": row.meaning})
    return rows


def explained(settings: Mapping[str, float], terms: tuple[str, ...] | None = None
              ) -> dict[str, Any]:
    """The glossary (all of it, or the named terms) and the settings in effect."""
    words = {term: GLOSSARY[term] for term in (terms or tuple(GLOSSARY))}
    rows = settings_in_effect(settings)
    return {"glossary": words, "settings": rows,
            "changed": [row["name"] for row in rows if row["changed"]]}
