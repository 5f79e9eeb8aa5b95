"""Reference findings of small versions of every benchmark cell and of the demo dumps.

    python -m benchmarks.reference [--out tests/scale/data/findings_reference.json.gz]

Run once with the engine as it stood before a speed change; the test
``tests/scale/test_same_findings.py`` then checks that the engine of today gives the same
findings, unit states, per-unit figures and histograms on every cell.

Each cell is measured twice: with the default settings, and with small blocks and a small
histogram sample (``SMALL``) so that blocks, sample ranges and the every-k-th-row sample are all
exercised. The record of one analysis is compact (``summarize``): every finding whole, each
layer's status, fractions, scales and histograms, and the per-unit table of a fixed subset of
units (all of them up to 64 units).

The committed file was written by the main branch's engine before the byte budgets of
docs/scale.md (main at "docs: the long runs' results", checks included), with this folder's
``cells.py``, ``reference.py`` and ``__init__.py`` copied into an empty folder's
``benchmarks/`` and run there as ``PYTHONPATH=<main checkout> python -m benchmarks.reference``
(with ``demo_models`` linked beside it), so that only the engine came from main. Regenerate it
the same way whenever a change is meant to alter findings.
"""

from __future__ import annotations

import argparse
import gzip
import json
import math
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from actdoc.analysis import Settings, analyze
from actdoc.io import open_dump
from benchmarks.cells import CELLS, Cell, write_cell

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_OUT = ROOT / "tests" / "scale" / "data" / "findings_reference.json.gz"
DEMO_DUMPS = ROOT / "demo_models" / "dumps"
#: Settings that exist before and after the change and make every cell several blocks long with
#: a sampled histogram (block and sample cuts are then the same in both engines).
SMALL = {"block_observations": 96, "histogram_rows": 40}
#: Samples per layer of a cell's small version, by width (a few MB to 20 MB per cell).
SAMPLES = {256: 1000, 1024: 300, 8192: 70}
TABLE_UNITS = 64


def small_samples(cell: Cell) -> int:
    return SAMPLES[cell.units]


def _number(value: Any) -> Any:
    value = float(value)
    return None if math.isnan(value) else ("inf" if value == math.inf else
                                           "-inf" if value == -math.inf else value)


def table_units(units: int) -> np.ndarray:
    """The units whose per-unit row is recorded: all up to TABLE_UNITS, else an even spread
    plus the first 16 (where the planted units are)."""
    if units <= TABLE_UNITS:
        return np.arange(units)
    return np.unique(np.concatenate([np.arange(16), np.arange(0, units, units // TABLE_UNITS)]))


def summarize(findings) -> dict[str, Any]:
    """The compact record of one analysis that the reference keeps."""
    layers = []
    for report in findings.layers:
        picked = table_units(report.info.units)
        table = {}
        for column, values in report.unit_table.items():
            values = np.asarray(values)[picked]
            table[column] = ([str(v) for v in values] if values.dtype.kind in "US"
                             else [_number(v) for v in values])
        layers.append({
            "name": report.name, "status": report.status.value,
            "fractions": {k: _number(v) for k, v in sorted(report.fractions.items())},
            "output_scale": None if report.output_scale is None else _number(report.output_scale),
            "gradient_gain": (None if report.gradient_gain is None
                              else _number(report.gradient_gain)),
            "histograms": {k: [int(c) for c in h.counts] for k, h in report.histograms.items()},
            "table_units": [int(u) for u in picked], "unit_table": table})
    return {
        "samples": findings.source.samples,
        "layers": layers,
        "findings": [{"check": f.check, "severity": f.severity.value, "layer": f.layer,
                      "units": list(f.units), "measure": _number(f.measure),
                      "threshold": _number(f.threshold), "summary": f.summary,
                      "unit_measures": [_number(v) for v in f.unit_measures]}
                     for f in findings.findings],
    }


def analyse(path: Path, settings: Settings) -> dict[str, Any]:
    with open_dump(path) as dump:
        return summarize(analyze(dump, settings, digest=False))


def build(folder: Path) -> dict[str, Any]:
    """Every record: ``{"cells": {name: {"default": ..., "small": ...}}, "demos": {...}}``."""
    cells = {}
    for cell in CELLS:
        path = write_cell(cell, folder / f"{cell.name}{cell.suffix}", small_samples(cell))
        cells[cell.name] = {"samples": small_samples(cell),
                            "default": analyse(path, Settings()),
                            "small": analyse(path, Settings(**SMALL))}
        path.unlink()
    demos = {path.name: analyse(path, Settings()) for path in sorted(DEMO_DUMPS.glob("*.h5"))}
    return {"small_settings": SMALL, "cells": cells, "demos": demos}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="actdoc-reference-") as folder:
        record = build(Path(folder))
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with gzip.open(args.out, "wt", encoding="utf-8") as handle:
        json.dump(record, handle, separators=(",", ":"), sort_keys=True)
    print(f"wrote {args.out} ({args.out.stat().st_size / 1e6:.2f} MB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
