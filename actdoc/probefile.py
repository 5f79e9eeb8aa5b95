"""Probe inputs for the forward pass: a file of inputs, a dump's /probe/input, or a synthetic one.

``open_probe(path)`` reads the inputs a network is run on (docs/dump-layout.md, "Forward pass"):

- a ``.npy`` array (recognised by its magic bytes), memory-mapped and read in blocks of rows;
- an HDF5 file: the dataset ``probe/input`` (an actdoc dump, or a file written for the purpose),
  else the file's only dataset at the root; read in blocks of rows;
- an NPZ archive: the member ``probe/input``, else its only member (read whole: numpy cannot
  hand out rows of a zip member; members expanding past the NPZ member limit are refused).

Each is refused with one sentence when it holds no array of samples, an array of objects, or
anything but real numbers. ``SyntheticProbe`` draws standard normal inputs N(0, I) block by
block from a seed: a stand-in for data, used only when asked for and always flagged loudly.
"""

from __future__ import annotations

import math
import zipfile
from pathlib import Path
from typing import Callable

import numpy as np

from actdoc.errors import DumpTooLarge, InvalidDump, UnreadableDump, UnsafeDump, describe
from actdoc.io.limits import DEFAULT_MEMBER_BYTES
from actdoc.io.memory import MemorySource

NPY_MAGIC = b"\x93NUMPY"
HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
ZIP_MAGIC = b"PK\x03\x04"
PROBE_KEY = "probe/input"
#: Rows per block of the synthetic probe (each block has its own seeded generator, so any
#: range of rows is drawn the same way whatever the reading order).
SYNTHETIC_BLOCK_ROWS = 1024


class DatasetSource:
    """Rows of an h5py dataset behind the ArraySource contract."""

    def __init__(self, dataset, closer: Callable[[], None]):
        self._dataset = dataset
        self.shape = tuple(int(n) for n in dataset.shape)
        self.dtype = dataset.dtype
        self.close = closer

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        rows = self._dataset[start:stop]
        if out is not None and out.shape == rows.shape and out.dtype == rows.dtype:
            out[...] = rows
            return out
        return rows

    def read_unit(self, unit: int) -> np.ndarray:
        return self._dataset[:, unit]

    def read_all(self) -> np.ndarray:
        return self._dataset[()]


class SyntheticProbe:
    """``samples`` rows of standard normal inputs with ``features`` columns, drawn per block of
    SYNTHETIC_BLOCK_ROWS rows from ``numpy.random.default_rng([seed, block])``."""

    def __init__(self, samples: int, features: int, seed: int = 0):
        self.shape = (int(samples), int(features))
        self.dtype = np.dtype(np.float32)
        self.seed = int(seed)

    def _block(self, index: int) -> np.ndarray:
        first = index * SYNTHETIC_BLOCK_ROWS
        rows = min(SYNTHETIC_BLOCK_ROWS, self.shape[0] - first)
        rng = np.random.default_rng([self.seed, index])
        return rng.standard_normal((rows, self.shape[1]), dtype=np.float32)

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        stop = min(stop, self.shape[0])
        first, last = start // SYNTHETIC_BLOCK_ROWS, max(start, stop - 1) // SYNTHETIC_BLOCK_ROWS
        blocks = np.concatenate([self._block(i) for i in range(first, last + 1)])
        offset = start - first * SYNTHETIC_BLOCK_ROWS
        return blocks[offset:offset + (stop - start)]

    def read_unit(self, unit: int) -> np.ndarray:
        return self.read_samples(0, self.shape[0])[:, unit]

    def read_all(self) -> np.ndarray:
        return self.read_samples(0, self.shape[0])

    def close(self) -> None:
        pass


