"""The two reference workloads the benchmark compares ``actdoc analyze`` against.

Run as a child process: ``python benchmarks/workloads.py raw|naive DUMP``. Each prints one JSON
line with the bytes it went through, so the parent can check that every workload read the same
data.

* ``raw``: the floor. One process reads every activation array front to back in blocks of rows
  with ``read_direct`` into one reused buffer, and computes nothing.
* ``naive``: what a first script looks like. It loads each array whole and makes one numpy pass
  per statistic (mean, std, min, max, active share, low and high saturated shares).
"""

from __future__ import annotations

import json
import sys

import h5py
import numpy as np

ACTIVATION_ARRAYS = ("preact", "output")
#: Rows per raw block: a multiple of the writer's chunk rows, 16 MiB for 1024 float32 units.
RAW_BLOCK_ROWS = 4096
#: Logistic saturated zone in the total input, |z| > ln 99 (output below 0.01 or above 0.99).
SATURATION_Z = float(np.log(99.0))


def activation_datasets(handle: h5py.File) -> list[h5py.Dataset]:
    """Every preact and output dataset of every layer, in the file's layer order."""
    found = []
    for name in handle["layers"]:
        group = handle["layers"][name]
        for array in ACTIVATION_ARRAYS:
            if array in group:
                found.append(group[array])
    return found


def raw_read(path: str) -> dict:
    """Read every activation array once into a reused buffer; return bytes and a checksum."""
    total_bytes, checksum = 0, 0.0
    with h5py.File(path, "r") as handle:
        for dataset in activation_datasets(handle):
            rows = dataset.shape[0]
            step = RAW_BLOCK_ROWS
            buffer = np.empty((step,) + dataset.shape[1:], dataset.dtype)
            for first in range(0, rows, step):
                last = min(rows, first + step)
                view = buffer[: last - first]
                dataset.read_direct(view, np.s_[first:last], np.s_[0: last - first])
                total_bytes += view.nbytes
            checksum += float(buffer[0, 0])  # keeps the reads observable
    return {"workload": "raw", "bytes": total_bytes, "checksum": checksum}


def naive_statistics(values: np.ndarray) -> dict[str, np.ndarray]:
    """Per-unit statistics of a whole ``[samples, units]`` array, one numpy pass each."""
    return {
        "mean": values.mean(axis=0),
        "std": values.std(axis=0),
        "min": values.min(axis=0),
        "max": values.max(axis=0),
        "active": (values > 0).mean(axis=0),
        "low": (values < -SATURATION_Z).mean(axis=0),
        "high": (values > SATURATION_Z).mean(axis=0),
    }


def naive(path: str) -> dict:
    """Load each activation array whole and compute the statistics pass by pass."""
    total_bytes, flagged = 0, 0
    with h5py.File(path, "r") as handle:
        for dataset in activation_datasets(handle):
            values = dataset[()]
            total_bytes += values.nbytes
            stats = naive_statistics(values)
            flagged += int((stats["active"] == 0).sum())
            del values
    return {"workload": "naive", "bytes": total_bytes, "units_never_positive": flagged}


WORKLOADS = {"raw": raw_read, "naive": naive}

if __name__ == "__main__":
    if len(sys.argv) != 3 or sys.argv[1] not in WORKLOADS:
        sys.exit(f"usage: {sys.argv[0]} {'|'.join(WORKLOADS)} DUMP")
    print(json.dumps(WORKLOADS[sys.argv[1]](sys.argv[2])))
