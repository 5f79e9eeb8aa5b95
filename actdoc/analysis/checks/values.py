"""Values that should not be there (NaN, infinity) and outputs that never change."""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import UnitInput, UnitVerdict, unit_check
from actdoc.model import Severity


NONFINITE_REMEDY = ("find the first layer that holds them; lower the learning rate, clip "
                    "gradients, record in float32, and check the inputs for NaN")


@unit_check("non_finite", always_critical=True, static=True,
            cause="NaN or infinity in the recorded values or parameters: a diverged training "
                  "run (learning rate too high, exploding gradients), a division by zero or a "
                  "log of zero upstream, or a float16 overflow when the dump was written",
            remedy=NONFINITE_REMEDY)
def non_finite(unit: UnitInput) -> UnitVerdict:
    """Units holding NaN or infinity; the cause and severity follow where they start.

    Critical where they start in the parameters, or in the activations of most probe samples;
    a warning where a few samples carry them (a NaN in the probe input is not a diverged
    model); one level lower in every layer above the origin, whose values only inherit them.
    """
    values = np.zeros(unit.info.units)
    if unit.stats is not None:
        values = values + unit.stats.nonfinite
    if unit.parameter_nonfinite is not None:
        values = values + unit.parameter_nonfinite
    origin = unit.context.nonfinite_origin
    severity = cause = remedy = None
    if origin is not None:
        severity, cause, remedy = _nonfinite_story(unit, origin)
    return UnitVerdict(mask=values > 0, values=values, threshold=0.0,
                       phrase="hold NaN or infinite values", aggregate="sum",
                       severity=severity, cause=cause, remedy=remedy)


def _origin_text(origin) -> str:
    where = [w for w, on in (("its parameters", origin.in_parameters),
                             (f"its activations on {origin.bad_samples} of {origin.samples} "
                              f"probe samples", origin.in_activations)) if on]
    return f"layer '{origin.layer}' is the first to hold NaN or infinity, in {' and '.join(where)}"


def _nonfinite_story(unit: UnitInput, origin):
    settings = unit.settings
    broad = (origin.in_parameters or not origin.samples
             or origin.bad_samples >= settings.critical_share * origin.samples)
    probe = unit.context.probe
    bad_inputs = probe is not None and probe.nonfinite_rows > 0
    own_parameters = (unit.parameter_nonfinite is not None
                      and bool(unit.parameter_nonfinite.any()))
    if unit.info.index > origin.index and not own_parameters:
        return (Severity.WARNING if broad else Severity.INFO,
                f"propagated: {_origin_text(origin)}; this layer only inherits them from its "
                f"inputs",
                f"fix layer '{origin.layer}' (see its non_finite finding); nothing here needs a "
                f"separate repair")
    if own_parameters:
        return (Severity.CRITICAL,
                f"{_origin_text(origin)}; this layer's own parameters hold NaN or infinity, "
                f"which comes from a diverged training run (learning rate too high, exploding "
                f"gradients) or a corrupted checkpoint",
                NONFINITE_REMEDY)
    if bad_inputs and not broad:
        return (Severity.WARNING,
                f"{_origin_text(origin)}, and {probe.nonfinite_rows} rows of the probe input "
                f"hold NaN or infinity: the model is fine, some probe rows are not",
                "drop or repair the probe rows that hold NaN (and check the data pipeline that "
                "produced them)")
    if not broad:
        return (Severity.WARNING,
                f"{_origin_text(origin)}: a few samples overflow (very large inputs, a division "
                f"by zero or a log of zero on those samples, or float16 storage)",
                "look at those samples' inputs; record in float32; standardise the inputs")
    return Severity.CRITICAL, None, None


@unit_check("constant", rank=5,
            cause="the output does not vary across the probe samples: the unit ignores its "
                  "input (zero incoming weights, a saturated or silent input layer) or the probe "
                  "batch does not vary in what the unit sees",
            remedy="check the incoming weights and the layer below; make sure the probe batch is "
                   "varied; re-initialise the unit if its weights collapsed")
def constant(unit: UnitInput) -> UnitVerdict:
    stats = unit.stats
    with np.errstate(invalid="ignore"):
        spread = stats.maximum - stats.minimum
        magnitude = np.fmax(1.0, np.fmax(np.abs(stats.minimum), np.abs(stats.maximum)))
    tolerance = unit.settings.constant_tolerance
    n = stats.moments.count
    # one observation has a zero range by construction: variation needs two
    return UnitVerdict(mask=(n >= 2) & (spread <= tolerance * magnitude),
                       values=np.where(n > 0, spread, np.nan), threshold=tolerance,
                       phrase="give the same output on every observation", aggregate="max")
