"""A terminal report: one line per layer, then the findings, most serious first.

Every name and sentence passes through ``visible`` (actdoc/escaping.py): control characters from
a dump (ANSI/OSC escape sequences, CR, LF, BEL) are shown as escapes, never sent to the terminal.
"""

from __future__ import annotations

import textwrap

from actdoc.escaping import visible
from actdoc.formatting import share
from actdoc.model import Findings, LayerReport
from actdoc.reports.document import (layer_level_checks, ordered_findings, place, probe_summary,
                                     unit_list, verdict)

WIDTH = 88
MARKS = {"healthy": "ok  ", "warning": "WARN", "critical": "CRIT"}


def _layer_line(report: LayerReport, name_width: int, whole: list[str]) -> str:
    """One layer: mark, name, kind, units, its three largest unit shares and the checks that
    name the layer as a whole (``whole``)."""
    info = report.info
    flagged = {check: value for check, value in report.fractions.items() if value}
    top = sorted(flagged.items(), key=lambda item: -item[1])[:3]
    named = [f"{visible(check)} {share(value, 0)}" for check, value in top]
    named += [visible(check) for check in whole if check not in flagged]
    shares = ", ".join(named) or "-"
    kind = info.kind.value + ("?" if info.kind_source.value == "inferred" else "")
    return (f"  [{MARKS[report.status.value]}] {visible(info.name):<{name_width}}  {kind:<18} "
            f"{info.units:>6} units  {shares}")


def render_text(findings: Findings) -> str:
    """The readable report ``actdoc analyze`` prints by default."""
    source = findings.source
    counts = verdict(findings)
    name_width = max([len(visible(r.name)) for r in findings.layers] + [5])
    lines = [
        f"actdoc: {visible(source.file)} ({visible(source.format)}, {source.samples} probe "
        f"samples)",
        f"layers: {counts['layers']['critical']} critical, {counts['layers']['warning']} warning, "
        f"{counts['layers']['healthy']} healthy",
        "",
    ]
    probe = probe_summary(findings.probe)
    if probe is not None:
        lines[2:2] = textwrap.wrap(f"probe: {probe}", WIDTH, subsequent_indent="       ")
    lines += [_layer_line(report, name_width, layer_level_checks(findings, report.name))
              for report in findings.layers]
    if any(report.info.kind_source.value == "inferred" for report in findings.layers):
        lines.append("  (? = activation inferred from the arrays)")
    lines.append("")
    if not findings.findings:
        lines.append("No check flagged anything on this probe batch.")
    wrap = textwrap.TextWrapper(width=WIDTH, initial_indent="      ", subsequent_indent="      ")
    for finding in ordered_findings(findings):
        lines.append(f"  {finding.severity.value.upper():<8} {visible(place(finding))} / "
                     f"{visible(finding.check)}")
        lines.extend(wrap.wrap(visible(finding.summary)))
        if finding.units:
            lines.extend(wrap.wrap(f"units: {unit_list(finding.units)}"))
        lines.extend(wrap.wrap(f"cause: {visible(finding.cause)}"))
        lines.extend(wrap.wrap(f"try: {visible(finding.remedy)}"))
        if finding.related:
            lines.extend(wrap.wrap(f"see also on this layer: "
                                   f"{visible(', '.join(finding.related))}"))
        lines.append("")
    lines.extend(textwrap.wrap("Note: " + visible(findings.caveat), WIDTH))
    return "\n".join(lines) + "\n"
