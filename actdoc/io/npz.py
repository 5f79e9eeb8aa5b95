"""The NPZ reader (docs/contract.md section 2, and section 3 for state-dict weight archives).

An NPZ file is a zip of ``.npy`` members. Nothing is unpickled: a member whose header declares an
object dtype is refused before its data is touched. Each member's size is checked twice before it
is read, from the zip directory and from the ``.npy`` header (shape times item size), against
``member_limit_bytes``, because a legitimate member may compress extremely well and a forged one
may claim anything.

Rows are streamed. A stored (uncompressed) member is memory-mapped at its data offset; a
compressed one is decompressed front to back, block by block, and a forward pass never holds the
whole member. Reading one unit of a compressed member costs one streaming pass. Fortran-ordered
members are read correctly when stored (each block of rows then gathers from every column, which
is slower); compressed Fortran-ordered members are refused, since a block of rows would need the
whole member decompressed.
"""

from __future__ import annotations

import json
import math
import struct
import threading
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from actdoc.errors import DumpTooLarge, InvalidDump, UnreadableDump, UnsafeDump, describe
from actdoc.io import statedict
from actdoc.io.base import RawDump, RawLayer
from actdoc.io.direct import FileMap, StorageMap
from actdoc.model import LAYER_ARRAYS

#: Default largest member, uncompressed, in bytes (8 GiB); ``member_limit_bytes`` changes it.
DEFAULT_MEMBER_LIMIT = 8 * 1024**3
META_KEY = "actdoc_meta"
PROBE_KEY = "probe/input"
#: Largest ``actdoc_meta`` accepted, in bytes of its unicode data.
META_LIMIT = 16 * 1024**2
#: Bytes decompressed per step when skipping or scanning a compressed member.
STREAM_STEP = 8 * 1024**2
ZIP_ERRORS = (zipfile.BadZipFile, zlib.error, EOFError, OSError, ValueError, NotImplementedError,
              RuntimeError)


def split_key(key: str) -> tuple[str | None, str]:
    """``("fc1", "preact")`` for ``"fc1/preact"``; ``(None, key)`` for other keys."""
    if "/" in key and key != PROBE_KEY:
        layer, array = key.rsplit("/", 1)
        return layer, array
    return None, key


@dataclass(frozen=True)
class Member:
    """One ``.npy`` member: where it is, what its header declares."""

    key: str
    info: zipfile.ZipInfo
    shape: tuple[int, ...]
    dtype: np.dtype
    fortran: bool
    header_bytes: int

    @property
    def nbytes(self) -> int:
        return math.prod(self.shape) * self.dtype.itemsize


def where_of(path: Path, key: str) -> str:
    layer, array = split_key(key)
    return describe(path, layer, array)


def read_member_header(zf: zipfile.ZipFile, info: zipfile.ZipInfo, path: Path,
                       limit: int) -> Member:
    """Parse a member's ``.npy`` header and check its sizes, reading no data."""
    key = info.filename[:-4]
    where = where_of(path, key)
    if info.flag_bits & 0x1:
        raise UnreadableDump(f"{where}: the archive member is encrypted")
    if info.file_size > limit:
        raise DumpTooLarge(f"{where}: the archive declares {info.file_size} bytes uncompressed, "
                           f"more than the limit of {limit} bytes; raise member_limit_bytes if "
                           f"the file is trusted")
    try:
        with zf.open(info) as fp:
            version = np.lib.format.read_magic(fp)
            read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                           else np.lib.format.read_array_header_2_0)
            shape, fortran, dtype = read_header(fp)
            header_bytes = fp.tell()
    except ZIP_ERRORS as exc:
        raise UnreadableDump(f"{where}: not a readable .npy member ({exc})") from None
    if dtype.hasobject:
        raise UnsafeDump(f"{where}: holds Python objects (dtype {dtype}), which would need "
                         f"unpickling; actdoc refuses pickled data")
    member = Member(key, info, tuple(int(n) for n in shape), dtype, bool(fortran), header_bytes)
    if member.nbytes > limit:
        raise DumpTooLarge(f"{where}: the .npy header declares shape {list(member.shape)} "
                           f"({member.nbytes} bytes), more than the limit of {limit} bytes")
    if info.file_size < header_bytes + member.nbytes:
        raise UnreadableDump(f"{where}: the header declares {member.nbytes} bytes of data but the "
                             f"member holds {info.file_size - header_bytes}; the file is "
                             f"truncated or corrupt")
    return member


