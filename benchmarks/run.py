"""Throughput and memory of ``actdoc analyze`` against a raw read and a naive script.

    python benchmarks/run.py --size-gb 2 --also 4 [--repeats 3] [--cache DIR]

For each dump size it writes (or reuses from the cache folder) a dump with actdoc's writer, warms
the page cache, then runs, as whole processes and alternating within each repetition:

* ``raw``: one process reading every activation array in blocks with ``read_direct`` into a
  reused buffer (the floor for a single-process pass over the same file);
* ``analyze``: ``actdoc analyze DUMP``, the terminal report (which never shows the file's
  SHA-256, so the file is not hashed), output checked;
* ``analyze-json``: ``actdoc analyze DUMP --format json``, the findings document, which carries
  the SHA-256 of the whole file (hashed beside the pass), output checked;
* ``naive``: a script loading each array whole and making one numpy pass per statistic.

It prints wall time (best and median), GB/s, CPU seconds (user + system, median), peak resident
memory (largest process, and the whole process tree) and the ratios analyze / raw and
naive / analyze (the targets apply to ``analyze``); then the time to read one unit's column
through ``actdoc.io``. Results also go to ``benchmarks/out/`` as JSON.
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
sys.path.insert(0, str(HERE))

from dumps import BenchDump, ensure_bench_dump  # noqa: E402
from measure import ProcessRun, run_measured  # noqa: E402

WORKLOADS = ("raw", "analyze", "analyze-json", "naive")
TARGETS = {"analyze_over_raw_max": 2.0, "naive_over_analyze_min": 5.0, "peak_rss_mb_max": 400.0,
           "unit_read_ms_max": 50.0}


def workload_command(name: str, dump: Path) -> list[str]:
    if name == "analyze":
        return [sys.executable, "-m", "actdoc", "analyze", str(dump)]
    if name == "analyze-json":
        return [sys.executable, "-m", "actdoc", "analyze", str(dump), "--format", "json"]
    return [sys.executable, str(HERE / "workloads.py"), name, str(dump)]



def check_run(run: ProcessRun, dump: BenchDump) -> None:
    """Fail loudly when a workload did not do the whole job."""
    if run.returncode != 0:
        raise SystemExit(f"{run.label} failed with status {run.returncode}:\n{run.stderr[-2000:]}")
    if run.label == "analyze-json":
        document = json.loads(run.stdout)
        if (len(document["layers"]) != dump.layers or document["source"]["samples"] != dump.samples
                or len(document["source"]["sha256"]) != 64):
            raise SystemExit("analyze: the findings document does not cover the whole dump")
    elif run.label.startswith("analyze"):
        missing = [f"layer{i}" for i in range(1, dump.layers + 1) if f"layer{i}" not in run.stdout]
        if missing:
            raise SystemExit(f"{run.label}: the report does not cover {', '.join(missing)}")
    else:
        if json.loads(run.stdout)["bytes"] != dump.activation_bytes:
            raise SystemExit(f"{run.label}: read a different number of bytes than the dump holds")


def unit_read_times(dump: BenchDump, count: int = 7, seed: int = 0) -> list[float]:
    """Seconds to read one unit's column of preact, each on a freshly opened dump."""
    probe = (
        "import sys, time\n"
        "from actdoc.io import open_dump\n"
        "path, layer, units = sys.argv[1], sys.argv[2], [int(u) for u in sys.argv[3:]]\n"
        "for unit in units:\n"
        "    with open_dump(path) as dump:\n"
        "        started = time.perf_counter()\n"
        "        values = dump.layer(layer).unit_values('preact', unit)\n"
        "        print(time.perf_counter() - started, values.size)\n")
    rng = random.Random(seed)
    units = [str(rng.randrange(dump.units)) for _ in range(count)]
    done = subprocess.run([sys.executable, "-c", probe, str(dump.path), "layer2", *units],
                          capture_output=True, text=True, check=True)
    times = []
    for line in done.stdout.split("\n"):
        if line.strip():
            seconds, size = line.split()
            if int(size) != dump.samples:
                raise SystemExit("unit read returned the wrong number of values")
            times.append(float(seconds))
    return times


