"""Reading uncompressed HDF5 storage through a memory map gives exactly what h5py reads.

Reference: h5py (the HDF5 library's own reader) reading the same datasets; every mapped block,
tile and fallback is compared with it value for value.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from actdoc.io import open_dump
from actdoc.io.direct import FileMap, storage_map


def write(path, **datasets):
    """One layer 'fc' holding the given datasets (name -> (array, create_dataset options))."""
    with h5py.File(path, "w", userblock_size=datasets.pop("userblock", 0)) as f:
        group = f.create_group("layers/fc")
        group.attrs["activation"] = "relu"
        for name, (array, options) in datasets.items():
            group.create_dataset(name, data=array, **options)
    return path


def values(rows=300, units=70, dtype=np.float32, seed=0):
    return np.random.default_rng(seed).normal(size=(rows, units)).astype(dtype)


CASES = {
    "contiguous": {},
    "chunked exact": {"chunks": (50, 35)},
    "chunked with partial edge chunks": {"chunks": (64, 32)},
    "chunks wider than the layer": {"chunks": (16, 128), "maxshape": (None, None)},
}


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_mapped_blocks_and_tiles_equal_h5py(tmp_path, case, dtype):
    z = values(dtype=dtype)
    path = write(tmp_path / "d.h5", preact=(z, CASES[case]), userblock=512)
    with open_dump(path) as dump, h5py.File(path, "r") as reference:
        source = dump.layers[0].sources["preact"]
        assert source.storage() is not None, "an uncompressed float dataset is mapped"
        expected = reference["layers/fc/preact"][()]
        for start, stop in [(0, 300), (0, 7), (13, 200), (299, 300), (64, 128)]:
            out = np.empty((stop - start, 70), dtype)
            assert np.array_equal(source.read_samples(start, stop, out=out), expected[start:stop])
            covered = np.full((stop - start, 70), np.nan, dtype)
            for row0, row1, col0, col1, view in source.tiles(start, stop):
                assert view.shape == (row1 - row0, col1 - col0) and not view.flags.writeable
                covered[row0 - start:row1 - start, col0:col1] = view
            assert np.array_equal(covered, expected[start:stop])


@pytest.mark.parametrize("options", [
    {"chunks": (50, 35), "compression": "gzip"},
    {"chunks": (50, 35), "shuffle": True},
    {"chunks": (50, 35), "fletcher32": True},
], ids=["gzip", "shuffle", "checksum"])
def test_filtered_datasets_are_not_mapped_and_read_as_before(tmp_path, options):
    z = values()
    path = write(tmp_path / "d.h5", preact=(z, options))
    with open_dump(path) as dump:
        source = dump.layers[0].sources["preact"]
        assert source.storage() is None and source.tiles(0, 10) is None
        assert np.array_equal(source.read_samples(5, 40, out=np.empty((35, 70), np.float32)),
                              z[5:40])


@pytest.mark.parametrize("array", [
    values(dtype=np.float16), values().astype(">f4"), (values() > 0).astype(np.int8)],
    ids=["float16", "big-endian", "integer"])
def test_other_dtypes_keep_the_h5py_path(tmp_path, array):
    path = write(tmp_path / "d.h5", output=(array, {"chunks": (50, 35)}))
    with h5py.File(path, "r") as f:
        assert storage_map(f["layers/fc/output"], FileMap(path)) is None


def test_unwritten_chunks_are_left_to_hdf5(tmp_path):
    path = tmp_path / "d.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("layers/fc/preact", shape=(300, 70), dtype="f4", chunks=(50, 35))
        ds[:100] = 1.0  # chunks past row 100 are never written: they read as the fill value
        f["layers/fc"].attrs["activation"] = "relu"
    with h5py.File(path, "r") as f:
        assert storage_map(f["layers/fc/preact"], FileMap(path)) is None
    with open_dump(path) as dump:
        block = dump.layers[0].sources["preact"].read_samples(90, 110)
        assert np.array_equal(block, np.r_[np.ones((10, 70)), np.zeros((10, 70))])


def test_chunks_pointing_past_the_end_of_the_file_are_not_mapped(tmp_path):
    """Chunks said to lie past the end of the mapped file are never viewed (a view there
    would crash the process instead of failing one read)."""
    path = write(tmp_path / "d.h5", preact=(values(), {"chunks": (50, 35)}))
    with h5py.File(path, "r") as f:
        last = max(f["layers/fc/preact"].id.get_chunk_info(i).byte_offset for i in range(12))
        short = tmp_path / "short.h5"
        short.write_bytes(path.read_bytes()[:last + 100])
        assert storage_map(f["layers/fc/preact"], FileMap(short)) is None
        assert storage_map(f["layers/fc/preact"], FileMap(path)) is not None


def test_whole_file_map_falls_back_to_one_map_per_piece(tmp_path, monkeypatch):
    """Where the file cannot be mapped whole (an address-space limit), pieces are mapped."""
    z = values()
    path = write(tmp_path / "d.h5", preact=(z, {"chunks": (64, 32)}))
    files = FileMap(path)
    real_mmap = __import__("mmap").mmap

    def refuse_whole(fd, length, *args, **kwargs):
        if length == 0:
            raise OSError(12, "Cannot allocate memory")
        return real_mmap(fd, length, *args, **kwargs)

    monkeypatch.setattr("actdoc.io.direct.mmap.mmap", refuse_whole)
    with h5py.File(path, "r") as f:
        storage = storage_map(f["layers/fc/preact"], files)
        out = storage.fill(10, 250, np.empty((240, 70), np.float32))
    assert files._pieces and np.array_equal(out, z[10:250])
    files.close()
