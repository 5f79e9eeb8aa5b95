"""Saving a whole Findings object (per-unit tables and histograms included) and loading it back.

The dashboard caches analyses this way so a page never recomputes them. The store is plain JSON
plus an NPZ of numeric and string arrays, read with pickling refused: a cache file can never run
code.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from actdoc.formatting import clean_number, from_json_number
from actdoc.model import (
    ActivationKind,
    ActivationSource,
    ArrayInfo,
    Finding,
    Findings,
    Histogram,
    LayerInfo,
    LayerReport,
    LayerStatus,
    ProbeReport,
    Severity,
    SourceInfo,
    WeightSummary,
)

ARCHIVE_VERSION = 1
META_FILE = "findings-full.json"
ARRAYS_FILE = "arrays.npz"


def _info_to_json(info: LayerInfo) -> dict[str, Any]:
    return {
        "name": info.name, "index": info.index, "kind": info.kind.value,
        "kind_source": info.kind_source.value, "units": info.units, "samples": info.samples,
        "spatial_shape": list(info.spatial_shape),
        "arrays": {k: {"shape": list(v.shape), "dtype": v.dtype} for k, v in info.arrays.items()},
        "negative_slope": info.negative_slope, "threshold": info.threshold,
        "kind_note": info.kind_note,
    }


def _info_from_json(data: dict[str, Any]) -> LayerInfo:
    return LayerInfo(
        name=data["name"], index=data["index"], kind=ActivationKind(data["kind"]),
        kind_source=ActivationSource(data["kind_source"]), units=data["units"],
        samples=data["samples"], spatial_shape=tuple(data["spatial_shape"]),
        arrays={k: ArrayInfo(tuple(v["shape"]), v["dtype"]) for k, v in data["arrays"].items()},
        negative_slope=data["negative_slope"], threshold=data["threshold"],
        kind_note=data["kind_note"],
    )


def save_findings(findings: Findings, folder: str | Path) -> None:
    """Write ``findings`` into ``folder`` (created if needed) as JSON and NPZ."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, np.ndarray] = {}
    layers = []
    for i, report in enumerate(findings.layers):
        for column, values in report.unit_table.items():
            arrays[f"{i}/unit/{column}"] = np.asarray(values)
        for quantity, hist in report.histograms.items():
            arrays[f"{i}/hist/{quantity}/edges"] = np.asarray(hist.edges)
            arrays[f"{i}/hist/{quantity}/counts"] = np.asarray(hist.counts)
        weights = None
        if report.weights is not None:
            w = report.weights
            arrays[f"{i}/weights/row_norms"] = np.asarray(w.row_norms)
            if w.bias is not None:
                arrays[f"{i}/weights/bias"] = np.asarray(w.bias)
            weights = {"fan_in": w.fan_in, "fan_out": w.fan_out, "std": w.std,
                       "reference_std": w.reference_std, "reference": w.reference,
                       "has_bias": w.bias is not None}
        layers.append({
            "info": _info_to_json(report.info),
            "fractions": dict(report.fractions),
            "status": report.status.value,
            "output_scale": clean_number(report.output_scale),
            "gradient_gain": clean_number(report.gradient_gain),
            "columns": list(report.unit_table),
            "histograms": {q: h.quantity for q, h in report.histograms.items()},
            "weights": weights,
        })
    meta = {
        "archive_version": ARCHIVE_VERSION,
        "source": vars(findings.source),
        "settings": dict(findings.settings),
        "caveat": findings.caveat,
        "layers": layers,
        "findings": [
            {"check": f.check, "severity": f.severity.value, "layer": f.layer,
             "units": [int(u) for u in f.units], "measure": clean_number(f.measure),
             "threshold": clean_number(f.threshold), "summary": f.summary, "cause": f.cause,
             "remedy": f.remedy, "unit_measures": [clean_number(m) for m in f.unit_measures],
             "related": list(f.related)}
            for f in findings.findings
        ],
        "probe": None,
    }
    probe = findings.probe
    if probe is not None:
        meta["probe"] = {"samples": probe.samples, "features": probe.features,
                         "nonfinite_rows": probe.nonfinite_rows, "stored": probe.stored}
        arrays["probe/feature_mean"] = np.asarray(probe.feature_mean, np.float64)
        arrays["probe/feature_std"] = np.asarray(probe.feature_std, np.float64)
    np.savez(folder / ARRAYS_FILE, **arrays)
    (folder / META_FILE).write_text(json.dumps(meta), encoding="utf-8")


def load_findings(folder: str | Path) -> Findings:
    """Read back what ``save_findings`` wrote."""
    folder = Path(folder)
    meta = json.loads((folder / META_FILE).read_text(encoding="utf-8"))
    with np.load(folder / ARRAYS_FILE, allow_pickle=False) as npz:
        arrays = {key: npz[key] for key in npz.files}
    reports = []
    for i, layer in enumerate(meta["layers"]):
        weights = None
        if layer["weights"] is not None:
            w = layer["weights"]
            weights = WeightSummary(
                fan_in=w["fan_in"], fan_out=w["fan_out"], std=w["std"],
                reference_std=w["reference_std"], reference=w["reference"],
                row_norms=arrays[f"{i}/weights/row_norms"],
                bias=arrays[f"{i}/weights/bias"] if w["has_bias"] else None)
        reports.append(LayerReport(
            info=_info_from_json(layer["info"]),
            fractions=layer["fractions"],
            status=LayerStatus(layer["status"]),
            output_scale=None if layer["output_scale"] is None else layer["output_scale"],
            gradient_gain=None if layer["gradient_gain"] is None else layer["gradient_gain"],
            unit_table={c: arrays[f"{i}/unit/{c}"] for c in layer["columns"]},
            histograms={q: Histogram(quantity, arrays[f"{i}/hist/{q}/edges"],
                                     arrays[f"{i}/hist/{q}/counts"])
                        for q, quantity in layer["histograms"].items()},
            weights=weights,
        ))
    found = tuple(
        Finding(check=f["check"], severity=Severity(f["severity"]), layer=f["layer"],
                units=tuple(f["units"]), measure=from_json_number(f["measure"]),
                threshold=from_json_number(f["threshold"]), summary=f["summary"],
                cause=f["cause"], remedy=f["remedy"],
                unit_measures=tuple(from_json_number(m) for m in f["unit_measures"]),
                related=tuple(f.get("related", ())))
        for f in meta["findings"])
    probe = meta.get("probe")
    if probe is not None:
        probe = ProbeReport(feature_mean=arrays["probe/feature_mean"],
                            feature_std=arrays["probe/feature_std"], **probe)
    return Findings(source=SourceInfo(**meta["source"]), layers=tuple(reports), findings=found,
                    settings=meta["settings"], caveat=meta["caveat"], probe=probe)
