"""Keeps the benchmark runnable: a tiny end-to-end run, and its memory gauge against the kernel."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

BENCHMARKS = Path(__file__).resolve().parents[2] / "benchmarks"


def test_tiny_benchmark_run_writes_a_complete_result(tmp_path):
    done = subprocess.run(
        [sys.executable, str(BENCHMARKS / "run.py"), "--size-gb", "0.01", "--repeats", "1",
         "--cache", str(tmp_path / "cache"), "--out", str(tmp_path / "out")],
        capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "analyze / raw read" in done.stdout and "unit column read" in done.stdout
    result = json.loads((tmp_path / "out" / "latest.json").read_text())
    (size,) = result["results"]
    assert set(size["workloads"]) == {"raw", "analyze", "analyze-json", "naive"}
    for row in size["workloads"].values():
        assert row["wall_best_s"] > 0 and row["peak_rss_mb"] > 10
    assert size["analyze_over_raw"] > 0 and size["naive_over_analyze"] > 0
    assert size["json_over_raw"] > 0 and "hashing the file" in done.stdout
    assert 0 < size["unit_read_ms"]["median"] <= size["unit_read_ms"]["max"]


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
