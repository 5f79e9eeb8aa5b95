"""Findings as CSV (one row per flagged unit) and as Markdown (a summary for a pull request or a
lab notebook)."""

from __future__ import annotations

import csv
import io

from actdoc.model import Findings
from actdoc.reports.document import ordered_findings, unit_list, verdict

CSV_COLUMNS = ("layer", "unit", "check", "severity", "measure", "layer_measure", "threshold")


def render_csv(findings: Findings) -> str:
    """One row per flagged unit: layer, unit, check, severity, measure.

    ``measure`` is the unit's own value where the engine gives one (its active share for dead and
    dormant units, say), else the layer's. Layer-level findings get one row with an empty unit.
    Two extra columns, ``layer_measure`` and ``threshold``, carry the finding's layer-level figure
    and its limit.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for finding in findings.findings:
        common = (finding.check, finding.severity.value)
        if not finding.units:
            writer.writerow((finding.layer, "", *common, _num(finding.measure),
                             _num(finding.measure), _num(finding.threshold)))
            continue
        per_unit = finding.unit_measures if len(finding.unit_measures) == len(finding.units) \
            else (finding.measure,) * len(finding.units)
        for unit, measure in zip(finding.units, per_unit):
            writer.writerow((finding.layer, int(unit), *common, _num(measure),
                             _num(finding.measure), _num(finding.threshold)))
    return out.getvalue()


def _num(value: float | None) -> str:
    if value is None:
        return ""
    return f"{float(value):.6g}"


def _pct(value: float | None) -> str:
    return "" if value is None else f"{100.0 * float(value):.1f}%"


def render_markdown(findings: Findings) -> str:
    """A Markdown summary: verdict, a table of layers, the findings with cause and remedy."""
    source = findings.source
    counts = verdict(findings)
    lines = [
        f"# Unit health of `{source.file}`",
        "",
        f"- probe samples: {source.samples}; format: {source.format}; "
        f"sha256: `{source.sha256[:16]}`",
        f"- layers: {counts['layers']['critical']} critical, {counts['layers']['warning']} "
        f"warning, {counts['layers']['healthy']} healthy",
        f"- findings: {counts['findings']['critical']} critical, "
        f"{counts['findings']['warning']} warning, {counts['findings']['info']} info",
        "",
        f"> {findings.caveat}",
        "",
        "## Layers",
        "",
    ]
    checks = sorted({check for report in findings.layers for check in report.fractions})
    header = ["#", "layer", "kind", "units", "status"] + checks
    lines.append("| " + " | ".join(header) + " |")
    lines.append("|" + "---|" * len(header))
    for report in findings.layers:
        info = report.info
        kind = info.kind.value + ("" if info.kind_source.value == "declared" else " (inferred)")
        row = [str(info.index), f"`{info.name}`", kind, str(info.units), report.status.value]
        row += [_pct(report.fractions.get(check)) for check in checks]
        lines.append("| " + " | ".join(row) + " |")
    lines += ["", "## Findings", ""]
    if not findings.findings:
        lines.append("No check flagged anything on this probe batch.")
    for finding in ordered_findings(findings):
        lines += [
            f"### {finding.severity.value.upper()}: `{finding.check}` in `{finding.layer}`",
            "",
            finding.summary,
            "",
            f"- units: {unit_list(finding.units)}",
            f"- measure: {_num(finding.measure)} (limit {_num(finding.threshold)})",
            f"- likely cause: {finding.cause}",
            f"- what to try: {finding.remedy}",
            "",
        ]
    return "\n".join(lines).rstrip() + "\n"
