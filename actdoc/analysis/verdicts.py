"""From measured statistics to Findings: run every registered check and assemble the reports.

Everything a check needs to say about itself (kinds, exclusivity rank, severity rule, whether
it runs on layers without activations, the unit-table column of its labels) is registered with
it (``actdoc.analysis.checks``), so nothing here names a check. Before the checks run, the dump
is looked at as a whole (``DumpContext``): the probe batch, the first layer holding NaN, the
weight scales along the depth and the gradient reference, so a check's cause can follow the
data beyond its own layer. Findings that name the same layer list each other as ``related``.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from actdoc.analysis.checks import (
    Check,
    DumpContext,
    LayerInput,
    NonFiniteOrigin,
    ProbeInput,
    UnitInput,
    all_checks,
    state_width,
)
from actdoc.analysis.defaults import Settings
from actdoc.analysis.probe import measure_probe
from actdoc.analysis.stats import LayerStats
from actdoc.analysis.summary import (
    gradient_gain,
    gradient_rms,
    histograms,
    output_scale,
    unit_table,
    weight_summary,
)
from actdoc.model import (
    PROBE_LAYER,
    Dump,
    Finding,
    Findings,
    LayerInfo,
    LayerReport,
    LayerStatus,
    Severity,
    SourceInfo,
)


def _severity(check: Check, named: int, units: int, settings: Settings) -> Severity:
    if check.always_critical:
        return Severity.CRITICAL
    share = named / units if units else 0.0
    if check.critical_by_share and share >= settings.critical_share:
        return Severity.CRITICAL
    return Severity.WARNING if share >= settings.warning_share else Severity.INFO


def _aggregate(values: np.ndarray, how: str) -> float:
    if values.size == 0:
        return float("nan")
    return float({"mean": np.mean, "max": np.max, "sum": np.sum}[how](values))


def _unit_findings(unit: UnitInput, checks: list[Check]):
    """Findings of the unit checks, the share of units per check, each unit's state and the
    checks' label columns. A layer without statistics runs only ``static`` checks."""
    info, settings = unit.info, unit.settings
    claimed = np.zeros(info.units, bool)
    states = np.full(info.units, "", dtype=f"<U{state_width()}")
    labels = {c.label_column: np.full(info.units, "", dtype=object)
              for c in checks if c.label_column}
    findings, fractions = [], {}
    for check in checks:
        if not check.applies_to(info.kind) or (unit.stats is None and not check.static):
            continue
        verdict = check.evaluate(unit)
        if verdict is None:
            continue
        mask = np.asarray(verdict.mask, bool)
        if check.rank is not None:
            mask &= ~claimed
            claimed |= mask
            states[mask] = check.name
        if check.label_column and verdict.labels is not None:
            labels[check.label_column][mask] = np.asarray(verdict.labels, dtype=object)[mask]
        fractions[check.name] = float(mask.sum()) / info.units if info.units else 0.0
        named = np.flatnonzero(mask)
        if named.size == 0:
            continue
        values = np.asarray(verdict.values, np.float64)[named]
        cause, remedy = check.advice(info.kind)
        share = named.size / info.units
        findings.append(Finding(
            check=check.name,
            severity=verdict.severity or _severity(check, named.size, info.units, settings),
            layer=info.name, units=tuple(int(u) for u in named),
            measure=_aggregate(values, verdict.aggregate), threshold=float(verdict.threshold),
            summary=(f"Layer '{info.name}': {named.size} of {info.units} units ({share:.1%}) "
                     f"{verdict.phrase}."),
            cause=verdict.cause or cause, remedy=verdict.remedy or remedy,
            unit_measures=tuple(float(v) for v in values)))
    width = max([1] + [len(str(v)) for column in labels.values() for v in column])
    labels = {name: column.astype(f"<U{width}") for name, column in labels.items()}
    return findings, fractions, states, labels


def _layer_findings(layer_input: LayerInput, checks: list[Check]) -> list[Finding]:
    findings = []
    for check in checks:
        if not check.applies_to(layer_input.info.kind):
            continue
        verdict = check.evaluate(layer_input)
        if verdict is None:
            continue
        cause, remedy = check.advice(layer_input.info.kind)
        findings.append(Finding(
            check=check.name, severity=verdict.severity, layer=layer_input.info.name, units=(),
            measure=float(verdict.measure), threshold=float(verdict.threshold),
            summary=f"Layer '{layer_input.info.name}': {verdict.summary}.",
            cause=verdict.cause or cause, remedy=verdict.remedy or remedy))
    return findings


