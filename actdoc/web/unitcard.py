"""The unit card's data: one unit's own values read back from the dump, summarised and drawn.

Nothing here knows Flask; ``views`` and the blueprint add the rest.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from actdoc.model import CAVEAT, SILENCEABLE_KINDS, ActivationKind, Dump, Findings, LayerReport
from actdoc.web import figures, looks
from actdoc.web.binning import unit_histogram
from actdoc.formatting import plain

#: Bins of the histograms drawn from one unit's values.
UNIT_BINS = 60
#: Incoming weights listed in a unit's JSON (the histogram always uses all of them).
MAX_LISTED_WEIGHTS = 4096
#: Percentiles of z shown on the card (numpy's default linear interpolation).
PERCENTILES = (1, 5, 25, 50, 75, 95, 99)


def input_summary(z: np.ndarray, kind: ActivationKind) -> dict[str, Any] | None:
    """How one unit's total input z is spread: mean, extremes, percentiles, the share above
    zero and, for a unit that can fall silent and never rises above zero, how far below zero
    its largest input stays (the rise in bias that would make it fire once)."""
    finite = np.asarray(z, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return None
    top = float(finite.max())
    summary = {
        "count": int(finite.size), "mean": float(np.mean(finite)),
        "std": float(np.std(finite)), "min": float(finite.min()), "max": top,
        "percentiles": {str(p): float(v) for p, v in
                        zip(PERCENTILES, np.percentile(finite, PERCENTILES))},
        "above_zero": float(np.mean(finite > 0)),
        "gap_below_zero": None,
    }
    if kind in SILENCEABLE_KINDS and top <= 0:
        summary["gap_below_zero"] = -top
    return summary


def neighbours(report: LayerReport, unit: int) -> dict[str, int | None]:
    """The units before and after ``unit``, and the nearest flagged ones (any state) each way."""
    units = report.info.units
    states = np.asarray(report.unit_table.get("state", np.full(units, "")), dtype=object)
    flagged = np.flatnonzero(states.astype(str) != "")
    before, after = flagged[flagged < unit], flagged[flagged > unit]
    return {"previous": unit - 1 if unit > 0 else None,
            "next": unit + 1 if unit + 1 < units else None,
            "previous_flagged": int(before[-1]) if before.size else None,
            "next_flagged": int(after[0]) if after.size else None,
            "flagged": int(flagged.size)}


def measure_label(check: str, value: Any, threshold: Any) -> str:
    """"share of observations where it is active: 0%" with the check's limit beside it."""
    face = looks.look(check)

    def shown(number: Any) -> str:
        if number is None:
            return "–"
        return f"{number:.1%}" if face.share else f"{number:.3g}"

    return f"{face.measure}: {shown(value)} (limit {shown(threshold)})"


def unit_detail(findings: Findings, dump: Dump, report: LayerReport, unit: int,
                findings_for_page) -> dict:
    """One unit: its own histograms read from the stored dump, weights, and findings."""
    info = report.info
    layer = dump.layer(info.name)
    row = {column: plain(np.asarray(values)[unit])
           for column, values in report.unit_table.items()}
    state = row.get("state") or ""
    # Measures that do not apply to this kind are NaN (None here): leave them out.
    row = {column: value for column, value in row.items() if value not in (None, "")}
    charts: dict[str, Any] = {}
    nonfinite = {}
    inputs = None
    if info.has("preact"):
        z = layer.unit_values("preact", unit)
        edges, counts, nonfinite["preact"], axis = unit_histogram(
            z, UNIT_BINS,
            lambda low, high: figures.input_axis(info, findings.settings, low, high))
        inputs = input_summary(z, info.kind)
        band = None if inputs is None else [inputs["percentiles"]["5"],
                                            inputs["percentiles"]["95"]]
        charts["preact"] = figures.inputs_under_curve(
            info, edges, counts, findings.settings,
            f"Unit {unit}: total inputs under f(z)", band=band, follow_data=True, axis=axis)
    if info.has("output"):
        edges, counts, nonfinite["output"], _axis = unit_histogram(
            layer.unit_values("output", unit), UNIT_BINS)
        charts["output"] = figures.histogram_figure(edges, counts, f"Unit {unit}: outputs",
                                                    "output y")
    weights = None
    incoming = layer.weight()
    if incoming is not None:
        row_weights = incoming[unit]
        bias = layer.bias()
        weights = {"count": int(row_weights.size),
                   "norm": plain(float(np.linalg.norm(row_weights.astype(np.float64)))),
                   "bias": None if bias is None else plain(bias[unit]),
                   "values": plain(row_weights[:MAX_LISTED_WEIGHTS])}
        charts["weights"] = figures.value_histogram(row_weights, f"Unit {unit}: incoming "
                                                    "weights", "weight")
    named = [f for f in findings.for_layer(info.name) if unit in f.units]
    entries = findings_for_page(findings, named)
    for finding, entry in zip(named, entries):
        if finding.unit_measures:
            value = plain(finding.unit_measures[finding.units.index(unit)])
            entry["unit_measure"] = value
            entry["unit_measure_label"] = measure_label(finding.check, value,
                                                        plain(finding.threshold))
        entry.pop("units", None)
    return {"unit": unit, "row": row, "state": state, "look": looks.as_dict(state),
            "measured": info.has("preact") or info.has("output"), "nonfinite": nonfinite,
            "inputs": inputs, "weights": weights, "neighbours": neighbours(report, unit),
            "findings": entries, "figures": charts, "caveat": findings.caveat or CAVEAT,
            "zone_note": figures.zone_note(info, findings.settings)}
