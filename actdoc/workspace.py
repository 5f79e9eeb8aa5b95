"""The dashboard's store: uploaded dumps by content hash, a SQLite catalog, cached findings.

Layout of a workspace folder::

    catalog.sqlite3            one row per dump (WAL mode: readers never wait for the worker)
    dumps/<sha256>/<name>      the uploaded file, under its original (sanitised) name
    findings/<sha256>/         the whole Findings object (reports.save_findings)
    tmp/                       uploads and analyses in progress; never read by anyone else

Nothing half-written reaches the catalog: an upload is streamed and hashed into ``tmp/``, checked
with the readers, renamed into ``dumps/`` and only then inserted; findings are saved into ``tmp/``
and renamed into ``findings/`` before the row says ``ready``. The same bytes uploaded twice are
one dump. This module imports no Flask: the command line and tests use it directly.
"""

from __future__ import annotations

import logging
import os
import shutil
import sqlite3
import tempfile
import threading
import time
from contextlib import closing
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from actdoc.errors import ActdocError
from actdoc.model import Findings, SourceInfo
from actdoc.uploads import UploadSpool

log = logging.getLogger(__name__)

#: Default largest upload: 2 GiB. Dumps are read in blocks, so the limit guards the disk.
DEFAULT_MAX_UPLOAD_BYTES = 2 * 1024**3
#: Bytes copied per write while streaming an upload.
COPY_BLOCK_BYTES = 1024 * 1024
#: Progress is written to the catalog only when it moved at least this much.
PROGRESS_STEP = 0.01

STATUSES = ("queued", "analysing", "ready", "failed")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS dumps (
    id        TEXT PRIMARY KEY,
    name      TEXT NOT NULL,
    sha256    TEXT NOT NULL UNIQUE,
    size      INTEGER NOT NULL,
    format    TEXT NOT NULL,
    status    TEXT NOT NULL,
    progress  REAL NOT NULL DEFAULT 0,
    error     TEXT,
    created   REAL NOT NULL,
    layers    INTEGER NOT NULL DEFAULT 0,
    samples   INTEGER NOT NULL DEFAULT 0,
    critical  INTEGER,
    warning   INTEGER,
    healthy   INTEGER
)
"""


class UnknownDump(LookupError):
    """No dump in the catalog has this id."""

    def __init__(self, dump_id: str):
        super().__init__(f"no dump with id '{dump_id}' in this workspace")
        self.message = str(self)


class NotReady(RuntimeError):
    """The dump's findings are asked for before its analysis finished."""

    def __init__(self, record: "DumpRecord"):
        detail = f": {record.error}" if record.status == "failed" and record.error else ""
        super().__init__(
            f"{record.name}: the analysis is {record.status} "
            f"({record.progress:.0%} done), so there are no findings yet{detail}")
        self.message = str(self)
        self.record = record


@dataclass(frozen=True)
class DumpRecord:
    """One catalog row."""

    id: str
    name: str
    sha256: str
    size: int
    format: str
    status: str
    progress: float
    error: str | None
    created: float
    layers: int
    samples: int
    critical: int | None
    warning: int | None
    healthy: int | None

    @property
    def ready(self) -> bool:
        return self.status == "ready"

    def to_dict(self) -> dict:
        """The object the HTTP API returns for a dump (docs/contract.md section 6, with extras)."""
        verdicts = None
        if self.ready:
            verdicts = {"critical": self.critical, "warning": self.warning,
                        "healthy": self.healthy}
        return {
            "id": self.id, "name": self.name, "status": self.status,
            "progress": round(self.progress, 4), "error": self.error, "sha256": self.sha256,
            "size": self.size, "format": self.format, "layers": self.layers,
            "samples": self.samples,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(self.created)),
            "verdicts": verdicts,
        }


def _open_dump(path: Path):
    from actdoc.io import open_dump

    return open_dump(path)


