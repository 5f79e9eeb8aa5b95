"""Throughput and memory of ``actdoc analyze`` over the benchmark matrix, against a raw read
and a naive script of the same file.

    python benchmarks/run.py --size-gb 2 [--also 4] [--cells all|smoke|NAME,...]
                             [--repeats 1] [--json] [--cache DIR] [--keep]

The matrix (``benchmarks/cells.py``) stores the same activation bytes the ways users store them:
actdoc's writer, plain h5py contiguous, h5py's own chunks, gzip chunks and ``np.savez``; widths
256, 1024 and 8192; outputs only, total inputs only, or both; float32 and float64. For each cell
and size it writes the dump (or reuses it from the cache folder), warms the page cache with one
raw read, then runs, as whole processes and alternating within each repetition:

* ``raw``: one process reading every activation array in 16 MiB blocks into one reused buffer,
  computing nothing (the floor for a single-process pass over the same file);
* ``analyze``: ``actdoc analyze DUMP``, the terminal report (which never shows the file's
  SHA-256, so the file is not hashed), output checked;
* ``naive``: a script loading each array whole and making one numpy pass per statistic;
* with ``--json``, also ``analyze-json``: the findings document, which carries the SHA-256
  of the whole file, hashed beside the pass.

It prints one row per cell and size: best wall times, the ratios analyze / raw and
naive / analyze, and the peak memory of ``analyze`` (the largest sum of resident memory over
its process tree, and the kernel's high-water mark of its largest process), then which targets
each cell meets. Dumps are deleted after their cell unless ``--keep``. Results also go to
``benchmarks/out/`` as JSON.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import random
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from benchmarks.cells import CELLS, SMOKE, Cell, cell_named, write_cell  # noqa: E402
from benchmarks.measure import ProcessRun, run_measured  # noqa: E402

TARGETS = {"analyze_over_raw_max": 2.5, "analyze_over_raw_goal": 1.5,
           "gzip_over_raw_max": 1.5, "naive_over_analyze_min": 4.0, "peak_mb_max": 250.0,
           "flat_max": 1.25, "unit_read_ms_max": 50.0}


def workload_command(name: str, dump: Path) -> list[str]:
    if name == "analyze":
        return [sys.executable, "-m", "actdoc", "analyze", str(dump)]
    if name == "analyze-json":
        return [sys.executable, "-m", "actdoc", "analyze", str(dump), "--format", "json"]
    return [sys.executable, str(HERE / "workloads.py"), name, str(dump)]


def check_run(run: ProcessRun, cell: Cell, samples: int) -> None:
    """Fail loudly when a workload did not do the whole job."""
    if run.returncode != 0:
        raise SystemExit(f"{cell.name} {run.label} failed with status {run.returncode}:\n"
                         f"{run.stderr[-2000:]}")
    if run.label == "analyze-json":
        document = json.loads(run.stdout)
        if (len(document["layers"]) != 4 or document["source"]["samples"] != samples
                or len(document["source"]["sha256"]) != 64):
            raise SystemExit(f"{cell.name}: the findings document does not cover the dump")
    elif run.label == "analyze":
        missing = [f"layer{i}" for i in range(1, 5) if f"layer{i}" not in run.stdout]
        if missing:
            raise SystemExit(f"{cell.name}: the report does not cover {', '.join(missing)}")
    elif json.loads(run.stdout)["bytes"] != cell.activation_bytes(samples):
        raise SystemExit(f"{cell.name} {run.label}: read a different number of bytes than "
                         f"the dump holds")


def unit_read_times(cell: Cell, path: Path, samples: int, count: int = 7) -> list[float]:
    """Seconds to read one unit's column through actdoc.io, each on a freshly opened dump."""
    probe = (
        "import sys, time\n"
        "from actdoc.io import open_dump\n"
        "path, array, units = sys.argv[1], sys.argv[2], [int(u) for u in sys.argv[3:]]\n"
        "for unit in units:\n"
        "    with open_dump(path) as dump:\n"
        "        started = time.perf_counter()\n"
        "        values = dump.layer('layer2').unit_values(array, unit)\n"
        "        print(time.perf_counter() - started, values.size)\n")
    rng = random.Random(0)
    units = [str(rng.randrange(cell.units)) for _ in range(count)]
    done = subprocess.run([sys.executable, "-c", probe, str(path), cell.stored[0], *units],
                          capture_output=True, text=True, check=True)
    times = []
    for line in done.stdout.split("\n"):
        if line.strip():
            seconds, size = line.split()
            if int(size) != samples:
                raise SystemExit("unit read returned the wrong number of values")
            times.append(float(seconds))
    return times


