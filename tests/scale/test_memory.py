"""Flat memory: ``actdoc analyze`` finishes a dump larger than the address space it may use."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import h5py
import numpy as np
import pytest

#: Address-space limit of the analysing process. numpy and h5py imports need about 115 MB of
#: it with one BLAS thread (measured on this project's machines); each measuring thread keeps a
#: few 16 MiB blocks and float64 row slices on top, and glibc reserves address space for a
#: malloc arena per thread (MALLOC_ARENA_MAX bounds that reservation, not the memory used).
LIMIT_MB = 450
DUMP_GB = 0.7

LIMITED_ANALYZE = """
import os, resource, sys
limit = int(sys.argv[1]) << 20
resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
if hasattr(os, "sched_setaffinity"):  # two measuring threads, whatever the machine's cores
    os.sched_setaffinity(0, sorted(os.sched_getaffinity(0))[:2])
from actdoc.cli import main
sys.exit(main(["analyze", sys.argv[2], "--format", "json"]))
"""


@pytest.fixture(scope="module")
def big_dump(tmp_path_factory) -> Path:
    from benchmarks.dumps import ensure_bench_dump
    return ensure_bench_dump(tmp_path_factory.mktemp("big"), DUMP_GB).path


def never_positive_units(path: Path, layer: str) -> list[int]:
    """Units whose output is never above zero, counted with h5py and numpy block by block."""
    seen = None
    with h5py.File(path, "r") as handle:
        output = handle["layers"][layer]["output"]
        for first in range(0, output.shape[0], 8192):
            fired = (output[first:first + 8192] > 0).any(axis=0)
            seen = fired if seen is None else seen | fired
    return [int(u) for u in np.flatnonzero(~seen)]


@pytest.mark.slow
def test_analyze_completes_under_an_address_space_limit_below_the_dump_size(big_dump):
    size_mb = big_dump.stat().st_size / 2**20
    assert size_mb > LIMIT_MB * 1.4, "the dump must be clearly larger than the limit"
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MALLOC_ARENA_MAX="2")
    done = subprocess.run([sys.executable, "-c", LIMITED_ANALYZE, str(LIMIT_MB), str(big_dump)],
                          capture_output=True, text=True, env=env, timeout=240)
    assert done.returncode == 0, done.stderr[-2000:]
    document = json.loads(done.stdout)
    with h5py.File(big_dump, "r") as handle:
        samples = handle["layers"]["layer1"]["preact"].shape[0]
    assert document["source"]["samples"] == samples
    dead = {f["layer"]: f["units"] for f in document["findings"] if f["check"] == "dead"}
    # Reference: a plain numpy count over the stored outputs (no actdoc code involved).
    for layer in ("layer1", "layer4"):
        assert dead[layer] == never_positive_units(big_dump, layer)


def test_the_limit_bites(big_dump):
    """Control: under the same limit, loading one layer's two arrays whole fails."""
    code = ("import resource, sys, h5py\n"
            f"resource.setrlimit(resource.RLIMIT_AS, ({LIMIT_MB} << 20, {LIMIT_MB} << 20))\n"
            "f = h5py.File(sys.argv[1], 'r')\n"
            "kept = [f['layers'][n][a][()] for n in f['layers'] for a in ('preact', 'output')]\n")
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    done = subprocess.run([sys.executable, "-c", code, str(big_dump)], capture_output=True,
                          text=True, env=env, timeout=120)
    assert done.returncode != 0 and "MemoryError" in done.stderr + done.stdout


PEAK_RSS = """
import sys
from actdoc.cli import main
status = main(["analyze", sys.argv[1]])
# proc(5): VmHWM is this process image's peak resident set in kB, mapped file pages included
# (getrusage's ru_maxrss would also carry the forking pytest process's peak across exec).
peak = next(line.split()[1] for line in open("/proc/self/status") if line.startswith("VmHWM"))
print("PEAK", peak, status)
"""


@pytest.fixture(scope="module")
def big_npz(big_dump, tmp_path_factory) -> Path:
    """The same dump as an uncompressed NPZ archive (docs/contract.md section 2), written member by
    member with numpy's own .npy writer as np.savez does, so the test never holds it whole."""
    path = tmp_path_factory.mktemp("npz") / "big.npz"
    layers = []
    with h5py.File(big_dump, "r") as handle, \
            zipfile.ZipFile(path, "w", zipfile.ZIP_STORED, allowZip64=True) as archive:
        for name in handle["layers"]:
            group = handle["layers"][name]
            layers.append({"name": name, "activation": group.attrs["activation"]})
            for array in ("preact", "output"):
                with archive.open(f"{name}/{array}.npy", "w", force_zip64=True) as member:
                    np.lib.format.write_array(member, group[array][()])
        with archive.open("actdoc_meta.npy", "w") as member:
            np.lib.format.write_array(member, np.array(json.dumps({"layers": layers})))
    return path


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
@pytest.mark.parametrize("container", ["hdf5", "npz"])
def test_peak_resident_memory_stays_far_below_the_dump_size(big_dump, big_npz, container):
    """Mapped storage must not stay resident: the peak is the interpreter plus a few blocks."""
    path = big_dump if container == "hdf5" else big_npz
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    done = subprocess.run([sys.executable, "-c", PEAK_RSS, str(path)], capture_output=True,
                          text=True, env=env, timeout=240)
    assert done.returncode == 0, done.stderr[-2000:]
    peak_kib, status = done.stdout.rsplit("PEAK", 1)[1].split()
    peak_mb, size_mb = int(peak_kib) / 1024, path.stat().st_size / 2**20
    assert status == "0" and size_mb > 600
    assert peak_mb < 300, f"peak {peak_mb:.0f} MB while analysing {size_mb:.0f} MB"


@pytest.fixture(scope="module")
def wide_contiguous(tmp_path_factory) -> Path:
    """A plain h5py dump of 8192-unit layers, stored contiguously, outputs only: a contiguous
    dataset is one tile as wide as the layer, the case sized in rows used to blow up."""
    from benchmarks.cells import cell_named, write_cell
    cell = cell_named("contiguous-8192-out-32")
    path = tmp_path_factory.mktemp("wide") / "wide.h5"
    return write_cell(cell, path, cell.samples_for(DUMP_GB))


@pytest.mark.slow
def test_wide_contiguous_outputs_are_measured_under_an_address_space_limit(wide_contiguous):
    size_mb = wide_contiguous.stat().st_size / 2**20
    assert size_mb > LIMIT_MB * 1.4, "the dump must be clearly larger than the limit"
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MALLOC_ARENA_MAX="2")
    done = subprocess.run([sys.executable, "-c", LIMITED_ANALYZE, str(LIMIT_MB),
                           str(wide_contiguous)], capture_output=True, text=True, env=env,
                          timeout=240)
    assert done.returncode == 0, done.stderr[-2000:]
    document = json.loads(done.stdout)
    dead = {f["layer"]: f["units"] for f in document["findings"] if f["check"] == "dead"}
    # Reference: a plain numpy count over the stored outputs (no actdoc code involved).
    for layer in ("layer1", "layer4"):
        assert dead[layer] == never_positive_units(wide_contiguous, layer)
