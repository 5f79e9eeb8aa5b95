"""Uncompressed HDF5 datasets (and stored NPZ members) read straight from a map of the file.

h5py copies every block through the HDF5 library under one global lock, at about 2 GB/s on the
project's machine. An unfiltered dataset's values are plain arrays at known file offsets (one
for a contiguous dataset, one per chunk otherwise), so they can be seen as numpy views of a
read-only map of the file: copying them is a memcpy that runs in several threads at once, and
the statistics can read them with no copy at all. Pages are dropped from the map once their
block is measured (they stay in the page cache), so memory stays flat however large the file.

Only what can be seen exactly is mapped: 2-D float32 or float64 datasets in the machine's byte
order, without filters, stored contiguously or in chunks that are all written and lie inside the
file. Everything else keeps the h5py path. The file must not shrink while it is being read.
"""

from __future__ import annotations

import math
import mmap
import os
import threading
from pathlib import Path

import h5py
import numpy as np

Tile = tuple[int, int, int, int, np.ndarray]
PAGE = mmap.PAGESIZE
#: Where the OS cannot be told to drop mapped pages, they stay mapped until the map closes.
DONT_NEED = getattr(mmap, "MADV_DONTNEED", None)
#: Bytes of each chunk before a released range that are released with it (four times Linux's
#: default fault-around of 64 KiB): dropping pages no longer mapped costs next to nothing.
LOOK_BEHIND = 256 << 10
#: Chunks up to this size are released whole whenever rows of them are (a contiguous dataset is
#: one chunk as large as the array: there only LOOK_BEHIND is released again).
WHOLE_CHUNK = 8 << 20