def measure_cell(cell: Cell, size_gb: float, repeats: int, cache: Path, keep: bool,
                 with_json: bool) -> dict:
    samples = cell.samples_for(size_gb)
    cache.mkdir(parents=True, exist_ok=True)
    path = cache / f"{cell.name}-{samples}{cell.suffix}"
    started = time.perf_counter()
    if not path.exists():
        partial = path.with_name(path.name + ".part")
        write_cell(cell, partial, samples)
        partial.rename(path)
    prepared = time.perf_counter() - started
    names = ("raw", "analyze", "naive") + (("analyze-json",) if with_json else ())
    try:
        check_run(run_measured("raw", workload_command("raw", path)), cell, samples)  # warm
        runs: dict[str, list[ProcessRun]] = {name: [] for name in names}
        for repeat in range(repeats):
            for name in names if repeat % 2 == 0 else tuple(reversed(names)):
                run = run_measured(name, workload_command(name, path))
                check_run(run, cell, samples)
                runs[name].append(run)
        unit = unit_read_times(cell, path, samples) if cell.layout == "writer" else None
    finally:
        if not keep:
            path.unlink(missing_ok=True)
    rows = {name: {"wall_best_s": min(r.wall_s for r in done),
                   "wall_median_s": statistics.median(r.wall_s for r in done),
                   "cpu_s": statistics.median(r.cpu_s for r in done),
                   "peak_rss_mb": max(r.peak_rss_mb for r in done),
                   "tree_rss_mb": max(r.tree_rss_mb for r in done)} for name, done in runs.items()}
    best = {name: row["wall_best_s"] for name, row in rows.items()}
    return {
        "cell": cell.name, "layout": cell.layout, "units": cell.units, "arrays": cell.arrays,
        "dtype": cell.dtype, "size_gb": cell.activation_bytes(samples) / 1e9, "samples": samples,
        "prepare_s": prepared, "repeats": repeats, "workloads": rows,
        "analyze_over_raw": best["analyze"] / best["raw"],
        "naive_over_analyze": best["naive"] / best["analyze"],
        "json_over_raw": best["analyze-json"] / best["raw"] if with_json else None,
        "peak_mb": max(rows["analyze"]["tree_rss_mb"], rows["analyze"]["peak_rss_mb"]),
        "unit_read_ms": None if unit is None else 1000 * statistics.median(unit),
    }


def machine() -> dict:
    model = ""
    mem_kb = 0
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
        mem_kb = next(int(line.split()[1]) for line in Path("/proc/meminfo").read_text()
                      .splitlines() if line.startswith("MemTotal:"))
    except (OSError, StopIteration):
        pass
    return {"cpus": os.cpu_count(), "cpu_model": model, "memory_gib": round(mem_kb / 2**20, 1),
            "python": platform.python_version()}


def verdict(result: dict, first: dict | None) -> str:
    """Which targets a cell meets (docs/scale.md): '' when all, else the missed ones."""
    missed = []
    limit = TARGETS["gzip_over_raw_max" if result["layout"] == "gzip" else "analyze_over_raw_max"]
    if result["analyze_over_raw"] > limit:
        missed.append(f"raw>{limit:g}x")
    if result["layout"] != "gzip" and result["naive_over_analyze"] < TARGETS["naive_over_analyze_min"]:
        missed.append(f"naive<{TARGETS['naive_over_analyze_min']:g}x")
    if result["peak_mb"] >= TARGETS["peak_mb_max"]:
        missed.append(f"peak>={TARGETS['peak_mb_max']:g}MB")
    if first is not None and result["peak_mb"] > TARGETS["flat_max"] * first["peak_mb"]:
        missed.append("memory not flat")
    if result["unit_read_ms"] is not None and result["unit_read_ms"] > TARGETS["unit_read_ms_max"]:
        missed.append(f"unit read>{TARGETS['unit_read_ms_max']:g}ms")
    return "ok" if not missed else "MISS " + ", ".join(missed)