def data_offset(path: Path, info: zipfile.ZipInfo) -> int:
    """Offset in the file of a stored member's first byte (after its local header)."""
    with open(path, "rb") as handle:
        handle.seek(info.header_offset)
        local = handle.read(30)
    if len(local) < 30 or local[:4] != b"PK\x03\x04":
        raise UnreadableDump(f"{where_of(path, info.filename[:-4])}: the archive's local header "
                             f"is damaged")
    name_length, extra_length = struct.unpack("<HH", local[26:30])
    return info.header_offset + 30 + name_length + extra_length


def copy_rows(rows: np.ndarray, out: np.ndarray | None) -> np.ndarray:
    """Rows copied into ``out`` when it fits, else into a fresh array."""
    if out is not None and out.shape == rows.shape and out.dtype == rows.dtype:
        np.copyto(out, rows)
        return out
    return np.array(rows)


class MappedSource:
    """ArraySource over a stored member, seen through a read-only map of the file.

    A C-ordered 2-D float32 or float64 member in native byte order is one contiguous array in
    the file, so it offers ``tiles`` and ``release`` like an uncompressed HDF5 dataset
    (``actdoc.io.direct``): blocks are measured in place and their pages dropped afterwards.
    Other members are read through ``numpy.memmap``, created on first use.
    """

    def __init__(self, path: Path, member: Member, offset: int, files: FileMap | None = None):
        self.shape, self.dtype = member.shape, member.dtype
        if path.stat().st_size < offset + member.nbytes:
            raise UnreadableDump(f"{where_of(path, member.key)}: the file ends before the "
                                 f"member's data does; it is truncated")
        self._path, self._member, self._offset = path, member, offset
        self._memmap: np.ndarray | None = None
        self._storage = None
        dtype = member.dtype
        if (files is not None and len(member.shape) == 2 and not member.fortran
                and member.nbytes > 0 and dtype.kind == "f" and dtype.itemsize in (4, 8)
                and dtype.isnative):
            self._storage = StorageMap(files, member.shape, dtype, member.shape,
                                       np.array([[offset]], np.int64))

    @property
    def _array(self) -> np.ndarray:
        if self._memmap is None:
            member = self._member
            if member.nbytes == 0:
                self._memmap = np.empty(member.shape, member.dtype)
            else:
                self._memmap = np.memmap(self._path, dtype=member.dtype, mode="r",
                                         offset=self._offset, shape=member.shape,
                                         order="F" if member.fortran else "C")
        return self._memmap

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        stop = min(stop, self.shape[0])
        if (self._storage is not None and out is not None and out.dtype == self.dtype
                and out.shape == (stop - start,) + self.shape[1:]):
            try:
                return self._storage.fill(start, stop, out)
            except OSError:  # no address space left for a map: numpy.memmap reads it
                pass
        return copy_rows(self._array[start:stop], out)

    def tiles(self, start: int, stop: int):
        """Uncopied views of rows ``start:stop`` (``actdoc.io.direct.Tile``), or None."""
        if self._storage is None:
            return None
        try:
            return self._storage.tiles(start, min(stop, self.shape[0]))
        except OSError:
            return None

    def release(self, start: int, stop: int) -> None:
        """Drop the mapped pages of rows ``start:stop`` once their tiles are measured."""
        if self._storage is not None:
            self._storage.release(start, min(stop, self.shape[0]))

    def read_unit(self, unit: int) -> np.ndarray:
        return np.array(self._array[:, unit])

    def read_all(self) -> np.ndarray:
        return np.array(self._array)


