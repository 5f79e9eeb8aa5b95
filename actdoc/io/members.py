"""Zip members of an NPZ file, decompressed in bounded pieces, and their ``.npy`` headers.

Python's ``zipfile`` hands a bzip2 or LZMA member's decompressor a whole input chunk at once, with
no bound on the output: a few kilobytes of a forged member can expand to gigabytes before the
first byte is returned. ``MemberStream`` reads the raw member bytes itself (after the local header,
PKWARE APPNOTE.TXT section 4.3.7) and asks the decompressor for at most the bytes wanted
(``max_length`` of ``zlib``, ``bz2`` and ``lzma`` decompressors, Python's library docs), so memory
is bounded by the caller's request whatever the compression ratio.

``read_member_header`` parses a member's ``.npy`` header from such a stream (numpy's "NPY format"
description, NEP 1: magic, version, header length, a Python literal dict with ``descr``,
``fortran_order`` and ``shape``) with a cap on the header length, and checks the declared size
against the limit before any data is read.
"""

from __future__ import annotations

import ast
import bz2
import lzma
import math
import struct
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from actdoc.errors import DumpTooLarge, InvalidDump, UnreadableDump, UnsafeDump, describe

#: Compressed bytes read from the file per step.
RAW_STEP = 64 * 1024
#: Largest LZMA dictionary allocated for one member (xz's largest preset, -9, uses 64 MiB).
MAX_LZMA_DICTIONARY = 256 * 1024**2
#: Longest ``.npy`` header accepted (numpy's own default ``max_header_size``, numpy.lib.format).
MAX_HEADER = 10_000
NPY_MAGIC = b"\x93NUMPY"
PROBE_KEY = "probe/input"
METHODS = {zipfile.ZIP_STORED: "stored", zipfile.ZIP_DEFLATED: "deflate",
           zipfile.ZIP_BZIP2: "bzip2", zipfile.ZIP_LZMA: "LZMA"}


def split_key(key: str) -> tuple[str | None, str]:
    """``("fc1", "preact")`` for ``"fc1/preact"``; ``(None, key)`` for other keys."""
    if "/" in key and key != PROBE_KEY:
        layer, array = key.rsplit("/", 1)
        return layer, array
    return None, key


def where_of(path: Path, key: str) -> str:
    layer, array = split_key(key)
    return describe(path, layer, array)


def data_offset(path: Path, info: zipfile.ZipInfo, where: str) -> int:
    """Offset in the file of a member's first stored byte (after its local header)."""
    local = b""
    if 0 <= info.header_offset < path.stat().st_size:
        with open(path, "rb") as handle:
            handle.seek(info.header_offset)
            local = handle.read(30)
    if len(local) < 30 or local[:4] != b"PK\x03\x04":
        raise UnreadableDump(f"{where}: the archive's local header is damaged")
    name_length, extra_length = struct.unpack("<HH", local[26:30])
    return info.header_offset + 30 + name_length + extra_length


