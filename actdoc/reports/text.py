"""A terminal report: one line per layer, then the findings, most serious first."""

from __future__ import annotations

import textwrap

from actdoc.model import Findings, LayerReport
from actdoc.reports.document import ordered_findings, unit_list, verdict

WIDTH = 88
MARKS = {"healthy": "ok  ", "warning": "WARN", "critical": "CRIT"}


def _layer_line(report: LayerReport, name_width: int) -> str:
    info = report.info
    flagged = {check: share for check, share in report.fractions.items() if share}
    top = sorted(flagged.items(), key=lambda item: -item[1])[:3]
    shares = ", ".join(f"{check} {100 * share:.0f}%" for check, share in top) or "-"
    kind = info.kind.value + ("?" if info.kind_source.value == "inferred" else "")
    return (f"  [{MARKS[report.status.value]}] {info.name:<{name_width}}  {kind:<18} "
            f"{info.units:>6} units  {shares}")


def render_text(findings: Findings) -> str:
    """The readable report ``actdoc analyze`` prints by default."""
    source = findings.source
    counts = verdict(findings)
    name_width = max([len(r.name) for r in findings.layers] + [5])
    lines = [
        f"actdoc: {source.file} ({source.format}, {source.samples} probe samples)",
        f"layers: {counts['layers']['critical']} critical, {counts['layers']['warning']} warning, "
        f"{counts['layers']['healthy']} healthy",
        "",
    ]
    lines += [_layer_line(report, name_width) for report in findings.layers]
    lines.append("  (? = activation inferred from the arrays)")
    lines.append("")
    if not findings.findings:
        lines.append("No check flagged anything on this probe batch.")
    wrap = textwrap.TextWrapper(width=WIDTH, initial_indent="      ", subsequent_indent="      ")
    for finding in ordered_findings(findings):
        lines.append(f"  {finding.severity.value.upper():<8} {finding.layer} / {finding.check}")
        lines.extend(wrap.wrap(finding.summary))
        if finding.units:
            lines.extend(wrap.wrap(f"units: {unit_list(finding.units)}"))
        lines.extend(wrap.wrap(f"cause: {finding.cause}"))
        lines.extend(wrap.wrap(f"try: {finding.remedy}"))
        lines.append("")
    lines.extend(textwrap.wrap("Note: " + findings.caveat, WIDTH))
    return "\n".join(lines) + "\n"