class StreamedSource:
    """ArraySource over a compressed member, decompressed front to back on demand."""

    #: Reading from sample k decompresses everything before it: the engine never splits such an
    #: array into sample ranges read in parallel.
    sequential_only = True

    def __init__(self, zf: zipfile.ZipFile, path: Path, member: Member):
        self.shape, self.dtype = member.shape, member.dtype
        self._zf, self._member, self._where = zf, member, where_of(path, member.key)
        self._row_bytes = math.prod(member.shape[1:]) * member.dtype.itemsize
        self._stream = None
        self._row = 0
        self._lock = threading.Lock()

    def _restart(self) -> None:
        if self._stream is not None:
            self._stream.close()
        self._stream = self._zf.open(self._member.info)
        self._stream.read(self._member.header_bytes)
        self._row = 0

    def _fill(self, target: np.ndarray) -> None:
        view = memoryview(target).cast("B")
        got = 0
        while got < len(view):
            n = self._stream.readinto(view[got:])
            if not n:
                raise EOFError("the member ends early")
            got += n

    def _skip_to(self, row: int) -> None:
        if self._stream is None or row < self._row:
            self._restart()
        step = max(1, STREAM_STEP // max(1, self._row_bytes))
        scratch = None
        while self._row < row:
            count = min(step, row - self._row)
            if scratch is None or scratch.shape[0] != count:
                scratch = np.empty((count,) + self.shape[1:], self.dtype)
            self._fill(scratch)
            self._row += count

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        stop = min(stop, self.shape[0])
        rows = (stop - start,) + self.shape[1:]
        fits = (out is not None and out.shape == rows and out.dtype == self.dtype
                and out.flags.c_contiguous and out.flags.writeable)
        target = out if fits else np.empty(rows, self.dtype)
        with self._lock:
            try:
                self._skip_to(start)
                self._fill(target)
                self._row = stop
            except ZIP_ERRORS as exc:
                self._stream = None
                raise UnreadableDump(f"{self._where}: decompressing the data failed; the file is "
                                     f"truncated or corrupt ({exc})") from None
        return target

    def read_unit(self, unit: int) -> np.ndarray:
        """One streaming pass over the member, keeping one column."""
        column = np.empty((self.shape[0],) + self.shape[2:], self.dtype)
        step = max(1, STREAM_STEP // max(1, self._row_bytes))
        for first in range(0, self.shape[0], step):
            last = min(self.shape[0], first + step)
            column[first:last] = self.read_samples(first, last)[:, unit]
        return column

    def read_all(self) -> np.ndarray:
        if not self.shape:
            with self._lock:
                self._restart()
                target = np.empty((), self.dtype)
                self._fill(target)
                return target
        return self.read_samples(0, self.shape[0])

    def close(self) -> None:
        if self._stream is not None:
            self._stream.close()
            self._stream = None


def read_meta(zf: zipfile.ZipFile, member: Member, path: Path) -> list[dict[str, Any]]:
    """The layer entries of ``actdoc_meta``, checked for shape."""
    where = describe(path, None, META_KEY)
    if member.dtype.kind != "U" or member.shape != ():
        raise InvalidDump(f"{where}: expected a 0-d unicode string holding JSON, found dtype "
                          f"{member.dtype} with shape {list(member.shape)}")
    if member.nbytes > META_LIMIT:
        raise DumpTooLarge(f"{where}: {member.nbytes} bytes, more than the {META_LIMIT} allowed")
    try:
        with zf.open(member.info) as fp:
            text = str(np.lib.format.read_array(fp, allow_pickle=False))
        meta = json.loads(text)
    except ZIP_ERRORS as exc:
        raise InvalidDump(f"{where}: not readable JSON ({exc})") from None
    entries = meta.get("layers") if isinstance(meta, dict) else None
    if not isinstance(entries, list) or not all(
            isinstance(e, dict) and isinstance(e.get("name"), str) for e in entries):
        raise InvalidDump(f"{where}: expected {{\"layers\": [{{\"name\": ..., ...}}, ...]}}")
    names = [e["name"] for e in entries]
    if len(set(names)) != len(names):
        raise InvalidDump(f"{where}: a layer name appears more than once in the list")
    return entries


class NPZReader:
    """Reader for NPZ dumps: the ``<layer>/<array>`` layout or a state-dict weight archive."""

    name = "npz"

    def sniff(self, head: bytes) -> bool:
        return head[:4] in (b"PK\x03\x04", b"PK\x05\x06")

    def read(self, path: Path, options: Mapping[str, Any]) -> RawDump:
        limit = int(options.get("member_limit_bytes", DEFAULT_MEMBER_LIMIT))
        try:
            zf = zipfile.ZipFile(path)
        except ZIP_ERRORS as exc:
            raise UnreadableDump(f"{describe(path)}: not a readable zip archive; it is truncated "
                                 f"or corrupt ({exc})") from None
        streams: list[StreamedSource] = []
        files = FileMap(path)

        def close() -> None:
            for stream in streams:
                stream.close()
            files.close()
            zf.close()

        try:
            layers, probe = self._layers(zf, path, limit, streams, files)
        except BaseException:
            close()
            raise
        return RawDump(path=path, format="npz", layers=layers, probe_input=probe, closer=close,
                       ordering="position")

    def _layers(self, zf, path, limit, streams, files) -> tuple[tuple[RawLayer, ...], Any]:
        members = {}
        for info in zf.infolist():
            if info.filename.endswith(".npy") and not info.is_dir():
                member = read_member_header(zf, info, path, limit)
                members[member.key] = member

        def source(key: str):
            member = members[key]
            if member.dtype.kind not in "fiub":
                raise InvalidDump(f"{where_of(path, key)}: dtype {member.dtype} is not a real "
                                  f"number type; expected float16, float32 or float64")
            if member.info.compress_type == zipfile.ZIP_STORED:
                _, array = split_key(key)
                mapped = files if array in ("preact", "output") else None
                return MappedSource(path, member, data_offset(path, member.info)
                                    + member.header_bytes, mapped)
            if member.fortran and len(member.shape) > 1:
                raise InvalidDump(f"{where_of(path, key)}: a Fortran-ordered array in a "
                                  f"compressed archive cannot be read in blocks of samples; save "
                                  f"it C-ordered (np.ascontiguousarray) or uncompressed")
            stream = StreamedSource(zf, path, member)
            streams.append(stream)
            return stream

        keys = [k for k in members if k != META_KEY]
        if META_KEY not in members and statedict.looks_like_state_dict(keys):
            return statedict.raw_layers(keys, source), None
        meta = read_meta(zf, members[META_KEY], path) if META_KEY in members else []
        grouped: dict[str, dict[str, Any]] = {}
        for key in keys:
            layer, array = split_key(key)
            if layer is not None and array in LAYER_ARRAYS:
                grouped.setdefault(layer, {})[array] = source(key)
        listed = [entry["name"] for entry in meta]
        for name in listed:
            if name not in grouped:
                raise InvalidDump(f"{describe(path, name)}: listed in actdoc_meta but the archive "
                                  f"holds no arrays named '{name}/...'")
        attrs = {entry["name"]: {k: v for k, v in entry.items() if k != "name"} for entry in meta}
        names = listed + [name for name in grouped if name not in attrs]
        layers = tuple(RawLayer(name=name, attrs=attrs.get(name, {}), arrays=grouped[name],
                                position=position) for position, name in enumerate(names))
        probe = source(PROBE_KEY) if PROBE_KEY in members else None
        return layers, probe


READER = NPZReader()