class MemberStream:
    """The uncompressed bytes of one member, produced at most ``n`` at a time by ``read(n)``.

    Errors in the compressed data surface as ``UnreadableDump`` naming the member.
    """

    def __init__(self, path: Path, info: zipfile.ZipInfo, where: str):
        self._where = where
        self.method = info.compress_type
        if self.method not in METHODS:
            raise UnreadableDump(f"{where}: the archive member uses compression method "
                                 f"{self.method}, which actdoc does not read (stored, deflate, "
                                 f"bzip2 and LZMA are read)")
        start = data_offset(path, info, where)
        self._file = open(path, "rb")
        self._file.seek(start)
        self._left = info.compress_size
        self._size, self._expected_crc = info.file_size, info.CRC
        self._produced, self._crc = 0, 0
        self._decompressor = None
        try:
            if self.method == zipfile.ZIP_DEFLATED:
                self._decompressor = zlib.decompressobj(-15)
            elif self.method == zipfile.ZIP_BZIP2:
                self._decompressor = bz2.BZ2Decompressor()
            elif self.method == zipfile.ZIP_LZMA:
                self._decompressor = self._lzma()
        except BaseException:
            self.close()
            raise

    def _raw(self, size: int) -> bytes:
        data = self._file.read(min(size, self._left))
        self._left -= len(data)
        return data

    def _lzma(self):
        """Zip's LZMA members start with a version and the LZMA1 properties (APPNOTE 5.8.8)."""
        head = self._raw(4)
        if len(head) < 4:
            raise UnreadableDump(f"{self._where}: the LZMA member is truncated")
        size = struct.unpack("<H", head[2:4])[0]
        props = self._raw(size)
        try:
            options = lzma._decode_filter_properties(lzma.FILTER_LZMA1, props)
        except (lzma.LZMAError, ValueError, TypeError) as exc:
            raise UnreadableDump(f"{self._where}: the LZMA member's properties are invalid "
                                 f"({exc})") from None
        # The decoder allocates the declared dictionary up front (up to 4 GiB); matches never
        # reach back further than the member's own length, so that bounds what is needed.
        options["dict_size"] = max(4096, min(options.get("dict_size", 0), self._size))
        if options["dict_size"] > MAX_LZMA_DICTIONARY:
            raise UnreadableDump(f"{self._where}: the LZMA member declares a dictionary of "
                                 f"{options['dict_size']} bytes, more than the "
                                 f"{MAX_LZMA_DICTIONARY} actdoc allocates")
        return lzma.LZMADecompressor(lzma.FORMAT_RAW, filters=[options])

    def _next(self, want: int) -> bytes:
        """Up to ``want`` bytes (fewer near the end); b"" at the end of the member."""
        if self._decompressor is None:
            return self._raw(want)
        dec = self._decompressor
        for _ in range(1 + self._left // RAW_STEP + 8):
            if dec.eof:
                return b""
            if self.method == zipfile.ZIP_DEFLATED:
                data = dec.unconsumed_tail or self._raw(RAW_STEP)
            else:
                data = self._raw(RAW_STEP) if dec.needs_input else b""
            out = dec.decompress(data, want)
            if out:
                return out
            if not data and self._left == 0:
                if dec.eof:
                    return b""
                raise EOFError("the compressed data ends early")
        raise EOFError("the decompressor made no progress")

    def read(self, size: int) -> bytes:
        """Exactly ``size`` bytes unless the member ends first."""
        parts, got = [], 0
        try:
            while got < size:
                part = self._next(size - got)
                if not part:
                    break
                parts.append(part)
                got += len(part)
                self._check(part)
        except (zlib.error, lzma.LZMAError, OSError, EOFError, ValueError) as exc:
            raise UnreadableDump(f"{self._where}: decompressing the data failed; the file is "
                                 f"truncated or corrupt ({exc})") from None
        return b"".join(parts)

    def _check(self, part: bytes) -> None:
        """The zip CRC-32 of the member (APPNOTE 4.4.7), checked once its last byte is out."""
        self._produced += len(part)
        self._crc = zlib.crc32(part, self._crc)
        if self._produced == self._size and self._crc != self._expected_crc:
            raise UnreadableDump(f"{self._where}: the data does not match the archive's CRC-32 "
                                 f"checksum; the file is corrupt")

    def readinto(self, view: memoryview) -> int:
        """Fill ``view`` (bytes) completely; UnreadableDump when the member ends first."""
        got = 0
        while got < len(view):
            part = self.read(min(len(view) - got, 8 * 1024**2))
            if not part:
                raise UnreadableDump(f"{self._where}: the member ends before its data does; the "
                                     f"file is truncated or corrupt")
            view[got:got + len(part)] = part
            got += len(part)
        return got

    def skip(self, size: int) -> None:
        """Decompress and drop ``size`` bytes, at most 8 MiB at a time."""
        while size > 0:
            part = self.read(min(size, 8 * 1024**2))
            if not part:
                raise UnreadableDump(f"{self._where}: the member ends before its data does; the "
                                     f"file is truncated or corrupt")
            size -= len(part)

    def close(self) -> None:
        self._file.close()


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


def parse_npy_header(stream: MemberStream, where: str) -> tuple[tuple[int, ...], bool, np.dtype,
                                                                  int]:
    """Shape, Fortran order, dtype and header length from the start of a ``.npy`` member."""
    def bad(why: str) -> UnreadableDump:
        return UnreadableDump(f"{where}: not a readable .npy member ({why})")

    magic = stream.read(8)
    if len(magic) < 8 or magic[:6] != NPY_MAGIC:
        raise bad("the .npy magic string is missing")
    major = magic[6]
    if major not in (1, 2, 3):
        raise bad(f"unknown .npy format version {major}.{magic[7]}")
    width = 2 if major == 1 else 4
    length_bytes = stream.read(width)
    if len(length_bytes) < width:
        raise bad("the header is cut short")
    length = int.from_bytes(length_bytes, "little")
    if length > MAX_HEADER:
        raise bad(f"the header declares {length} bytes, more than the {MAX_HEADER} accepted")
    text = stream.read(length)
    if len(text) < length:
        raise bad("the header is cut short")
    try:
        header = ast.literal_eval(text.decode("latin1" if major < 3 else "utf8"))
    except (ValueError, SyntaxError, TypeError, MemoryError, RecursionError, UnicodeError):
        raise bad("the header is not a Python literal") from None
    if not isinstance(header, dict) or set(header) != {"descr", "fortran_order", "shape"}:
        raise bad("the header must hold exactly descr, fortran_order and shape")
    shape, fortran, descr = header["shape"], header["fortran_order"], header["descr"]
    if not isinstance(shape, tuple) or not all(
            isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in shape):
        raise bad(f"the shape {shape!r} is not a tuple of non-negative integers")
    if not isinstance(fortran, bool):
        raise bad("fortran_order is not True or False")
    if not isinstance(descr, str):
        raise InvalidDump(f"{where}: a structured dtype is not a real number type; expected "
                          f"float16, float32 or float64")
    try:
        dtype = np.dtype(descr)
    except (TypeError, ValueError, SyntaxError, OverflowError):
        raise bad(f"the dtype {descr[:40]!r} is not one numpy knows") from None
    return shape, fortran, dtype, len(magic) + width + length


def read_member_header(path: Path, info: zipfile.ZipInfo, limit: int) -> Member:
    """Parse a member's ``.npy`` header and check its sizes, decompressing only the header."""
    key = info.filename[:-4]
    where = where_of(path, key)
    if info.flag_bits & 0x1:
        raise UnreadableDump(f"{where}: the archive member is encrypted")
    if info.file_size > limit:
        raise DumpTooLarge(f"{where}: the archive declares {info.file_size} bytes uncompressed, "
                           f"more than the limit of {limit} bytes per member (ReadLimits."
                           f"member_bytes, --max-member-bytes)")
    stream = MemberStream(path, info, where)
    try:
        shape, fortran, dtype, header_bytes = parse_npy_header(stream, where)
    finally:
        stream.close()
    if dtype.hasobject:
        raise UnsafeDump(f"{where}: holds Python objects (dtype {dtype}), which would need "
                         f"unpickling; actdoc refuses pickled data")
    member = Member(key, info, shape, dtype, fortran, header_bytes)
    if member.nbytes > limit:
        raise DumpTooLarge(f"{where}: the .npy header declares shape {list(member.shape)} "
                           f"({member.nbytes} bytes), more than the limit of {limit} bytes per "
                           f"member (ReadLimits.member_bytes, --max-member-bytes)")
    if info.file_size < header_bytes + member.nbytes:
        raise UnreadableDump(f"{where}: the header declares {member.nbytes} bytes of data but the "
                             f"member holds {max(0, info.file_size - header_bytes)}; the file is "
                             f"truncated or corrupt")
    return member
