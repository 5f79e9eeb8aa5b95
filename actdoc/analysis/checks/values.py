"""Values that should not be there (NaN, infinity) and outputs that never change."""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import UnitInput, UnitVerdict, unit_check


@unit_check("non_finite", always_critical=True,
            cause="NaN or infinity in the recorded values or parameters: a diverged training "
                  "run (learning rate too high, exploding gradients), a division by zero or a "
                  "log of zero upstream, or a float16 overflow when the dump was written",
            remedy="find the first layer that holds them; lower the learning rate, clip "
                   "gradients, record in float32, and check the inputs for NaN")
def non_finite(unit: UnitInput) -> UnitVerdict:
    values = unit.stats.nonfinite.astype(np.float64)
    if unit.parameter_nonfinite is not None:
        values = values + unit.parameter_nonfinite
    return UnitVerdict(mask=values > 0, values=values, threshold=0.0,
                       phrase="hold NaN or infinite values", aggregate="sum")


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
