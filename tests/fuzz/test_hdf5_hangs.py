"""The one-byte changes that make the HDF5 library loop are known and stay inside the library.

Each entry of ``HDF5_HANGS`` (tests/support/mutants.py) must still hang (so the list handed to
the dashboard's time-limited child process stays true; if an HDF5 release fixes the loop the
test says so and the entry goes), and the hang must be inside h5py's call into the library, not
in actdoc's code, which must never loop on its own. The case runs in a forked child killed by
an alarm (tests/support/fuzzing.py).
"""

from __future__ import annotations

import pytest

from tests.support.fuzzing import CaseRunner
from tests.support.mutants import DEMO_DUMPS, HDF5_HANGS, Mutation


@pytest.mark.parametrize("seed, position, value", HDF5_HANGS,
                         ids=[f"{s}@{p}" for s, p, _ in HDF5_HANGS])
def test_known_hdf5_hang_is_inside_the_library(tmp_path, seed, position, value):
    path = tmp_path / "hang.h5"
    path.write_bytes(Mutation("set", position, value).apply((DEMO_DUMPS / seed).read_bytes()))
    with CaseRunner() as runner:
        result = runner.run(path, timeout=3)
    assert result["outcome"] == "hang", result
    assert result["where"] == "hdf5", result["trace"]
    assert "h5py/_hl/attrs.py" in result["trace"] and "read_attributes" in result["trace"]
