"""The one-byte changes that make the HDF5 library loop are known and stay inside the library.

Each entry of ``HDF5_HANGS`` (tests/support/mutants.py) must still hang (so the list handed to
the dashboard's time-limited child process stays true; if an HDF5 release fixes the loop the
test says so and the entry goes), and the hang must be inside h5py's call into the library, not
in actdoc's code, which must never loop on its own. The case runs in a forked child killed by
an alarm (tests/support/fuzzing.py).
"""

from __future__ import annotations

from tests.support.fuzzing import CaseRunner
from tests.support.mutants import DEMO_DUMPS, HDF5_HANGS, Mutation


def test_known_hdf5_hangs_are_inside_the_library(tmp_path):
    with CaseRunner() as runner:
        for seed, position, value in HDF5_HANGS:
            path = tmp_path / f"hang_{position}_{seed}"
            path.write_bytes(Mutation("set", position, value).apply(
                (DEMO_DUMPS / seed).read_bytes()))
            result = runner.run(path, timeout=2)
            assert result["outcome"] == "hang", (seed, position, result)
            assert result["where"] == "hdf5", result["trace"]
            assert "h5py/_hl/attrs.py" in result["trace"], result["trace"]
            assert "read_attributes" in result["trace"], result["trace"]