class Workspace:
    """A folder of uploaded dumps, their catalog and their cached findings."""

    def __init__(self, root: str | Path, *, max_upload_bytes: int = DEFAULT_MAX_UPLOAD_BYTES):
        self.root = Path(root).expanduser()
        self.max_upload_bytes = max_upload_bytes
        self.catalog_path = self.root / "catalog.sqlite3"
        try:
            for sub in ("dumps", "findings", "tmp"):
                (self.root / sub).mkdir(parents=True, exist_ok=True)
            with closing(self._connect()) as db, db:
                db.execute("PRAGMA journal_mode=WAL")
                db.execute(_SCHEMA)
        except (OSError, sqlite3.Error) as exc:
            reason = getattr(exc, "strerror", None) or str(exc)
            raise ActdocError(f"cannot use the workspace folder {self.root}: {reason}") from None
        self._findings_cache: dict[str, Findings] = {}
        self._cache_lock = threading.Lock()
        #: Held while an upload moves into ``dumps/`` and enters the catalog.
        self._store_lock = threading.Lock()

    def _connect(self) -> sqlite3.Connection:
        db = sqlite3.connect(self.catalog_path, timeout=30)
        db.row_factory = sqlite3.Row
        return db

    # ------------------------------------------------------------------ catalog reads
    def list(self) -> list[DumpRecord]:
        """Every dump, newest first."""
        with closing(self._connect()) as db:
            rows = db.execute("SELECT * FROM dumps ORDER BY created DESC, name").fetchall()
        return [DumpRecord(**dict(row)) for row in rows]

    def get(self, dump_id: str) -> DumpRecord:
        with closing(self._connect()) as db:
            row = db.execute("SELECT * FROM dumps WHERE id = ?", (dump_id,)).fetchone()
        if row is None:
            raise UnknownDump(dump_id)
        return DumpRecord(**dict(row))

    def _exists(self, dump_id: str) -> bool:
        with closing(self._connect()) as db:
            return db.execute("SELECT 1 FROM dumps WHERE id = ?", (dump_id,)).fetchone() is not None

    def _find_sha(self, sha256: str) -> DumpRecord | None:
        with closing(self._connect()) as db:
            row = db.execute("SELECT * FROM dumps WHERE sha256 = ?", (sha256,)).fetchone()
        return None if row is None else DumpRecord(**dict(row))

    def dump_path(self, record: DumpRecord) -> Path:
        return self.root / "dumps" / record.sha256 / record.name

    def findings_dir(self, record: DumpRecord) -> Path:
        return self.root / "findings" / record.sha256

    # ------------------------------------------------------------------ uploads
    def begin_upload(self, file_name: str | None) -> UploadSpool:
        """A spool in ``tmp/`` to stream an upload into (pass it to ``adopt`` when complete)."""
        return UploadSpool(self.root / "tmp", file_name or "upload", self.max_upload_bytes)

    def ingest(self, stream: BinaryIO, file_name: str | None) -> tuple[DumpRecord, bool]:
        """Store a readable stream as a dump; returns the record and whether it is new."""
        spool = self.begin_upload(file_name)
        try:
            while block := stream.read(COPY_BLOCK_BYTES):
                spool.write(block)
        except BaseException:
            spool.discard()
            raise
        return self.adopt(spool)

    def ingest_path(self, path: str | Path) -> tuple[DumpRecord, bool]:
        with open(path, "rb") as stream:
            return self.ingest(stream, Path(path).name)

    def adopt(self, spool: UploadSpool) -> tuple[DumpRecord, bool]:
        """Check a complete upload with the readers and put it in the catalog as ``queued``.

        A file the readers refuse raises their ActdocError (one sentence naming the file) and
        leaves nothing behind. Bytes already stored return the existing record.
        """
        try:
            sha256 = spool.finish()
            existing = self._find_sha(sha256)
            if existing is not None:
                return existing, False
            with _open_dump(spool.path) as dump:
                dump_format, layers, samples = dump.format, len(dump.layers), dump.samples
            record = DumpRecord(
                id=sha256[:16], name=spool.name, sha256=sha256, size=spool.size,
                format=dump_format, status="queued", progress=0.0, error=None,
                created=time.time(), layers=layers, samples=samples, critical=None,
                warning=None, healthy=None)
            # The readers' check above may take long; the same bytes may have landed meanwhile.
            # Store and insert under one lock, so a second upload never replaces a stored file.
            with self._store_lock:
                existing = self._find_sha(sha256)
                if existing is not None:
                    return existing, False
                target = self.root / "dumps" / sha256
                if target.exists():  # left by an interrupted earlier attempt: replace it
                    shutil.rmtree(target)
                os.replace(spool.folder, target)
                self._insert(record)
        finally:
            spool.discard()
        return record, True

    def _insert(self, record: DumpRecord) -> None:
        with closing(self._connect()) as db, db:
            fields = record.__dict__
            db.execute(f"INSERT INTO dumps ({', '.join(fields)}) "
                       f"VALUES ({', '.join('?' for _ in fields)})", tuple(fields.values()))

    # ------------------------------------------------------------------ analysis
    def pending(self) -> list[str]:
        """Ids whose analysis has not finished (to requeue after a restart), oldest first."""
        with closing(self._connect()) as db:
            rows = db.execute("SELECT id FROM dumps WHERE status IN ('queued', 'analysing') "
                              "ORDER BY created").fetchall()
        return [row["id"] for row in rows]

    def _update(self, dump_id: str, **values: object) -> None:
        assignments = ", ".join(f"{column} = ?" for column in values)
        with closing(self._connect()) as db, db:
            db.execute(f"UPDATE dumps SET {assignments} WHERE id = ?",
                       (*values.values(), dump_id))

    def analyse(self, dump_id: str) -> DumpRecord:
        """Run the analysis of one dump, recording progress; ends ``ready`` or ``failed``."""
        from actdoc.analysis import analyze
        from actdoc.reports import save_findings
        from actdoc.reports.document import verdict

        record = self.get(dump_id)
        if record.status not in ("queued", "analysing"):  # queued twice: already done
            return record
        self._update(dump_id, status="analysing", progress=0.0, error=None)
        last = [0.0]

        def progress(fraction: float) -> None:
            if fraction - last[0] >= PROGRESS_STEP:
                last[0] = fraction
                self._update(dump_id, progress=min(1.0, max(0.0, float(fraction))))

        scratch = Path(tempfile.mkdtemp(prefix="findings-", dir=self.root / "tmp"))
        try:
            with _open_dump(self.dump_path(record)) as dump:
                # The bytes were hashed on upload: hand the engine the source, not a re-read.
                source = SourceInfo(file=record.name, sha256=record.sha256, format=dump.format,
                                    samples=dump.samples)
                findings = analyze(dump, progress=progress, source=source)
            save_findings(findings, scratch)
            target = self.findings_dir(record)
            if target.exists():
                shutil.rmtree(target)
            os.replace(scratch, target)
        except ActdocError as error:
            self._update(dump_id, status="failed", error=error.message)
        except Exception as error:  # a bug, not the user's input: keep the server alive
            log.exception("analysis of %s failed", record.name)
            self._update(dump_id, status="failed",
                         error=f"{record.name}: the analysis stopped on an internal error "
                               f"({type(error).__name__}: {error})")
        else:
            if not self._exists(dump_id):  # deleted while it was analysed
                shutil.rmtree(self.findings_dir(record), ignore_errors=True)
            else:
                counts = verdict(findings)["layers"]
                self._update(dump_id, status="ready", progress=1.0, **counts)
        finally:
            shutil.rmtree(scratch, ignore_errors=True)
        return self.get(dump_id)

    def findings(self, dump_id: str) -> Findings:
        """The cached Findings of a ready dump (NotReady before)."""
        from actdoc.reports import load_findings

        record = self.get(dump_id)
        if not record.ready:
            raise NotReady(record)
        with self._cache_lock:
            cached = self._findings_cache.get(record.sha256)
        if cached is None:
            cached = load_findings(self.findings_dir(record))
            with self._cache_lock:
                if len(self._findings_cache) >= 8:
                    self._findings_cache.pop(next(iter(self._findings_cache)))
                self._findings_cache[record.sha256] = cached
        return cached

    def open_dump(self, dump_id: str):
        """The stored dump, opened with the readers (close it after use)."""
        return _open_dump(self.dump_path(self.get(dump_id)))

    def delete(self, dump_id: str) -> None:
        """Remove the row first (so no page shows a half-deleted dump), then file and cache."""
        record = self.get(dump_id)
        with closing(self._connect()) as db, db:
            db.execute("DELETE FROM dumps WHERE id = ?", (dump_id,))
        with self._cache_lock:
            self._findings_cache.pop(record.sha256, None)
        shutil.rmtree(self.root / "dumps" / record.sha256, ignore_errors=True)
        shutil.rmtree(self.findings_dir(record), ignore_errors=True)


def default_workspace_dir() -> Path:
    """Per-user data folder: $XDG_DATA_HOME/actdoc, else ~/.local/share/actdoc."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "actdoc"
