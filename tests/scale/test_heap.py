"""Freed heap memory goes back to the system after every block read into buffers (actdoc.heap).

Reference: glibc's malloc_trim(3) manual page (returns free memory of every arena to the
system; 1 when memory was released). The effect on the peak is a benchmark figure
(docs/scale.md), not a unit test; these check the call is made, and made safely.
"""

from __future__ import annotations

import platform

import h5py
import numpy as np
import pytest

from actdoc import heap
from actdoc.analysis import stats as stats_module
from actdoc.analysis.defaults import Settings
from actdoc.io import open_dump


def test_give_back_is_available_on_glibc_and_harmless_everywhere():
    if platform.system() == "Linux" and platform.libc_ver()[0] == "glibc":
        assert heap.available()
    blocks = [np.ones(1 << 20) for _ in range(8)]  # freed below, then given back
    del blocks
    heap.give_back()  # must not raise, whatever the C library


def gzip_dump(path, rows=2000, units=64):
    z = np.random.default_rng(1).normal(size=(rows, units)).astype(np.float32)
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.attrs["activation"] = "tanh"
        group.create_dataset("preact", data=z, chunks=(100, 64), compression="gzip")
        group.create_dataset("output", data=np.tanh(z), chunks=(100, 64), compression="gzip")
    return path, np.tanh(z).astype(np.float64)


@pytest.mark.parametrize("block", [256, 2000])
def test_every_block_read_into_buffers_gives_memory_back(tmp_path, monkeypatch, block):
    calls = []
    monkeypatch.setattr(heap, "give_back", lambda: calls.append(1))
    path, y = gzip_dump(tmp_path / "g.h5")
    with open_dump(path) as dump:
        measured = stats_module.accumulate_layer(dump.layers[0],
                                                 Settings(block_observations=block))
    assert len(calls) == -(-2000 // block)
    assert np.array_equal(measured.minimum, y.min(axis=0))  # numpy reference
    np.testing.assert_allclose(measured.moments.mean, y.mean(axis=0), rtol=1e-12)
