"""The findings document (docs/contract.md section 4) and the small helpers every format shares.

Numbers go through ``clean_number`` (actdoc/formatting.py): NaN and infinities become null."""

from __future__ import annotations

from collections import Counter
from typing import Any

from actdoc.formatting import clean_number, number
from actdoc.model import (PROBE_LAYER, Finding, Findings, LayerReport, LayerStatus, ProbeReport,
                          Severity)

SCHEMA = "actdoc.findings/1"


def layer_entry(report: LayerReport) -> dict[str, Any]:
    """One entry of the document's ``layers`` list, with actdoc's documented extensions."""
    info = report.info
    return {
        "name": info.name,
        "index": info.index,
        "activation": info.kind.value,
        "activation_source": info.kind_source.value,
        "units": info.units,
        "samples": info.samples,
        "observations": info.observations,
        "fractions": {check: clean_number(share) for check, share in report.fractions.items()},
        "status": report.status.value,
        # Extensions (documented in docs/findings.md):
        "output_scale": clean_number(report.output_scale),
        "gradient_gain": clean_number(report.gradient_gain),
        "activation_note": info.kind_note,
    }


def finding_entry(finding: Finding) -> dict[str, Any]:
    """One entry of the document's ``findings`` list."""
    return {
        "check": finding.check,
        "severity": finding.severity.value,
        "layer": finding.layer,
        "units": [int(u) for u in sorted(finding.units)],
        "measure": clean_number(finding.measure),
        "threshold": clean_number(finding.threshold),
        "summary": finding.summary,
        "cause": finding.cause,
        "remedy": finding.remedy,
        # Extension (docs/findings.md): the other checks that named the same layer
        "related": list(finding.related),
    }


def probe_entry(probe: ProbeReport | None) -> dict[str, Any] | None:
    """The document's ``probe`` section (an extension, docs/findings.md)."""
    if probe is None:
        return None
    stored = probe.stored and probe.features > 0
    return {
        "samples": int(probe.samples),
        "stored_input": bool(probe.stored),
        "features": int(probe.features),
        "nonfinite_rows": int(probe.nonfinite_rows),
        "feature_std_max": clean_number(probe.feature_std.max()) if stored else None,
        "feature_abs_mean_max": (clean_number(abs(probe.feature_mean).max())
                                 if stored else None),
    }


def to_document(findings: Findings) -> dict[str, Any]:
    """The findings document exactly as docs/contract.md section 4 fixes it, plus extensions
    (``caveat``, ``verdict``, ``settings``, ``probe``, per-finding ``related``, and per-layer
    ``output_scale``, ``gradient_gain``, ``activation_note``)."""
    source = findings.source
    return {
        "schema": SCHEMA,
        "source": {
            "file": source.file,
            "sha256": source.sha256,
            "format": source.format,
            "samples": int(source.samples),
        },
        "layers": [layer_entry(report) for report in findings.layers],
        "findings": [finding_entry(finding) for finding in findings.findings],
        "verdict": verdict(findings),
        "caveat": findings.caveat,
        "settings": {name: clean_number(value) if isinstance(value, (int, float)) else value
                     for name, value in findings.settings.items()},
        "probe": probe_entry(findings.probe),
    }


def verdict(findings: Findings) -> dict[str, Any]:
    """Counts a reader wants first: layers per status and findings per severity."""
    statuses = Counter(report.status.value for report in findings.layers)
    severities = Counter(finding.severity.value for finding in findings.findings)
    worst = findings.worst()
    return {
        "layers": {status.value: statuses.get(status.value, 0) for status in LayerStatus},
        "findings": {severity.value: severities.get(severity.value, 0) for severity in Severity},
        "worst": None if worst is None else worst.value,
    }


def ordered_findings(findings: Findings) -> list[Finding]:
    """Most serious first; within a severity, forward layer order, then as the engine listed."""
    position = {report.name: report.info.index for report in findings.layers}
    indexed = list(enumerate(findings.findings))
    indexed.sort(key=lambda pair: (-pair[1].severity.rank, position.get(pair[1].layer, 0), pair[0]))
    return [finding for _, finding in indexed]


def probe_summary(probe: ProbeReport | None) -> str | None:
    """The probe batch in one plain sentence for the prose reports: samples, feature scale,
    rows holding NaN or infinity (None when the findings have no probe section)."""
    entry = probe_entry(probe)
    if entry is None:
        return None
    parts = [f"{entry['samples']} samples"]
    if entry["stored_input"]:
        parts.append(f"{entry['features']} input features (std up to "
                     f"{number(entry['feature_std_max'])}, |mean| up to "
                     f"{number(entry['feature_abs_mean_max'])})")
        rows = entry["nonfinite_rows"]
        parts.append(f"{rows} row{'s' if rows != 1 else ''} with NaN or infinity")
    else:
        parts.append("input not stored in the dump (its scale was not checked)")
    return ", ".join(parts)


def place(finding: Finding) -> str:
    """Where a finding is, for prose: the layer's name, or "probe batch" for findings about the
    probe input itself (``layer`` = PROBE_LAYER, no layer of the network)."""
    return "probe batch" if finding.layer == PROBE_LAYER else finding.layer


def layer_level_checks(findings: Findings, name: str) -> list[str]:
    """The checks that name layer ``name`` as a whole (no units): gradient_flow,
    saturated_layer, in_place_record...; the unit shares in ``fractions`` do not show them."""
    return [f.check for f in findings.for_layer(name) if not f.units]


def unit_list(units: tuple[int, ...], limit: int = 12) -> str:
    """"3, 7, 12 and 40 more" style listing for prose reports."""
    if not units:
        return "the whole layer"
    shown = ", ".join(str(u) for u in units[:limit])
    rest = len(units) - limit
    return shown if rest <= 0 else f"{shown} and {rest} more"
