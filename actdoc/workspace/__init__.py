"""The dashboard's workspace: uploaded dumps, their catalog and their findings, behind one facade.

Rooms, one job each:

- ``catalog.py``  the SQLite catalog (WAL), one row per dump;
- ``store.py``    files by content hash, scratch space, the clean-up at start, the findings cache;
- ``intake.py``   upload spools (hashed and size-checked as they stream) and the format sniff;
- ``runner.py``   the queues and the background threads that check each new dump, then analyse
  it, each job in a confined child process (actdoc/confine).

Nothing half-written reaches the catalog: an upload is streamed and hashed into ``tmp/``,
renamed into ``dumps/`` and only then inserted as ``queued``; findings are saved into ``tmp/``
and renamed into ``findings/`` before the row says ``ready``. The same bytes uploaded twice are
one dump. No Flask here: the command line and tests use it directly.
"""

from __future__ import annotations

import os
import sqlite3
import threading
import time
from pathlib import Path
from typing import BinaryIO

from actdoc.confine import JobLimits
from actdoc.errors import ActdocError
from actdoc.io.limits import ReadLimits
from actdoc.model import Findings
from actdoc.workspace import intake
from actdoc.workspace.catalog import STATUSES, Catalog, DumpRecord, NotReady, UnknownDump
from actdoc.workspace.intake import COPY_BLOCK_BYTES, UploadSpool, UploadTooLarge
from actdoc.workspace.runner import MAX_ATTEMPTS, Runner
from actdoc.workspace.store import FileStore, FindingsCache

__all__ = ["Workspace", "DumpRecord", "UnknownDump", "NotReady", "StoredWithOtherKinds",
           "UploadSpool", "UploadTooLarge", "JobLimits", "STATUSES", "MAX_ATTEMPTS",
           "DEFAULT_MAX_UPLOAD_BYTES", "default_workspace_dir"]

#: Default largest upload: 2 GiB. Dumps are read in blocks, so the limit guards the disk.
DEFAULT_MAX_UPLOAD_BYTES = 2 * 1024**3


class StoredWithOtherKinds(ActdocError):
    """An upload repeats stored bytes but declares other activation kinds than they were
    analysed with: the stored dump and its findings stay as they are."""

    def __init__(self, record: DumpRecord, declared: tuple[str, ...]):
        def kinds(specs):
            return ", ".join(specs) if specs else "the kinds the file itself names"
        super().__init__(
            f"{record.name}: these bytes are already on the shelf, analysed with "
            f"{kinds(record.activations)}; delete that dump first to analyse them with "
            f"{kinds(declared)}")


