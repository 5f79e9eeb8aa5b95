"""Mapped chunks are dropped tile by tile as they are measured, not a whole block at a time.

A measuring thread then holds about one chunk of each array in the map instead of a block of
16 MiB of each (docs/scale.md, "Why memory stays flat"); with two threads on a 2 GB dump of
8192 units in the writer's chunks the peak went from about 265 MB to about 155 MB. The checks
here are on the order of the release calls (deterministic), with the values compared against
h5py (the HDF5 library's own reader) as the reference, and the statistics against numpy.
"""

from __future__ import annotations

import h5py
import numpy as np

from actdoc.analysis.defaults import Settings
from actdoc.analysis.stats import accumulate_layer
from actdoc.analysis.tiles import paired_tiles
from actdoc.io import open_dump
from actdoc.io.direct import FileMap

#: Chunks of 65536 values, the least that is measured in place (actdoc.analysis.tiles).
ROWS, UNITS, CHUNK = 1024, 768, (256, 256)


def chunked_dump(path):
    rng = np.random.default_rng(3)
    z = rng.normal(size=(ROWS, UNITS)).astype(np.float32)
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/fc")
        group.attrs["activation"] = "logistic"
        group.create_dataset("preact", data=z, chunks=CHUNK)
        group.create_dataset("output", data=1 / (1 + np.exp(-z)), chunks=CHUNK)
    return path


def test_each_tile_is_released_before_the_next_one_is_measured(tmp_path, monkeypatch):
    released: list[tuple[int, int]] = []
    monkeypatch.setattr(FileMap, "release", lambda self, offset, nbytes:
                        released.append((offset, nbytes)))
    with open_dump(chunked_dump(tmp_path / "d.h5")) as dump, \
            h5py.File(dump.path, "r") as reference:
        layer = dump.layers[0]
        expected = reference["layers/fc/output"][()]
        blocks = paired_tiles(layer, block_observations=512)
        assert blocks is not None, "uncompressed chunks are measured in place"
        for rows, tiles in blocks:
            seen = 0
            for row0, units, z, y in tiles:
                # The tiles before this one are gone from the map, two arrays each.
                assert len(released) == 2 * seen
                assert np.array_equal(y, expected[row0:row0 + y.shape[0], units])
                seen += 1
            assert len(released) == 2 * seen == 2 * (UNITS // CHUNK[1]) * (rows // CHUNK[0])
            released.clear()  # and the block adds no second release of the same ranges
        assert released == []


def test_a_release_drops_only_the_chunks_of_its_units(tmp_path, monkeypatch):
    released: list[tuple[int, int]] = []
    monkeypatch.setattr(FileMap, "release", lambda self, offset, nbytes:
                        released.append((offset, nbytes)))
    with open_dump(chunked_dump(tmp_path / "d.h5")) as dump:
        source = dump.layers[0].sources["preact"]
        storage = source.storage()
        source.release(256, 512, slice(256, 512))
        chunk_bytes = CHUNK[0] * CHUNK[1] * 4
        assert released == [(int(storage.offsets[1, 1]), chunk_bytes)]
        released.clear()
        source.release(256, 512)
        assert sorted(released) == sorted((int(offset), chunk_bytes)
                                          for offset in storage.offsets[1])


def test_statistics_are_those_of_numpy_whatever_the_release(tmp_path):
    """Releasing pages early changes what is mapped, never what is read (numpy reference)."""
    with open_dump(chunked_dump(tmp_path / "d.h5")) as dump, \
            h5py.File(dump.path, "r") as reference:
        y = reference["layers/fc/output"][()].astype(np.float64)
        stats = accumulate_layer(dump.layers[0], Settings(block_observations=512))
    assert np.array_equal(stats.minimum, y.min(axis=0))
    assert np.array_equal(stats.maximum, y.max(axis=0))
    np.testing.assert_allclose(stats.moments.mean, y.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(stats.moments.std(), y.std(axis=0), rtol=1e-9)
