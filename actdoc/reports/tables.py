"""Findings as CSV (one row per flagged unit) and as Markdown (a summary for a pull request or a
lab notebook).

Names in a dump are untrusted: CSV text cells are neutralised against formula injection and
quoted as RFC 4180 says, and every name and sentence in the Markdown is escaped so that it renders
as itself (see actdoc/escaping.py for the rules and their sources).
"""

from __future__ import annotations

from typing import Any

from actdoc.escaping import csv_field, csv_text, markdown_code, markdown_text
from actdoc.formatting import exact, share
from actdoc.model import PROBE_LAYER, Findings
from actdoc.reports.document import (layer_level_checks, ordered_findings, probe_summary,
                                     unit_list, verdict)

CSV_COLUMNS = ("layer", "unit", "check", "severity", "measure", "layer_measure", "threshold")


def render_csv(findings: Findings) -> str:
    """One row per flagged unit: layer, unit, check, severity, measure.

    ``measure`` is the unit's own value where the engine gives one (its active share for dead and
    dormant units, say), else the layer's. Layer-level findings get one row with an empty unit.
    Two extra columns, ``layer_measure`` and ``threshold``, carry the finding's layer-level figure
    and its limit. Text cells (layer, check, severity) that a spreadsheet would read as a formula
    get a leading single quote and double quotes; number cells are written as numbers.
    """
    rows = [_csv_row(CSV_COLUMNS, ())]
    for finding in findings.findings:
        text = (finding.layer, finding.check, finding.severity.value)
        if not finding.units:
            rows.append(_csv_row(text, ("", exact(finding.measure), exact(finding.measure),
                                        exact(finding.threshold))))
            continue
        per_unit = finding.unit_measures if len(finding.unit_measures) == len(finding.units) \
            else (finding.measure,) * len(finding.units)
        for unit, measure in zip(finding.units, per_unit):
            rows.append(_csv_row(text, (str(int(unit)), exact(measure), exact(finding.measure),
                                        exact(finding.threshold))))
    return "".join(rows)


def _csv_row(text: tuple[Any, ...], numbers: tuple[str, ...]) -> str:
    """One CSV line in the column order: the text cells (layer, check, severity; or the header)
    neutralised, the unit and number cells as they are. Lines end in LF, as before."""
    cells = [csv_field(*csv_text(value)) for value in text]
    if numbers:
        layer, check, severity = cells
        unit, measure, layer_measure, threshold = (csv_field(n) for n in numbers)
        cells = [layer, unit, check, severity, measure, layer_measure, threshold]
    return ",".join(cells) + "\n"


def render_markdown(findings: Findings) -> str:
    """A Markdown summary: verdict, a table of layers, the findings with cause and remedy."""
    source = findings.source
    counts = verdict(findings)
    lines = [
        f"# Unit health of {markdown_code(source.file)}",
        "",
        f"- probe samples: {source.samples}; format: {markdown_text(source.format)}; "
        f"sha256: {markdown_code(source.sha256[:16])}",
        f"- layers: {counts['layers']['critical']} critical, {counts['layers']['warning']} "
        f"warning, {counts['layers']['healthy']} healthy",
        f"- findings: {counts['findings']['critical']} critical, "
        f"{counts['findings']['warning']} warning, {counts['findings']['info']} info",
        "",
        f"> {markdown_text(findings.caveat)}",
        "",
    ]
    probe = probe_summary(findings.probe)
    if probe is not None:
        lines[5:5] = [f"- probe batch: {markdown_text(probe)}"]
    lines += ["## Layers", ""]
    checks = sorted({check for report in findings.layers for check in report.fractions})
    header = (["#", "layer", "kind", "units", "status"] + [markdown_text(c) for c in checks]
              + ["whole-layer findings"])
    lines.append("| " + " | ".join(header) + " |")
    lines.append("|" + "---|" * len(header))
    for report in findings.layers:
        info = report.info
        kind = info.kind.value + ("" if info.kind_source.value == "declared" else " (inferred)")
        row = [str(info.index), markdown_code(info.name, table=True), markdown_text(kind),
               str(info.units), report.status.value]
        row += [share(report.fractions.get(check)) for check in checks]
        row.append(markdown_text(", ".join(layer_level_checks(findings, report.name))))
        lines.append("| " + " | ".join(row) + " |")
    lines += ["", "## Findings", ""]
    if not findings.findings:
        lines.append("No check flagged anything on this probe batch.")
    for finding in ordered_findings(findings):
        probe = finding.layer == PROBE_LAYER
        where = "the probe batch" if probe else markdown_code(finding.layer)
        lines += [
            f"### {finding.severity.value.upper()}: {markdown_code(finding.check)} in {where}",
            "",
            markdown_text(finding.summary),
            "",
        ]
        if not probe:
            lines.append(f"- units: {unit_list(finding.units)}")
        lines += [
            f"- measure: {exact(finding.measure)} (limit {exact(finding.threshold)})",
            f"- likely cause: {markdown_text(finding.cause)}",
            f"- what to try: {markdown_text(finding.remedy)}",
        ]
        if finding.related:
            lines.append(f"- see also on this layer: {markdown_text(', '.join(finding.related))}")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"