class FileMap:
    """Read-only views of pieces of one file, through one map of the whole file.

    Pages of a piece are dropped from the map once it is measured (``release``), so memory
    stays flat. Where the whole file cannot be mapped (an address-space limit smaller than the
    file), each piece gets a map of its own that lives exactly as long as the arrays viewing
    it. One map is preferred: mapping and unmapping pieces takes a lock that stalls the page
    faults of every other measuring thread.
    """

    def __init__(self, path: Path):
        self.path = Path(path)
        self._lock = threading.Lock()
        self._fd: int | None = None
        self._map: mmap.mmap | None = None
        self._whole: np.ndarray | None = None
        self._pieces = False

    def _open(self) -> int:
        with self._lock:
            if self._fd is None:
                self._fd = os.open(self.path, os.O_RDONLY)
                try:
                    self._map = mmap.mmap(self._fd, 0, access=mmap.ACCESS_READ)
                    self._whole = np.frombuffer(self._map, np.uint8)
                except (OSError, ValueError):
                    self._pieces = True
            return self._fd

    def view(self, offset: int, nbytes: int) -> np.ndarray:
        """Bytes ``offset:offset + nbytes`` of the file as a read-only uint8 array."""
        fd = self._open()
        if not self._pieces:
            return self._whole[offset:offset + nbytes]
        start = offset - offset % mmap.ALLOCATIONGRANULARITY
        mapped = mmap.mmap(fd, offset + nbytes - start, access=mmap.ACCESS_READ, offset=start)
        return np.frombuffer(mapped, np.uint8, nbytes, offset - start)

    def release(self, offset: int, nbytes: int) -> None:
        """Drop the pages of bytes ``offset:offset + nbytes`` from the map (they stay in the
        page cache); a piece mapped on its own goes when its views do."""
        if self._map is None or DONT_NEED is None:
            return
        first = offset - offset % PAGE
        last = min(len(self._map), -(-(offset + nbytes) // PAGE) * PAGE)
        if last > first:
            self._map.madvise(DONT_NEED, first, last - first)

    def close(self) -> None:
        with self._lock:
            self._whole = None
            if self._map is not None:
                try:
                    self._map.close()
                except BufferError:  # a view is still alive: the map closes when it dies
                    pass
                self._map = None
            if self._fd is not None:
                os.close(self._fd)
                self._fd = None


class StorageMap:
    """Where the values of one dataset lie in the file: a grid of chunks (one for contiguous)."""

    def __init__(self, files: FileMap, shape: tuple[int, int], dtype: np.dtype,
                 chunk: tuple[int, int], offsets: np.ndarray):
        self.files = files
        self.shape = shape
        self.dtype = dtype
        self.chunk = chunk
        self.offsets = offsets  # [chunk rows, chunk columns] byte offsets in the file
        self.chunk_bytes = chunk[0] * chunk[1] * dtype.itemsize

    def tiles(self, start: int, stop: int) -> list[Tile]:
        """Views ``(row0, row1, col0, col1, values)`` covering rows ``start:stop``, all units.

        OSError when the file cannot be mapped (callers then read through h5py).
        """
        rows, cols = self.chunk
        row_bytes = cols * self.dtype.itemsize
        out = []
        for i in range(start // rows, -(-stop // rows)):
            row0, row1 = max(start, i * rows), min(stop, (i + 1) * rows, self.shape[0])
            for j in range(self.offsets.shape[1]):
                col0, col1 = j * cols, min((j + 1) * cols, self.shape[1])
                offset = int(self.offsets[i, j]) + (row0 - i * rows) * row_bytes
                piece = self.files.view(offset, (row1 - row0) * row_bytes)
                out.append((row0, row1, col0, col1,
                            piece.view(self.dtype).reshape(row1 - row0, cols)[:, :col1 - col0]))
        return out

    def fill(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        """Copy rows ``start:stop`` into ``out`` (OSError when the file cannot be mapped)."""
        for row0, row1, col0, col1, values in self.tiles(start, stop):
            out[row0 - start:row1 - start, col0:col1] = values
        self.release(start, stop)
        return out

    def release(self, start: int, stop: int, units: slice | None = None) -> None:
        """Drop the mapped pages of rows ``start:stop`` (of the chunks holding ``units``, all
        by default) once they are measured.

        A page fault maps neighbouring pages too (Linux maps pages around a fault, and here
        reads of values not aligned to their size mapped about twice the pages they read), so
        a block's faults also map rows released before it, rows of the block after it, rows
        past the dataset's end in its last chunks, and rows another thread's sample range
        already released. Unreleased, those added up to hundreds of MB on a 2 GB dump (800 MB
        in h5py's own 7630 x 4 chunks for 256 units, 480 MB in the writer's 1024 x 256 chunks
        of 8192 units). So a chunk up to ``WHOLE_CHUNK`` is released whole once any of its
        rows is (its other rows, if still to be read, fault back in from the page cache), and
        a larger one (a contiguous dataset is one chunk) from ``LOOK_BEHIND`` bytes before the
        rows to their end, or to the chunk's end with its last rows.
        """
        rows, cols = self.chunk
        row_bytes = cols * self.dtype.itemsize
        whole = self.chunk_bytes <= WHOLE_CHUNK
        behind = -(-LOOK_BEHIND // row_bytes)
        columns = range(self.offsets.shape[1]) if units is None else range(
            units.start // cols, -(-units.stop // cols))
        for i in range(start // rows, -(-stop // rows)):
            row0, row1 = max(start, i * rows), min(stop, (i + 1) * rows, self.shape[0])
            row0 = i * rows if whole else max(i * rows, row0 - behind)
            if whole or row1 == min((i + 1) * rows, self.shape[0]):
                row1 = (i + 1) * rows
            for j in columns:
                self.files.release(int(self.offsets[i, j]) + (row0 - i * rows) * row_bytes,
                                   (row1 - row0) * row_bytes)


def storage_map(dataset: h5py.Dataset, files: FileMap) -> StorageMap | None:
    """The dataset's StorageMap, or None where it cannot be read exactly from the map."""
    dtype = dataset.dtype
    if (dataset.ndim != 2 or dtype.kind != "f" or dtype.itemsize not in (4, 8)
            or not dtype.isnative or 0 in dataset.shape):
        return None
    plist = dataset.id.get_create_plist()
    if plist.get_nfilters() != 0:
        return None
    shape = (int(dataset.shape[0]), int(dataset.shape[1]))
    layout = plist.get_layout()
    if layout == h5py.h5d.CONTIGUOUS:
        offset = dataset.id.get_offset()
        if offset is None:
            return None
        chunk, offsets = shape, np.array([[offset]], np.int64)
    elif layout == h5py.h5d.CHUNKED:
        chunk = tuple(int(n) for n in dataset.chunks)
        offsets = _chunk_offsets(dataset, shape, chunk, dtype.itemsize)
        if offsets is None:
            return None
    else:
        return None
    size = os.stat(files.path).st_size
    chunk_bytes = chunk[0] * chunk[1] * dtype.itemsize
    if offsets.min() < 0 or offsets.max() + chunk_bytes > size:
        return None
    return StorageMap(files, shape, dtype, chunk, offsets)


def _chunk_offsets(dataset: h5py.Dataset, shape: tuple[int, int], chunk: tuple[int, ...],
                   itemsize: int) -> np.ndarray | None:
    """File offsets of every chunk as a grid, or None when a chunk is missing or not plain."""
    grid = (math.ceil(shape[0] / chunk[0]), math.ceil(shape[1] / chunk[1]))
    if dataset.id.get_num_chunks() != grid[0] * grid[1]:
        return None  # unwritten chunks read as fill values: leave them to HDF5
    offsets = np.full(grid, -1, np.int64)
    plain = chunk[0] * chunk[1] * itemsize
    sizes_ok = [True]

    def record(info) -> None:
        row, col = info.chunk_offset
        offsets[row // chunk[0], col // chunk[1]] = info.byte_offset
        sizes_ok[0] &= info.size == plain and not info.filter_mask

    if hasattr(dataset.id, "chunk_iter"):
        dataset.id.chunk_iter(record)
    else:  # HDF5 before 1.12.3
        for index in range(grid[0] * grid[1]):
            record(dataset.id.get_chunk_info(index))
    if not sizes_ok[0] or (offsets < 0).any():
        return None
    return offsets
