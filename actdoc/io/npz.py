"""The NPZ reader (docs/contract.md section 2, and section 3 for state-dict weight archives).

An NPZ file is a zip of ``.npy`` members. Nothing is unpickled: a member whose header declares an
object dtype is refused before its data is touched. Each member's size is checked twice before it
is read, from the zip directory and from the ``.npy`` header (shape times item size), against
``ReadLimits.member_bytes``, because a legitimate member may compress extremely well and a forged
one may claim anything. Headers are read from a decompressor that is never asked for more than it
must produce (``actdoc.io.members``), so a bzip2 or LZMA bomb costs no memory.

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
import threading
import zipfile
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from actdoc.errors import ActdocError, DumpTooLarge, InvalidDump, UnreadableDump, describe
from actdoc.io import statedict
from actdoc.io.base import RawDump, RawLayer
from actdoc.io.direct import FileMap, StorageMap
from actdoc.io.limits import DEFAULT_MEMBER_BYTES
from actdoc.io.members import (PROBE_KEY, Member, MemberStream, data_offset, read_member_header,
                               split_key, where_of)
from actdoc.model import LAYER_ARRAYS

#: Default largest member, uncompressed, in bytes (8 GiB); ``member_limit_bytes`` changes it.
DEFAULT_MEMBER_LIMIT = DEFAULT_MEMBER_BYTES
META_KEY = "actdoc_meta"
#: Largest ``actdoc_meta`` accepted, in bytes of its unicode data.
META_LIMIT = 16 * 1024**2
#: Bytes decompressed per step when skipping or scanning a compressed member.
STREAM_STEP = 8 * 1024**2


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

    def release(self, start: int, stop: int, units: slice | None = None) -> None:
        """Drop the mapped pages of rows ``start:stop`` (of ``units``, or all) once their
        tiles are measured."""
        if self._storage is not None:
            self._storage.release(start, min(stop, self.shape[0]), units)

    def read_unit(self, unit: int) -> np.ndarray:
        return np.array(self._array[:, unit])

    def read_all(self) -> np.ndarray:
        return np.array(self._array)


class StreamedSource:
    """ArraySource over a compressed member, decompressed front to back on demand in bounded
    pieces (``actdoc.io.members.MemberStream``)."""

    #: Reading from sample k decompresses everything before it: the engine never splits such an
    #: array into sample ranges read in parallel.
    sequential_only = True

    def __init__(self, path: Path, member: Member):
        self.shape, self.dtype = member.shape, member.dtype
        self._path, self._member, self._where = path, member, where_of(path, member.key)
        self._row_bytes = math.prod(member.shape[1:]) * member.dtype.itemsize
        self._stream: MemberStream | None = None
        self._row = 0
        self._lock = threading.Lock()

    def _restart(self) -> None:
        self.close()
        self._stream = MemberStream(self._path, self._member.info, self._where)
        self._stream.skip(self._member.header_bytes)
        self._row = 0

    def _fill(self, target: np.ndarray) -> None:
        self._stream.readinto(memoryview(target).cast("B"))

    def _skip_to(self, row: int) -> None:
        if self._stream is None or row < self._row:
            self._restart()
        self._stream.skip((row - self._row) * self._row_bytes)
        self._row = row

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
            except ActdocError:
                self.close()
                raise
            except OSError as exc:
                self.close()
                raise UnreadableDump(f"{self._where}: reading the data failed ({exc})") from None
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
                try:
                    self._restart()
                    target = np.empty((), self.dtype)
                    self._fill(target)
                finally:
                    self.close()
                return target
        return self.read_samples(0, self.shape[0])

    def close(self) -> None:
        if self._stream is not None:
            self._stream.close()
            self._stream = None


def read_meta(member: Member, path: Path) -> list[dict[str, Any]]:
    """The layer entries of ``actdoc_meta``, checked for shape."""
    where = describe(path, None, META_KEY)
    if member.dtype.kind != "U" or member.shape != ():
        raise InvalidDump(f"{where}: expected a 0-d unicode string holding JSON, found dtype "
                          f"{member.dtype} with shape {list(member.shape)}")
    if member.nbytes > META_LIMIT:
        raise DumpTooLarge(f"{where}: {member.nbytes} bytes, more than the {META_LIMIT} allowed")
    source = StreamedSource(path, member)
    try:
        text = str(source.read_all()) if not member.fortran else ""
        meta = json.loads(text)
    except (ValueError, RecursionError) as exc:
        raise InvalidDump(f"{where}: not readable JSON ({exc})") from None
    finally:
        source.close()
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
            with zipfile.ZipFile(path) as zf:
                infos = zf.infolist()
        except MemoryError:
            raise
        except Exception as exc:  # zipfile reports a damaged directory in many ways
            raise UnreadableDump(f"{describe(path)}: not a readable zip archive; it is truncated "
                                 f"or corrupt ({type(exc).__name__}: {exc})") from None
        streams: list[StreamedSource] = []
        files = FileMap(path)

        def close() -> None:
            for stream in streams:
                stream.close()
            files.close()

        try:
            layers, probe = self._layers(infos, path, limit, streams, files)
        except BaseException:
            close()
            raise
        return RawDump(path=path, format="npz", layers=layers, probe_input=probe, closer=close,
                       ordering="position")

    def _layers(self, infos, path, limit, streams, files) -> tuple[tuple[RawLayer, ...], Any]:
        members = {}
        for info in infos:
            if info.filename.endswith(".npy") and not info.is_dir():
                member = read_member_header(path, info, limit)
                members[member.key] = member

        def source(key: str):
            member = members[key]
            where = where_of(path, key)
            if member.dtype.kind not in "fiub":
                raise InvalidDump(f"{where}: dtype {member.dtype} is not a real number type; "
                                  f"expected float16, float32 or float64")
            if member.info.compress_type == zipfile.ZIP_STORED:
                if member.info.compress_size < member.header_bytes + member.nbytes:
                    raise UnreadableDump(f"{where}: the archive stores fewer bytes than the "
                                         f"header declares; the file is truncated or corrupt")
                _, array = split_key(key)
                mapped = files if array in ("preact", "output") else None
                return MappedSource(path, member, data_offset(path, member.info, where)
                                    + member.header_bytes, mapped)
            if member.fortran and len(member.shape) > 1:
                raise InvalidDump(f"{where}: a Fortran-ordered array in a compressed archive "
                                  f"cannot be read in blocks of samples; save it C-ordered "
                                  f"(np.ascontiguousarray) or uncompressed")
            stream = StreamedSource(path, member)
            streams.append(stream)
            return stream

        keys = [k for k in members if k != META_KEY]
        if META_KEY not in members and statedict.looks_like_state_dict(keys):
            probe = source(PROBE_KEY) if PROBE_KEY in members else None
            return statedict.raw_layers(keys, source), probe
        meta = read_meta(members[META_KEY], path) if META_KEY in members else []
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
