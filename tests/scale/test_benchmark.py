"""Keeps the benchmark runnable: a tiny end-to-end run, and its memory gauge against the kernel."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

BENCHMARKS = Path(__file__).resolve().parents[2] / "benchmarks"


def test_tiny_benchmark_run_covers_the_smoke_cells(tmp_path):
    """The smoke run: actdoc's writer, the wide contiguous output-only dump and the wide NPZ."""
    done = subprocess.run(
        [sys.executable, str(BENCHMARKS / "run.py"), "--size-gb", "0.01", "--cells", "smoke",
         "--json", "--cache", str(tmp_path / "cache"), "--out", str(tmp_path / "out")],
        capture_output=True, text=True, timeout=240)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "| cell | GB | raw s | analyze s" in done.stdout and "unit column read" in done.stdout
    result = json.loads((tmp_path / "out" / "latest.json").read_text())
    cells = {row["cell"]: row for row in result["results"]}
    assert set(cells) == {"writer-1024-both-32", "contiguous-8192-out-32", "npz-8192-out-32"}
    for row in cells.values():
        assert set(row["workloads"]) == {"raw", "analyze", "naive", "analyze-json"}
        for workload in row["workloads"].values():
            assert workload["wall_best_s"] > 0 and workload["peak_rss_mb"] > 10
        assert row["analyze_over_raw"] > 0 and row["naive_over_analyze"] > 0
        assert 0.009 < row["size_gb"] < 0.011 and row["peak_mb"] > 10
        assert f"| {row['cell']} | 0.01 |" in done.stdout
    assert cells["writer-1024-both-32"]["unit_read_ms"] > 0
    assert not list((tmp_path / "cache").iterdir()), "dumps are deleted after their cell"


def test_every_cell_of_a_size_holds_the_same_activation_bytes():
    from benchmarks.cells import CELLS

    sizes = {cell.activation_bytes(cell.samples_for(2.0)) for cell in CELLS}
    assert max(sizes) - min(sizes) < 2e-4 * 2e9  # rounding to whole samples only
    layouts = {cell.layout for cell in CELLS}
    assert layouts == {"writer", "contiguous", "chunked", "gzip", "npz"}
    assert {cell.units for cell in CELLS} == {256, 1024, 8192}
    assert {cell.arrays for cell in CELLS} == {"out", "pre", "both"}
    assert {cell.dtype for cell in CELLS} == {"float32", "float64"}


def test_peak_memory_gauge_sees_an_allocation_of_known_size():
    """A child touching 200 MiB must report a peak of at least that, and not the parent's."""
    from benchmarks.measure import run_measured
    ballast = b"x" * (300 << 20)  # resident in the parent; must not leak into the figure
    code = "import sys; b = bytearray(200 << 20); b[::4096] = b'x' * len(b[::4096])"
    run = run_measured("alloc", [sys.executable, "-S", "-c", code])
    assert run.returncode == 0
    # Kernel rusage (getrusage(2): ru_maxrss in KiB on Linux) against the known allocation.
    assert 200 <= run.peak_rss_mb < 200 + 60
    assert len(ballast) == 300 << 20