def table(results: list[dict]) -> str:
    """The Markdown table of every cell and size (what the README shows)."""
    lines = ["| cell | GB | raw s | analyze s | naive s | analyze / raw | naive / analyze | "
             "CPU s raw / analyze | peak MB | targets |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    firsts: dict[str, dict] = {}
    for result in results:
        first = firsts.setdefault(result["cell"], result)
        w = result["workloads"]
        lines.append(
            f"| {result['cell']} | {result['size_gb']:.2f} | {w['raw']['wall_best_s']:.2f} | "
            f"{w['analyze']['wall_best_s']:.2f} | {w['naive']['wall_best_s']:.2f} | "
            f"{result['analyze_over_raw']:.2f}x | {result['naive_over_analyze']:.2f}x | "
            f"{w['raw']['cpu_s']:.2f} / {w['analyze']['cpu_s']:.2f} | {result['peak_mb']:.0f} | {verdict(result, None if first is result else first)} |")
    return "\n".join(lines)


def select(spec: str) -> list[Cell]:
    if spec == "all":
        return list(CELLS)
    if spec == "smoke":
        return [cell_named(name) for name in SMOKE]
    return [cell_named(name.strip()) for name in spec.split(",") if name.strip()]


def byte_compile_actdoc() -> None:
    """Write actdoc's .pyc files, as ``pip install`` does for an installed package: from a
    source checkout with PYTHONDONTWRITEBYTECODE set, every ``actdoc analyze`` would otherwise
    compile its ~60 modules again (about 0.07 s of each run)."""
    import compileall

    import actdoc

    compileall.compile_dir(str(Path(actdoc.__file__).parent), quiet=1)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="actdoc throughput and memory benchmark")
    parser.add_argument("--size-gb", type=float, default=2.0,
                        help="activation bytes of every cell, in GB (default 2)")
    parser.add_argument("--also", type=float, action="append", default=[], metavar="GB",
                        help="also measure at this size (repeatable; e.g. 4: is memory flat?)")
    parser.add_argument("--cells", default="all",
                        help="'all', 'smoke', or cell names separated by commas")
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--json", action="store_true",
                        help="also time --format json (which hashes the file)")
    parser.add_argument("--cache", type=Path, default=HERE / "out" / "cache",
                        help="folder of generated dumps")
    parser.add_argument("--keep", action="store_true", help="keep the dumps after measuring")
    parser.add_argument("--out", type=Path, default=HERE / "out",
                        help="folder for the JSON results")
    args = parser.parse_args(argv)
    byte_compile_actdoc()
    results = []
    for cell in select(args.cells):
        for size in [args.size_gb, *args.also]:
            result = measure_cell(cell, size, args.repeats, args.cache, args.keep, args.json)
            results.append(result)
            print(f"{cell.name} {result['size_gb']:.2f} GB: analyze / raw "
                  f"{result['analyze_over_raw']:.2f}x, naive / analyze "
                  f"{result['naive_over_analyze']:.2f}x, peak {result['peak_mb']:.0f} MB",
                  flush=True)
    print(f"machine: {machine()}")
    print(table(results))
    for result in results:
        if result["json_over_raw"] is not None:
            print(f"{result['cell']} {result['size_gb']:.1f} GB: analyze --format json "
                  f"(hashing the file) {result['json_over_raw']:.2f}x the raw read")
        if result["unit_read_ms"] is not None:
            print(f"{result['cell']} {result['size_gb']:.1f} GB: unit column read "
                  f"{result['unit_read_ms']:.1f} ms median")
    args.out.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    payload = {"machine": machine(), "targets": TARGETS, "results": results}
    for name in (f"results-{stamp}.json", "latest.json"):
        (args.out / name).write_text(json.dumps(payload, indent=2))
    print(f"results written to {args.out / 'latest.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
