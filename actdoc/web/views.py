"""What each page shows, as plain data: the HTML templates and the JSON twins read the same dicts.

Nothing here knows about Flask; the blueprints add links and choose HTML or JSON.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from actdoc.model import (
    CAVEAT,
    PROBE_LAYER,
    RECTIFIED_KINDS,
    SQUASHING_KINDS,
    ActivationKind,
    Dump,
    Findings,
    LayerReport,
)
from actdoc.reports.document import (finding_entry, layer_entry, ordered_findings, probe_entry,
                                     verdict)
from actdoc.formatting import plain
from actdoc.web import explain, figures, gradflow, looks, unitcard
from actdoc.web.unitmap import unit_map

#: Findings listed on the model overview, most serious first.
TOP_FINDINGS = 8
#: Unit indices a page's JSON twin lists per finding (the count is always whole; the findings
#: document, ``findings.json``, lists every unit).
MAX_LISTED_UNITS = 1000
#: Units per page of the unit table: default and ceiling.
UNITS_PER_PAGE = 50
MAX_UNITS_PER_PAGE = 500
#: Shown where a layer's dump entry holds only parameters: nothing about its units was measured.
WEIGHTS_ONLY_NOTE = ("The dump holds no recorded total inputs or outputs for this layer, only "
                     "its parameters: its units were not measured on the probe batch, so only "
                     "the checks of its incoming weights apply.")
#: The unit roster's measures per kind, after "unit" and "state": the ones that tell the
#: kind's failure modes apart, so the table fits a 1280 px window. The unit card shows all.
#: Columns a layer lacks (no dL/dz stored, not a spatial layer, no saturated unit) drop out.
ROSTER_COLUMNS = {
    "rectified": ("active_fraction", "sample_active_fraction", "mean", "std", "max",
                  "dormant_score", "gradient_gain", "gradient_rms"),
    "switching": ("active_fraction", "sample_active_fraction", "mean", "std", "bimodality",
                  "gradient_rms"),
    "squashing": ("mean", "std", "low_fraction", "high_fraction", "saturation_side",
                  "linear_fraction", "bimodality", "gradient_gain", "gradient_rms"),
    "other": ("mean", "std", "min", "max", "gradient_gain", "gradient_rms"),
}
#: Headings for unit-table columns whose id does not read as words (the rest: "_" -> " ").
COLUMN_LABELS = {
    "sample_active_fraction": "samples fired on",
    "saturation_side": "saturated side",
    "gradient_rms": "gradient RMS",
    "nonfinite": "NaN/inf count",
}


def column_label(column: str) -> str:
    """A unit-table column's heading on the roster and the unit card."""
    return COLUMN_LABELS.get(column, column.replace("_", " "))


def roster_columns(kind: ActivationKind) -> tuple[str, ...]:
    """The unit roster's measure columns for a layer of ``kind``."""
    if kind in RECTIFIED_KINDS:
        return ROSTER_COLUMNS["rectified"]
    if kind in (ActivationKind.THRESHOLD, ActivationKind.STOCHASTIC_BINARY):
        return ROSTER_COLUMNS["switching"]
    if kind in SQUASHING_KINDS:
        return ROSTER_COLUMNS["squashing"]
    return ROSTER_COLUMNS["other"]


def findings_for_page(findings: Findings, entries: list) -> list[dict[str, Any]]:
    """Findings as the document writes them, plus the layer's index for links (None for a
    finding about the probe batch, or any ``layer`` that is no layer of the model: such a
    finding gets no layer link) and its related findings as links (``related_links``: the
    findings of those checks on the same layer, each with its anchor)."""
    index = {report.name: report.info.index for report in findings.layers}
    out = []
    for finding in entries:
        entry = finding_entry(finding)
        entry["unit_count"] = len(entry["units"])
        entry["units"] = entry["units"][:MAX_LISTED_UNITS]
        entry["layer_index"] = index.get(finding.layer)
        entry["probe"] = finding.layer == PROBE_LAYER
        entry["look"] = looks.as_dict(finding.check)
        entry["anchor"] = finding_anchor(finding.check)
        named = {f.check for f in findings.for_layer(finding.layer)}
        entry["related_links"] = [
            {"check": check, "label": looks.label(check), "anchor": finding_anchor(check)}
            for check in finding.related if check in named and check != finding.check]
        out.append(entry)
    return out


def finding_anchor(check: str) -> str:
    """The id of a finding's block on its layer page (one finding per check and layer)."""
    return "finding-" + looks.css_name(check)