def _probe_findings(probe: ProbeInput, checks: list[Check]) -> list[Finding]:
    findings = []
    for check in checks:
        verdict = check.evaluate(probe)
        if verdict is None:
            continue
        findings.append(Finding(
            check=check.name, severity=verdict.severity, layer=PROBE_LAYER, units=(),
            measure=float(verdict.measure), threshold=float(verdict.threshold),
            summary=f"Probe batch: {verdict.summary}.",
            cause=verdict.cause or check.cause, remedy=verdict.remedy or check.remedy))
    return findings


def _related(findings: list[Finding]) -> list[Finding]:
    """Each finding with the other checks that named the same layer."""
    checks = [f.check for f in findings]
    return [replace(f, related=tuple(c for c in checks if c != f.check)) if len(checks) > 1
            else f for f in findings]


def _status(findings: list[Finding]) -> LayerStatus:
    ranks = [f.severity.rank for f in findings]
    worst = max(ranks, default=0)
    return {2: LayerStatus.CRITICAL, 1: LayerStatus.WARNING}.get(worst, LayerStatus.HEALTHY)


def _nonfinite_origin(infos: list[LayerInfo], measured: list[LayerStats | None],
                      bad_parameters: list[np.ndarray | None]) -> NonFiniteOrigin | None:
    """The first layer in forward order holding NaN or infinity, and where."""
    for info, stats, bad in zip(infos, measured, bad_parameters):
        in_parameters = bad is not None and bool(np.any(bad > 0))
        in_activations = stats is not None and bool(stats.nonfinite.any())
        if in_parameters or in_activations:
            bad_samples = 0 if stats is None or stats.side is None else \
                int(stats.side.nonfinite_samples.size)
            return NonFiniteOrigin(info.name, info.index, in_parameters, in_activations,
                                   bad_samples, info.samples)
    return None


def _context(dump: Dump, measured, weights, bad_parameters, scales) -> DumpContext:
    infos = [layer.info for layer in dump.layers]
    gradients = [(info.name, gradient_rms(stats)) for info, stats in zip(infos, measured)]
    gradients = [(name, rms) for name, rms in gradients if rms is not None and rms > 0]
    ratios = tuple(None if w is None or not w.reference_std or not np.isfinite(w.std)
                   else w.std / w.reference_std for w in weights)
    reference = next((i for i, scale in enumerate(scales)
                      if scale is not None and np.isfinite(scale) and scale > 0), None)
    return DumpContext(probe=measure_probe(dump),
                       nonfinite_origin=_nonfinite_origin(infos, measured, bad_parameters),
                       gradient_reference=gradients[-1] if gradients else None,
                       weight_ratios=ratios, reference_index=reference)


@np.errstate(over="ignore", invalid="ignore")  # infinite moments of huge finite values
def findings_from_stats(dump: Dump, measured: list[LayerStats | None], settings: Settings,
                        source: SourceInfo) -> Findings:
    """Findings from per-layer statistics already measured (one entry per layer of ``dump``,
    None for a layer without activations), e.g. merged from shards or workers."""
    checks = all_checks()
    by_scope = {scope: [c for c in checks if c.scope == scope]
                for scope in ("unit", "layer", "probe")}
    scales = [output_scale(stats) for stats in measured]
    reference = next(((layer.name, scale) for layer, scale in zip(dump.layers, scales)
                      if scale is not None and np.isfinite(scale) and scale > 0), (None, None))
    summaries = [weight_summary(layer) for layer in dump.layers]
    context = _context(dump, measured, [w for w, _ in summaries], [b for _, b in summaries],
                       scales)

    reports, all_findings = [], []
    for layer, stats, scale, (weights, bad) in zip(dump.layers, measured, scales, summaries):
        info = layer.info
        static = stats is None and weights is not None  # weights-only: static checks see them
        unit = UnitInput(info, stats, settings, bad, layer.weight() if static else None,
                         layer.bias() if static else None, context)
        found, fractions, states, labels = _unit_findings(unit, by_scope["unit"])
        gain = gradient_gain(stats)
        found += _layer_findings(LayerInput(
            info, stats, settings, weights, scale, reference[0], reference[1],
            unit_findings=tuple(found), gradient_gain=gain, context=context), by_scope["layer"])
        found = _related(found)
        all_findings += found
        reports.append(LayerReport(
            info=info, fractions=fractions, status=_status(found), output_scale=scale,
            gradient_gain=gain, unit_table=unit_table(stats, info.units, states, labels),
            histograms=histograms(stats), weights=weights))
    probe = ProbeInput(context.probe, settings, tuple(layer.info for layer in dump.layers))
    all_findings += _probe_findings(probe, by_scope["probe"])
    return Findings(source=source, layers=tuple(reports), findings=tuple(all_findings),
                    settings=settings.as_mapping(), probe=context.probe)
