"""The two reference workloads the benchmark compares ``actdoc analyze`` against.

Run as a child process: ``python benchmarks/workloads.py raw|naive DUMP``. Each prints one JSON
line with the bytes it went through, so the parent can check that every workload read the same
data. HDF5 dumps and NPZ archives (``<layer>/<array>.npy`` members) are both understood.

* ``raw``: the floor. One process reads every activation array front to back in blocks of
  about 16 MiB into one reused buffer (``read_direct`` for HDF5; for NPZ ``readinto`` straight
  from the file where a member is stored, from the zip member where it is compressed), and
  computes nothing.
* ``naive``: what a first script looks like. It loads each array whole and makes one numpy pass
  per statistic (mean, std, min, max, active share, low and high saturated shares).
"""

from __future__ import annotations

import json
import sys
import zipfile

import h5py
import numpy as np

ACTIVATION_ARRAYS = ("preact", "output")
#: Bytes per raw block: 4096 rows of 1024 float32 units.
RAW_BLOCK_BYTES = 16 << 20
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


def npz_members(archive: zipfile.ZipFile) -> list[str]:
    return [name for name in archive.namelist()
            if name.endswith(tuple(f"/{a}.npy" for a in ACTIVATION_ARRAYS))]


def raw_read(path: str) -> dict:
    """Read every activation array once into a reused buffer; return bytes and a checksum."""
    total_bytes, checksum = 0, 0.0
    if zipfile.is_zipfile(path):
        buffer = memoryview(bytearray(RAW_BLOCK_BYTES))
        with zipfile.ZipFile(path) as archive, open(path, "rb", buffering=0) as raw:
            for info in (archive.getinfo(name) for name in npz_members(archive)):
                if info.compress_type != zipfile.ZIP_STORED:
                    member = archive.open(info)
                else:  # read the stored bytes straight from the file, past the local header
                    raw.seek(info.header_offset)
                    local = raw.read(30)
                    raw.seek(info.header_offset + 30 + int.from_bytes(local[26:28], "little")
                             + int.from_bytes(local[28:30], "little"))
                    member = raw
                version = np.lib.format.read_magic(member)
                read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                               else np.lib.format.read_array_header_2_0)
                shape, _, dtype = read_header(member)
                left = int(np.prod(shape)) * dtype.itemsize
                while left > 0:
                    got = member.readinto(buffer[:min(left, len(buffer))])
                    if not got:
                        raise SystemExit(f"{info.filename}: shorter than its header says")
                    left -= got
                    total_bytes += got
                checksum += buffer[0]
        return {"workload": "raw", "bytes": total_bytes, "checksum": checksum}
    with h5py.File(path, "r") as handle:
        for dataset in activation_datasets(handle):
            rows = dataset.shape[0]
            row_bytes = dataset.dtype.itemsize * int(np.prod(dataset.shape[1:]))
            step = max(1, RAW_BLOCK_BYTES // row_bytes)
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

    def measure(values: np.ndarray) -> None:
        nonlocal total_bytes, flagged
        total_bytes += values.nbytes
        flagged += int((naive_statistics(values)["active"] == 0).sum())

    if zipfile.is_zipfile(path):
        with np.load(path, allow_pickle=False) as archive:
            for name in archive.files:
                if name.rsplit("/", 1)[-1] in ACTIVATION_ARRAYS:
                    measure(archive[name])
    else:
        with h5py.File(path, "r") as handle:
            for dataset in activation_datasets(handle):
                measure(dataset[()])
    return {"workload": "naive", "bytes": total_bytes, "units_never_positive": flagged}


WORKLOADS = {"raw": raw_read, "naive": naive}

if __name__ == "__main__":
    if len(sys.argv) != 3 or sys.argv[1] not in WORKLOADS:
        sys.exit(f"usage: {sys.argv[0]} {'|'.join(WORKLOADS)} DUMP")
    print(json.dumps(WORKLOADS[sys.argv[1]](sys.argv[2])))
