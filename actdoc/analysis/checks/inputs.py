"""The probe batch itself: too small to speak for the model, inputs off the standardised scale,
rows holding NaN. Findings name the layer ``probe/input`` (no layer of the network)."""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import ProbeInput, ProbeVerdict, probe_check
from actdoc.analysis.probe import minimum_samples
from actdoc.model import Severity


@probe_check("probe_size",
             cause="the probe batch is small: a unit active on 1% of inputs fires only a few "
                   "times on it, so dead and dormant units, or 95% and 90% saturated ones, "
                   "cannot be told apart reliably, and a unit that fires on rare inputs may not "
                   "see one",
             remedy="record the dump on more held-out samples, preprocessed exactly as in "
                    "training: at least the number this finding names")
def probe_size(probe: ProbeInput) -> ProbeVerdict | None:
    settings = probe.settings
    needed = minimum_samples(settings.dormant_active_share, settings.probe_expected_firings)
    samples = probe.probe.samples
    if samples >= needed or samples == 0:
        return None
    return ProbeVerdict(
        samples, needed,
        f"the probe batch holds {samples} samples; for the findings to hold it needs at least "
        f"{needed}, so that a unit active on {settings.dormant_active_share:.0%} of inputs "
        f"fires about {settings.probe_expected_firings:g} times on it")


@probe_check("probe_scale",
             cause="the network sees inputs far from zero mean and unit variance: features in "
                   "their raw units (pascals next to fractions, pixel values 0-255) make the "
                   "first layer's total inputs large, which saturates logistic and tanh units "
                   "and silences rectified ones (LeCun et al. 1998, Efficient BackProp, from "
                   "memory, recommend standardised inputs)",
             remedy="standardise each input feature with the training set's mean and standard "
                    "deviation, and apply the same transform to the probe batch")
def probe_scale(probe: ProbeInput) -> ProbeVerdict | None:
    report = probe.probe
    if not report.stored or report.features == 0:
        return None
    limit = probe.settings.input_scale_limit
    varies = report.feature_std > 0
    rms = np.sqrt(report.feature_mean ** 2 + report.feature_std ** 2)
    large = varies & (rms > limit)
    small = varies & (rms < 1.0 / limit)
    if not (large.any() or small.any()):
        return None
    worst_std = float(np.nanmax(report.feature_std))
    worst_mean = float(np.nanmax(np.abs(report.feature_mean)))
    return ProbeVerdict(
        float(np.nanmax(rms[varies])), limit,
        f"{int(large.sum())} of {report.features} input features have an RMS above {limit:g} "
        f"and {int(small.sum())} below 1/{limit:g} (feature std up to {worst_std:.3g}, |mean| "
        f"up to {worst_mean:.3g}): the inputs are not standardised",
        severity=Severity.WARNING if large.any() else Severity.INFO)


@probe_check("probe_nonfinite",
             cause="some probe rows hold NaN or infinity: missing values in the data, or a "
                   "preprocessing step that divided by zero; every layer above inherits them on "
                   "those samples",
             remedy="drop or impute those rows before recording the probe, and fix the data "
                    "pipeline that produced them")
def probe_nonfinite(probe: ProbeInput) -> ProbeVerdict | None:
    report = probe.probe
    if report.nonfinite_rows == 0:
        return None
    return ProbeVerdict(
        report.nonfinite_rows, 0,
        f"{report.nonfinite_rows} of {report.samples} probe input rows hold NaN or infinity")