def check_probe_array(path: Path, key: str, shape: tuple[int, ...], dtype: np.dtype) -> None:
    """A probe is a real-valued array with a sample axis and at least one sample."""
    where = describe(path, None, key)
    dtype = np.dtype(dtype)
    if dtype.hasobject:
        raise UnsafeDump(f"{where}: holds Python objects; a probe holds numbers only")
    if dtype.kind not in "fiub":
        raise InvalidDump(f"{where}: dtype {dtype} is not a real number type")
    if len(shape) < 2 or 0 in shape:
        raise InvalidDump(f"{where}: expected a non-empty array [samples, features], found "
                          f"shape [{', '.join(map(str, shape))}]")


def _npy(path: Path):
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:  # object arrays refuse to load without pickle
        raise UnsafeDump(f"{describe(path)}: cannot be read as a numeric array ({exc})") from None
    check_probe_array(path, "array", array.shape, array.dtype)
    source = MemorySource(array)
    source.close = lambda: None
    return source


def _hdf5(path: Path):
    import h5py

    handle = h5py.File(path, "r")
    try:
        if PROBE_KEY in handle and isinstance(handle[PROBE_KEY], h5py.Dataset):
            key = PROBE_KEY
        else:
            datasets = [k for k in handle if isinstance(handle.get(k), h5py.Dataset)]
            if len(datasets) != 1:
                raise InvalidDump(f"{describe(path)}: holds no dataset '{PROBE_KEY}' and "
                                  f"{len(datasets)} datasets at the root; expected one array of "
                                  f"probe inputs")
            key = datasets[0]
        dataset = handle[key]
        if dataset.is_virtual or dataset.external:
            raise UnsafeDump(f"{describe(path, None, key)}: stored outside the file (virtual or "
                             f"external); a probe must be self-contained")
        check_probe_array(path, key, dataset.shape, dataset.dtype)
        return DatasetSource(dataset, handle.close)
    except BaseException:
        handle.close()
        raise


def _npz(path: Path, limit: int):
    with zipfile.ZipFile(path) as members:  # sizes from the zip directory, before inflating
        for info in members.infolist():
            if info.file_size > limit:
                raise DumpTooLarge(f"{describe(path, None, info.filename)}: expands to "
                                   f"{info.file_size} bytes, past the limit of {limit}")
    with np.load(path, allow_pickle=False) as archive:
        names = list(archive.files)
        key = PROBE_KEY if PROBE_KEY in names else (names[0] if len(names) == 1 else None)
        if key is None:
            raise InvalidDump(f"{describe(path)}: holds no member '{PROBE_KEY}' and "
                              f"{len(names)} members; expected one array of probe inputs")
        try:
            array = archive[key]
        except ValueError as exc:
            raise UnsafeDump(f"{describe(path, None, key)}: cannot be read as a numeric array "
                             f"({exc})") from None
    check_probe_array(path, key, array.shape, array.dtype)
    source = MemorySource(array)
    source.close = lambda: None
    return source


def open_probe(path: str | Path, limit: int = DEFAULT_MEMBER_BYTES):
    """An ArraySource (with ``close``) over the probe inputs stored in ``path``; an NPZ member
    is read whole, so one expanding past ``limit`` bytes is refused first."""
    path = Path(path)
    where = describe(path)
    if not path.is_file():
        raise UnreadableDump(f"{where}: no such probe file")
    try:
        with open(path, "rb") as handle:
            head = handle.read(8)
        if head.startswith(NPY_MAGIC):
            return _npy(path)
        if head == HDF5_MAGIC:
            return _hdf5(path)
        if head.startswith(ZIP_MAGIC):
            return _npz(path, limit)
    except (OSError, zipfile.BadZipFile, EOFError) as exc:
        raise UnreadableDump(f"{where}: the probe file cannot be read "
                             f"({getattr(exc, 'strerror', None) or exc})") from None
    raise InvalidDump(f"{where}: not a probe file; expected a .npy array, or an HDF5 or NPZ file "
                      f"holding '{PROBE_KEY}'")


def features_of(source) -> int:
    """Inputs per sample: the product of every axis but the first."""
    return math.prod(source.shape[1:])