def measure_size(size_gb: float, repeats: int, cache: Path,
                 workloads: tuple[str, ...] = WORKLOADS) -> dict:
    started = time.perf_counter()
    dump = ensure_bench_dump(cache, size_gb)
    prepared_s = time.perf_counter() - started
    check_run(run_measured("raw", workload_command("raw", dump.path)), dump)  # warm page cache
    runs: dict[str, list[ProcessRun]] = {name: [] for name in workloads}
    for repeat in range(repeats):
        order = workloads if repeat % 2 == 0 else tuple(reversed(workloads))
        for name in order:
            run = run_measured(name, workload_command(name, dump.path))
            check_run(run, dump)
            runs[name].append(run)
    gb = dump.activation_bytes / 1e9
    rows = {}
    for name, done in runs.items():
        walls = [r.wall_s for r in done]
        rows[name] = {
            "wall_best_s": min(walls), "wall_median_s": statistics.median(walls),
            "gb_per_s": gb / min(walls),
            "cpu_s": statistics.median(r.cpu_s for r in done),
            "peak_rss_mb": max(r.peak_rss_mb for r in done),
            "tree_rss_mb": max(r.tree_rss_mb for r in done),
        }
    unit_times = unit_read_times(dump)
    return {
        "size_gb": gb, "file": str(dump.path), "samples": dump.samples, "layers": dump.layers,
        "units": dump.units, "prepare_s": prepared_s, "repeats": repeats, "workloads": rows,
        "analyze_over_raw": rows["analyze"]["wall_best_s"] / rows["raw"]["wall_best_s"],
        "naive_over_analyze": rows["naive"]["wall_best_s"] / rows["analyze"]["wall_best_s"],
        "json_over_raw": rows["analyze-json"]["wall_best_s"] / rows["raw"]["wall_best_s"],
        "naive_over_json": rows["naive"]["wall_best_s"] / rows["analyze-json"]["wall_best_s"],
        "unit_read_ms": {"median": 1000 * statistics.median(unit_times),
                         "max": 1000 * max(unit_times)},
    }


def machine() -> dict:
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
        mem_kb = next(int(line.split()[1]) for line in Path("/proc/meminfo").read_text()
                      .splitlines() if line.startswith("MemTotal:"))
    except (OSError, StopIteration):
        mem_kb = 0
    return {"cpus": os.cpu_count(), "cpu_model": model, "memory_gib": round(mem_kb / 2**20, 1),
            "python": platform.python_version()}


def verdicts(result: dict, flat_ratio: float | None) -> list[str]:
    lines = []
    over_raw, naive = result["analyze_over_raw"], result["naive_over_analyze"]
    rss = max(row["tree_rss_mb"] for name, row in result["workloads"].items()
              if name.startswith("analyze"))
    unit = result["unit_read_ms"]["median"]

    def mark(ok: bool) -> str:
        return "ok  " if ok else "MISS"

    lines.append(f"  {mark(over_raw <= TARGETS['analyze_over_raw_max'])} analyze / raw read "
                 f"{over_raw:.2f}x (target <= {TARGETS['analyze_over_raw_max']:g}x)")
    lines.append(f"  {mark(naive >= TARGETS['naive_over_analyze_min'])} naive / analyze "
                 f"{naive:.2f}x (target >= {TARGETS['naive_over_analyze_min']:g}x)")
    lines.append(f"  {mark(rss < TARGETS['peak_rss_mb_max'])} analyze peak memory (process "
                 f"tree) {rss:.0f} MB (target < {TARGETS['peak_rss_mb_max']:g} MB)")
    lines.append(f"  {mark(unit < TARGETS['unit_read_ms_max'])} unit column read {unit:.1f} ms "
                 f"median (target < {TARGETS['unit_read_ms_max']:g} ms)")
    lines.append(f"  info analyze --format json (hashing the file): {result['json_over_raw']:.2f}x "
                 f"the raw read, {result['naive_over_json']:.2f}x faster than naive")
    if flat_ratio is not None:
        lines.append(f"  {mark(flat_ratio < 1.25)} memory flat: analyze peak at this size is "
                     f"{flat_ratio:.2f}x the first size's (target < 1.25x)")
    return lines


def print_table(results: list[dict]) -> None:
    print(f"{'size GB':>8} {'workload':>13} {'best s':>8} {'median s':>9} {'GB/s':>6} "
          f"{'CPU s':>6} {'peak MB':>8} {'tree MB':>8}")
    first_rss = None
    for result in results:
        for name, row in result["workloads"].items():
            print(f"{result['size_gb']:8.2f} {name:>13} {row['wall_best_s']:8.2f} "
                  f"{row['wall_median_s']:9.2f} {row['gb_per_s']:6.2f} {row['cpu_s']:6.2f} "
                  f"{row['peak_rss_mb']:8.0f} {row['tree_rss_mb']:8.0f}")
        rss = max(row["tree_rss_mb"] for name, row in result["workloads"].items()
                  if name.startswith("analyze"))
        flat = None if first_rss is None else rss / first_rss
        first_rss = first_rss or rss
        print("\n".join(verdicts(result, flat)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="actdoc throughput and memory benchmark")
    parser.add_argument("--size-gb", type=float, default=2.0,
                        help="activation bytes of the main dump, in GB (default 2)")
    parser.add_argument("--also", type=float, action="append", default=[], metavar="GB",
                        help="also measure a dump of this size (repeatable; e.g. 4 to show "
                             "memory stays flat)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--cache", type=Path, default=HERE / "out" / "cache",
                        help="folder of generated dumps, reused between runs")
    parser.add_argument("--out", type=Path, default=HERE / "out",
                        help="folder for the JSON results")
    args = parser.parse_args(argv)
    results = [measure_size(size, args.repeats, args.cache) for size in [args.size_gb, *args.also]]
    print(f"machine: {machine()}")
    print_table(results)
    args.out.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    payload = {"machine": machine(), "targets": TARGETS, "results": results}
    for name in (f"results-{stamp}.json", "latest.json"):
        (args.out / name).write_text(json.dumps(payload, indent=2))
    print(f"results written to {args.out / 'latest.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
