"""Upload intake: a safe stored name, a spool that hashes and counts an upload as it streams
into the workspace's ``tmp/`` folder, and the quick look at its first bytes that tells HDF5 from
NPZ. No Flask here: werkzeug writes into the spool as a plain file object.

Nothing here parses the file: the readers run on it later, in a confined child process
(actdoc/confine), so an upload request never waits for them and a hostile file cannot stall it.
"""

from __future__ import annotations

import hashlib
import re
import shutil
import tempfile
from pathlib import Path

from actdoc.errors import ActdocError
from actdoc.escaping import CONTROL

#: Bytes copied per write while streaming an upload from a plain stream.
COPY_BLOCK_BYTES = 1024 * 1024


class UploadTooLarge(ActdocError):
    """An upload passed the workspace's size limit."""


#: Longest stored file name in UTF-8 bytes: under the 255-byte limit of a path component on
#: common Linux file systems (NAME_MAX), so a long unicode name cannot fail the upload.
MAX_NAME_BYTES = 200


def _clip_utf8(text: str, max_bytes: int) -> str:
    """``text`` cut to at most ``max_bytes`` in UTF-8, never inside a character."""
    return text.encode("utf-8")[:max_bytes].decode("utf-8", errors="ignore")


def safe_file_name(name: str | None) -> str:
    """The last path part of an uploaded name, without path characters and without the control
    characters of actdoc.escaping (ECMA-48's C0, DEL and C1, the Unicode line separators and the
    bidirectional controls), at most MAX_NAME_BYTES long in UTF-8 (a long name loses the end of
    its stem, not its ending). The stored name then shows in logs, pages and downloads as sent,
    minus what could recolour a terminal or reorder what a reader sees."""
    base = re.split(r"[\\/]", name or "")[-1]
    base = CONTROL.sub("", base).strip().lstrip(".")
    if len(base.encode("utf-8")) > MAX_NAME_BYTES:
        stem, dot, ending = base.rpartition(".")
        ending = _clip_utf8(ending, 16) if dot and stem else ""
        stem = stem if ending else base
        base = _clip_utf8(stem, MAX_NAME_BYTES - len(ending.encode("utf-8")) - 1) + (
            "." + ending if ending else "")
    return base or "upload"


class UploadSpool:
    """A file being received: written to ``tmp/``, hashed and counted as it streams.

    It is a writable file object (werkzeug's multipart parser can write straight into it), so an
    upload is stored once, never buffered whole in memory. Too many bytes raise UploadTooLarge.
    Once finished, ``sniff_format`` tells its container from its leading bytes; everything else
    about the file is left to the readers in the background check.
    """

    def __init__(self, folder: Path, file_name: str, max_bytes: int):
        self.folder = Path(tempfile.mkdtemp(prefix="upload-", dir=folder))
        self.name = safe_file_name(file_name)
        self.path = self.folder / self.name
        self.max_bytes = max_bytes
        self.size = 0
        self._hash = hashlib.sha256()
        try:
            self._file = open(self.path, "wb")
        except OSError:
            shutil.rmtree(self.folder, ignore_errors=True)
            raise

    def write(self, data: bytes) -> int:
        self.size += len(data)
        if self.size > self.max_bytes:
            self.discard()
            raise UploadTooLarge(
                f"{self.name}: the upload passes the workspace limit of "
                f"{self.max_bytes / 1024**2:.0f} MiB")
        self._hash.update(data)
        self._file.write(data)
        return len(data)

    def finish(self) -> str:
        """Close the file and return its SHA-256."""
        self._file.close()
        return self._hash.hexdigest()

    def discard(self) -> None:
        if not self._file.closed:
            self._file.close()
        shutil.rmtree(self.folder, ignore_errors=True)

    # werkzeug rewinds and may read back the stream it wrote; keep those working.
    def seek(self, offset: int, whence: int = 0) -> int:
        return 0 if self._file.closed else self._file.seek(offset, whence)

    def tell(self) -> int:
        return self.size

    def flush(self) -> None:
        if not self._file.closed:
            self._file.flush()

    def read(self, size: int = -1) -> bytes:
        return b""

    def close(self) -> None:
        if not self._file.closed:
            self._file.close()


def sniff_format(path: Path) -> str:
    """The container of a received file from its leading bytes ("hdf5", "npz" or "safetensors").

    Reads a few bytes only (the HDF5 signature may follow a user block), so it is safe on any
    file; a file of neither kind raises the readers' UnsupportedFormat sentence (HTTP 415).
    """
    from actdoc.io import pick_reader

    return pick_reader(Path(path)).name