class Workspace:
    """A folder of uploaded dumps, their catalog and their cached findings.

    ``read_limits`` bound what an uploaded file may declare (the readers refuse past them);
    ``job_limits`` bound the time and memory of each confined check and analysis. With
    ``check_slot`` new uploads are checked in a child of their own while analyses run, and
    ``analysis_slots`` dumps are analysed at once (runner.py); each child may take
    ``job_limits.memory_mb``.
    Opening a workspace that no other live process uses first removes what an interrupted run
    left. ``start()`` starts the background runner; until then uploads stay ``queued``.
    """

    def __init__(self, root: str | Path, *, max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES,
                 read_limits: ReadLimits | None = None, job_limits: JobLimits | None = None,
                 check_slot: bool = True, analysis_slots: int = 1):
        self.root = Path(root).expanduser()
        self.max_upload_bytes = max_upload_bytes
        self.read_limits = read_limits
        self.catalog_path = self.root / "catalog.sqlite3"
        self.store = FileStore(self.root)
        try:
            self.store.create()
            self.catalog = Catalog(self.catalog_path)
            self.cleaned = self.store.open_and_clean(self.catalog.hashes)
        except (OSError, sqlite3.Error) as exc:
            reason = getattr(exc, "strerror", None) or str(exc)
            raise ActdocError(f"cannot use the workspace folder {self.root}: {reason}") from None
        self.cache = FindingsCache()
        self.runner = Runner(self.catalog, self.store, self.cache, read_limits,
                             job_limits or JobLimits(), check_slot=check_slot,
                             analysis_slots=analysis_slots)
        #: Held while an upload moves into ``dumps/`` and enters the catalog.
        self._store_lock = threading.Lock()

    # ------------------------------------------------------------------ catalog reads
    def list(self) -> list[DumpRecord]:
        """Every dump, newest first."""
        return self.catalog.list()

    def get(self, dump_id: str) -> DumpRecord:
        return self.catalog.get(dump_id)

    def pending(self) -> list[str]:
        """Ids whose analysis has not finished, oldest first."""
        return [record.id for record in self.catalog.pending()]

    def dump_path(self, record: DumpRecord) -> Path:
        return self.store.dump_path(record.sha256, record.name)

    def findings_dir(self, record: DumpRecord) -> Path:
        return self.store.findings_dir(record.sha256)

    # ------------------------------------------------------------------ uploads
    def begin_upload(self, file_name: str | None) -> UploadSpool:
        """A spool in ``tmp/`` to stream an upload into (pass it to ``adopt`` when complete)."""
        return UploadSpool(self.store.tmp, file_name or "upload", self.max_upload_bytes)

    def ingest(self, stream: BinaryIO, file_name: str | None,
               activations: tuple[str, ...] = ()) -> tuple[DumpRecord, bool]:
        """Store a readable stream as a dump; returns the record and whether it is new."""
        spool = self.begin_upload(file_name)
        try:
            while block := stream.read(COPY_BLOCK_BYTES):
                spool.write(block)
        except BaseException:
            spool.discard()
            raise
        return self.adopt(spool, activations)

    def ingest_path(self, path: str | Path) -> tuple[DumpRecord, bool]:
        with open(path, "rb") as stream:
            return self.ingest(stream, Path(path).name)

    def adopt(self, spool: UploadSpool,
              activations: tuple[str, ...] = ()) -> tuple[DumpRecord, bool]:
        """Store a complete upload and put it in the catalog as ``queued``, with the activation
        kinds declared for it (``--activation`` syntax, already parsed by the caller).

        Only the leading bytes are looked at here (a file of neither kind raises the readers'
        UnsupportedFormat and leaves nothing behind); the readers check the rest in the
        background. Bytes already stored return the existing record, unless the upload declares
        other kinds than it was analysed with (StoredWithOtherKinds: nothing is replaced).
        """
        try:
            sha256 = spool.finish()
            existing = self.catalog.find_sha(sha256)
            if existing is not None:
                return self._same_dump(existing, tuple(activations)), False
            dump_format = intake.sniff_format(spool.path)
            record = DumpRecord(
                id=sha256[:16], name=spool.name, sha256=sha256, size=spool.size,
                format=dump_format, status="queued", progress=0.0, error=None,
                created=time.time(), layers=0, samples=0, critical=None, warning=None,
                healthy=None, activations=tuple(activations))
            # The same bytes may have landed meanwhile. Store and insert under one lock, so a
            # second upload never replaces a stored file.
            with self._store_lock:
                existing = self.catalog.find_sha(sha256)
                if existing is not None:
                    return self._same_dump(existing, tuple(activations)), False
                self.store.place_dump(spool.folder, sha256)
                self.catalog.insert(record)
        finally:
            spool.discard()
        return record, True

    @staticmethod
    def _same_dump(existing: DumpRecord, declared: tuple[str, ...]) -> DumpRecord:
        """The stored record for a repeated upload, if it declares no other kinds."""
        if declared and tuple(declared) != tuple(existing.activations):
            raise StoredWithOtherKinds(existing, declared)
        return existing

    # ------------------------------------------------------------------ analysis
    def start(self) -> None:
        """Start the background runner (requeues what a previous run left unfinished)."""
        self.runner.start()

    def submit(self, dump_id: str) -> None:
        """Queue a stored dump for the background runner (its check first)."""
        self.runner.submit(dump_id)

    def check(self, dump_id: str) -> DumpRecord:
        """Open and validate one queued dump now, in a confined child (no measuring); ends
        ``failed``, or ``queued`` with its layers and samples known (and queued for analysis
        once the runner has started)."""
        return self.runner.check(dump_id)

    def analyse(self, dump_id: str) -> DumpRecord:
        """Check and analyse one dump now, in a confined child; ends ``ready`` or ``failed``."""
        return self.runner.analyse(dump_id)

    def findings(self, dump_id: str) -> Findings:
        """The cached Findings of a ready dump (NotReady before)."""
        from actdoc.reports import load_findings

        record = self.get(dump_id)
        if not record.ready:
            raise NotReady(record)
        return self.cache.get(record.sha256, lambda: load_findings(self.findings_dir(record)))

    def open_dump(self, dump_id: str):
        """The stored dump, opened with the readers (close it after use). Only ready dumps
        reach the pages that call this, so the file already passed the confined check."""
        from actdoc.io import open_dump

        record = self.get(dump_id)
        return open_dump(self.dump_path(record), activations=record.activations,
                         limits=self.read_limits)

    def delete(self, dump_id: str) -> None:
        """Remove the row first (so no page shows a half-deleted dump), then stop its analysis,
        then remove its files and cached findings."""
        record = self.get(dump_id)
        self.catalog.delete(dump_id)
        self.runner.cancel(dump_id)
        self.cache.drop(record.sha256)
        self.store.remove(record.sha256)

    def close(self) -> None:
        """Let go of the workspace's lock (the runner thread, once started, stays)."""
        self.store.close()


def default_workspace_dir() -> Path:
    """Per-user data folder: $XDG_DATA_HOME/actdoc, else ~/.local/share/actdoc."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "actdoc"