def layer_gradient_rms(report: LayerReport) -> float | None:
    """RMS of dL/dz over the whole layer, pooled from the per-unit RMS weighted by each unit's
    observations (None without a stored gradient): sqrt(sum n_u rms_u^2 / sum n_u)."""
    rms = report.unit_table.get("gradient_rms")
    if rms is None:
        return None
    rms = np.asarray(rms, dtype=np.float64)
    counts = np.asarray(report.unit_table.get("observations", np.ones(rms.size)),
                        dtype=np.float64)
    keep = np.isfinite(rms) & (counts > 0)
    if not keep.any():
        return None
    return float(np.sqrt(np.sum(counts[keep] * rms[keep] ** 2) / np.sum(counts[keep])))


def gradient_depth(findings: Findings) -> list[dict[str, Any]] | None:
    """Each layer's gradient RMS and its ratio to the last layer with one (the gradient_flow
    check's reference), input side first; None when the dump stores no gradient."""
    values = [(report, layer_gradient_rms(report)) for report in findings.layers]
    measured = [value for _report, value in values if value is not None]
    if not measured:
        return None
    top = measured[-1]
    flagged = {f.layer: f.severity.value for f in findings.findings
               if f.check == "gradient_flow"}
    return [{"index": report.info.index, "name": report.name, "rms": value,
             "ratio": None if value is None or not top else value / top,
             "finding": flagged.get(report.name)} for report, value in values]


def layer_summary(report: LayerReport) -> dict[str, Any]:
    """The document's layer entry with the extras a page shows."""
    entry = layer_entry(report)
    entry["spatial_shape"] = list(report.info.spatial_shape)
    entry["has_weights"] = report.weights is not None
    entry["gradient_rms"] = layer_gradient_rms(report)
    return entry


def overview(findings: Findings) -> dict[str, Any]:
    """The model overview: layers in forward order, the charts across depth, the top findings."""
    ranked = ordered_findings(findings)
    serious = [f for f in ranked if f.severity.rank > 0] or ranked
    shown = serious[:TOP_FINDINGS]
    rest = [f for f in ranked if f not in shown]
    checks: list[str] = []
    for report in findings.layers:
        checks += [check for check in report.fractions if check not in checks]
    gradients = gradient_depth(findings)
    terms = ("gradient gain", "output scale") + (("gradient RMS",) if gradients else ())
    probe = probe_entry(findings.probe)
    if probe is not None:
        probe["findings"] = findings_for_page(findings, [
            f for f in ranked if f.layer == PROBE_LAYER])
    return {
        "source": plain(findings.source.__dict__),
        "checks": checks,
        "verdict": verdict(findings),
        "layers": [layer_summary(report) for report in findings.layers],
        "top_findings": findings_for_page(findings, shown),
        "other_findings": findings_for_page(findings, rest),
        "finding_count": len(findings.findings),
        "check_labels": {check: looks.label(check) for check in checks},
        "figures": {"depth": figures.depth_fractions(findings, checks),
                    "signal": figures.depth_signal(findings),
                    "gradient": gradflow.depth_gradient(gradients, findings.settings)},
        "gradients": gradients,
        "probe": probe,
        "explain": explain.explained(findings.settings, terms),
        "caveat": findings.caveat or CAVEAT,
    }


def _all_missing(values: np.ndarray) -> bool:
    """A numeric column with no finite value (the measure does not apply to this kind), or a
    label column with no label (no unit of the layer carries one)."""
    if values.dtype.kind in "US":
        return not np.any(values.astype(str) != "")
    return values.dtype.kind == "f" and not np.isfinite(values).any()


def _sort_key(values: np.ndarray) -> np.ndarray:
    """Values ordered with missing (NaN) ones last, whatever the direction."""
    if values.dtype.kind in "fc":
        return np.where(np.isnan(values), np.inf, values)
    return values


