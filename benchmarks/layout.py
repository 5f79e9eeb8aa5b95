"""Which HDF5 chunk shape serves both a full pass and a one-unit read?

``python benchmarks/layout.py [--samples 65536] [--units 1024]`` writes the same float32 array
of ``samples x units`` with several chunk shapes (and contiguous), then times, per layout, a full
pass in blocks of rows (``read_direct`` into a reused buffer, the way the engine reads) and the
read of single unit columns (the unit page), each on a freshly opened file so HDF5's chunk cache
starts empty. The files sit in the page cache: this measures layout cost, not the disk.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

#: Candidate layouts: None is contiguous storage.
CANDIDATES = (None, (1024, 256), (2048, 128), (4096, 64), (8192, 32), (256, 1024), (1024, 1024))
BLOCK_ROWS = 4096


def write_layout(path: Path, chunks, samples: int, units: int, block: np.ndarray) -> None:
    with h5py.File(path, "w") as handle:
        dataset = handle.create_dataset("x", (samples, units), np.float32, chunks=chunks)
        for first in range(0, samples, block.shape[0]):
            last = min(samples, first + block.shape[0])
            dataset[first:last] = block[: last - first]


def full_pass_s(path: Path) -> float:
    started = time.perf_counter()
    with h5py.File(path, "r") as handle:
        dataset = handle["x"]
        buffer = np.empty((BLOCK_ROWS, dataset.shape[1]), np.float32)
        for first in range(0, dataset.shape[0], BLOCK_ROWS):
            last = min(dataset.shape[0], first + BLOCK_ROWS)
            dataset.read_direct(buffer[: last - first], np.s_[first:last], np.s_[0: last - first])
    return time.perf_counter() - started


def unit_read_s(path: Path, unit: int) -> float:
    started = time.perf_counter()
    with h5py.File(path, "r") as handle:
        handle["x"][:, unit]
    return time.perf_counter() - started


def study(samples: int, units: int, folder: Path, repeats: int = 3) -> list[dict]:
    """Time every candidate layout; returns one row per layout."""
    rng = np.random.default_rng(0)
    block = rng.standard_normal((BLOCK_ROWS, units), dtype=np.float32)
    rows = []
    for chunks in CANDIDATES:
        path = folder / f"layout-{'contiguous' if chunks is None else 'x'.join(map(str, chunks))}.h5"
        write_layout(path, chunks, samples, units, block)
        full_pass_s(path)  # page cache warm-up
        passes = [full_pass_s(path) for _ in range(repeats)]
        unit_times = [unit_read_s(path, int(u)) for u in rng.integers(0, units, 5 * repeats)]
        best = min(passes)
        rows.append({
            "chunks": "contiguous" if chunks is None else list(chunks),
            "full_pass_s": best,
            "full_pass_gb_s": samples * units * 4 / best / 1e9,
            "unit_read_ms_median": 1000 * statistics.median(unit_times),
            "unit_read_ms_max": 1000 * max(unit_times),
        })
        path.unlink()
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=65536)
    parser.add_argument("--units", type=int, default=1024)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--json", type=Path, help="also write the rows as JSON here")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="actdoc-layout-") as folder:
        rows = study(args.samples, args.units, Path(folder), args.repeats)
    size_mb = args.samples * args.units * 4 / 2**20
    print(f"{args.samples} x {args.units} float32 ({size_mb:.0f} MiB), blocks of {BLOCK_ROWS} rows")
    print(f"{'chunks':>14} {'full pass s':>12} {'GB/s':>6} {'unit ms (median)':>17} {'max':>7}")
    for row in rows:
        chunks = row["chunks"] if isinstance(row["chunks"], str) else "x".join(map(str, row["chunks"]))
        print(f"{chunks:>14} {row['full_pass_s']:12.3f} {row['full_pass_gb_s']:6.2f} "
              f"{row['unit_read_ms_median']:17.1f} {row['unit_read_ms_max']:7.1f}")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(rows, indent=2))


if __name__ == "__main__":
    main()