def unit_rows(report: LayerReport, *, sort: str = "unit", descending: bool = False,
              page: int = 1, per_page: int = UNITS_PER_PAGE,
              state: str | None = None, only: Any = None,
              finding: str | None = None) -> dict[str, Any]:
    """One page of the unit table, sorted and filtered on the server (thousands stay fast).

    Rows carry the kind's roster columns; ``sort`` may name any column of the unit table.
    ``only`` (unit indices, with ``finding`` naming the check they come from) keeps just
    those units: the roster of one finding.
    """
    table = {name: np.asarray(values) for name, values in report.unit_table.items()}
    units = report.info.units
    table["unit"] = np.arange(units)
    states = np.asarray(table.get("state", np.full(units, "")), dtype=str)
    measures = list(roster_columns(report.info.kind))
    if np.any(table.get("nonfinite", 0)):
        measures.append("nonfinite")
    columns = ["unit", "state"] + [c for c in measures
                                   if c in table and not _all_missing(table[c])]
    picked = np.arange(units) if not state else np.flatnonzero(
        states == ("" if state == "none" else state))
    if only is not None:
        picked = np.intersect1d(picked, np.asarray(only, dtype=np.int64))
    if sort not in table:
        sort = "unit"
    if sort not in columns:  # sorted by a measure the roster leaves out: show it too
        columns.append(sort)
    keys = _sort_key(table[sort][picked])
    order = np.argsort(keys, kind="stable")
    if descending:
        finite = keys[order] != np.inf if keys.dtype.kind == "f" else np.ones(order.size, bool)
        order = np.concatenate([order[finite][::-1], order[~finite]])
    ordered = picked[order]
    per_page = max(1, min(MAX_UNITS_PER_PAGE, per_page))
    pages = max(1, math.ceil(ordered.size / per_page))
    page = max(1, min(page, pages))
    shown = ordered[(page - 1) * per_page: page * per_page]
    rows = [{column: plain(table[column][i]) for column in columns} for i in shown]
    return {"columns": columns, "labels": {c: column_label(c) for c in columns}, "rows": rows, "page": page, "pages": pages,
            "per_page": per_page, "total": int(ordered.size), "sort": sort,
            "descending": descending, "state": state or "", "finding": finding or "",
            "finding_label": looks.label(finding) if finding else "",
            "next_order": {c: ("asc" if descending else "desc") if c == sort
                           else ("asc" if c in ("unit", "state") else "desc") for c in columns},
            "states": {(str(s) or "none"): int(n) for s, n in zip(*np.unique(states,
                                                                         return_counts=True))},
            "state_labels": {(str(s) or "none"): looks.label(str(s)) for s in np.unique(states)}}


def weights_panel(report: LayerReport) -> dict[str, Any] | None:
    """Incoming scale against its reference, with the per-unit norms and bias charts."""
    summary = report.weights
    if summary is None:
        return None
    ratio = summary.std / summary.reference_std if summary.reference_std else None
    # A unit with Var(w) = reference_std**2 has expected squared norm fan_in * reference_std**2.
    expected_norm = math.sqrt(summary.fan_in) * summary.reference_std
    panel = {
        "fan_in": summary.fan_in, "fan_out": summary.fan_out, "std": plain(summary.std),
        "reference_std": plain(summary.reference_std), "reference": summary.reference,
        "ratio": plain(ratio), "expected_norm": plain(expected_norm),
        "figures": {"norms": figures.per_unit_bars(
            summary.row_norms, "Incoming weight norm per unit", "L2 norm of incoming weights",
            reference=expected_norm)},
    }
    if summary.bias is not None:
        panel["figures"]["bias"] = figures.value_histogram(summary.bias, "Biases", "bias")
    return panel


def layer_detail(findings: Findings, report: LayerReport, finding: str | None = None,
                 **table_options: Any) -> dict:
    """The layer page: inputs under the curve, the unit table and map, the weights.
    ``finding`` (a check id) narrows the roster to the units that check's finding names."""
    info = report.info
    named = next((f for f in findings.for_layer(info.name) if f.check == finding and f.units),
                 None)
    if named is not None:
        table_options.update(only=named.units, finding=named.check)
    hist = report.histograms.get("preact")
    inputs = None
    if hist is not None and np.asarray(hist.counts).size:
        inputs = figures.inputs_under_curve(info, hist.edges, hist.counts, findings.settings,
                                            f"Total inputs of {info.name} under f(z)",
                                            open_ends=True)
    output_hist = report.histograms.get("output")
    outputs = None
    if output_hist is not None and np.asarray(output_hist.counts).size:
        outputs = figures.histogram_figure(output_hist.edges, output_hist.counts,
                                           f"Outputs of {info.name}", "output y",
                                           open_ends=True)
    return {
        "layer": {**layer_summary(report), "kind_note": info.kind_note},
        "findings": findings_for_page(findings, sorted(
            findings.for_layer(info.name), key=lambda f: -f.severity.rank)),
        "units": unit_rows(report, **table_options),
        "weights": weights_panel(report),
        "figures": {"inputs": inputs, "outputs": outputs, "unit_map": unit_map(report)},
        "zone_note": figures.zone_note(info, findings.settings),
        "explain": explain.explained(findings.settings),
        "caveat": findings.caveat or CAVEAT,
    }


def unit_detail(findings: Findings, dump: Dump, report: LayerReport, unit: int) -> dict:
    """One unit: its own histograms read from the stored dump, weights, and findings."""
    # Values near the largest float overflow in sums and spans; those numbers become null
    # (embed.plain) and the charts fall back to plain axes, so the warnings say nothing new.
    with np.errstate(over="ignore", invalid="ignore"):
        payload = unitcard.unit_detail(findings, dump, report, unit, findings_for_page)
    payload["layer"] = layer_summary(report)
    payload["labels"] = {column: column_label(column) for column in payload["row"]}
    payload["explain"] = explain.explained(findings.settings)
    return payload
