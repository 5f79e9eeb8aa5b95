"""The workspace's catalog: one SQLite row per dump, in WAL mode so readers never wait for the
runner's writes. Only rows live here; files are the store's (store.py)."""

from __future__ import annotations

import json
import sqlite3
import time
from contextlib import closing
from dataclasses import asdict, dataclass
from pathlib import Path

STATUSES = ("queued", "analysing", "ready", "failed")
#: How far the readers got with a dump: ``waiting`` (not opened yet), ``checking`` (a child is
#: opening and validating it), ``checked`` (its layer count, samples and format are known).
PHASES = ("waiting", "checking", "checked")

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
    healthy   INTEGER,
    attempts  INTEGER NOT NULL DEFAULT 0,
    phase     TEXT NOT NULL DEFAULT 'waiting',
    activations TEXT NOT NULL DEFAULT '[]'
)
"""

#: Columns added after the first release, with their definitions: older catalogs gain them.
_ADDED_COLUMNS = {"attempts": "INTEGER NOT NULL DEFAULT 0",
                  "phase": "TEXT NOT NULL DEFAULT 'waiting'",
                  "activations": "TEXT NOT NULL DEFAULT '[]'"}
#: What an older catalog's rows get when a column is added: a dump whose layers were counted
#: (every ready one) had been checked.
_BACKFILL = {"phase": "UPDATE dumps SET phase = 'checked' WHERE status = 'ready' OR layers > 0"}


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
    """One catalog row. ``attempts`` counts the checks and analyses started for it that never
    ended with an answer (the runner gives up after a few); ``phase`` is one of PHASES: until it
    is ``checked``, ``layers`` and ``samples`` are unknown (stored as 0, shown as unknown).
    ``activations`` are the kinds declared with the upload, in the command line's
    ``--activation`` syntax (stored as a JSON list), used whenever the dump is opened."""

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
    attempts: int = 0
    phase: str = "waiting"
    activations: tuple[str, ...] = ()

    @property
    def ready(self) -> bool:
        return self.status == "ready"

    @property
    def checked(self) -> bool:
        """Whether the readers have opened the file and its layers and samples are known."""
        return self.phase == "checked"

    @property
    def stage(self) -> str:
        """Where the dump is, in the words the pages show: "waiting to be checked",
        "checking", "waiting for analysis", "analysing", "ready" or "failed"."""
        if self.status in ("ready", "failed"):
            return self.status
        if self.phase == "checking":
            return "checking"
        if self.phase != "checked":
            return "waiting to be checked"
        return "analysing" if self.status == "analysing" else "waiting for analysis"

    def to_dict(self) -> dict:
        """The object the HTTP API returns for a dump (docs/contract.md section 6, with extras)."""
        verdicts = None
        if self.ready:
            verdicts = {"critical": self.critical, "warning": self.warning,
                        "healthy": self.healthy}
        return {
            "id": self.id, "name": self.name, "status": self.status,
            "progress": round(self.progress, 4), "error": self.error, "sha256": self.sha256,
            "size": self.size, "format": self.format,
            "layers": self.layers if self.checked else None,
            "samples": self.samples if self.checked else None,
            "checked": self.checked, "stage": self.stage,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(self.created)),
            "verdicts": verdicts, "activation": list(self.activations),
        }


def _record(row: sqlite3.Row) -> DumpRecord:
    values = dict(row)
    values["activations"] = tuple(json.loads(values.get("activations") or "[]"))
    return DumpRecord(**values)


class Catalog:
    """The rows of one workspace (``catalog.sqlite3``). Each call opens its own connection, so
    any thread may use it; WAL lets page reads go on while the runner writes progress."""

    def __init__(self, path: Path):
        self.path = Path(path)
        with closing(self._connect()) as db, db:
            db.execute("PRAGMA journal_mode=WAL")
            db.execute(_SCHEMA)
            present = {row["name"] for row in db.execute("PRAGMA table_info(dumps)")}
            for column, definition in _ADDED_COLUMNS.items():
                if column not in present:
                    db.execute(f"ALTER TABLE dumps ADD COLUMN {column} {definition}")
                    if column in _BACKFILL:
                        db.execute(_BACKFILL[column])

    def _connect(self) -> sqlite3.Connection:
        db = sqlite3.connect(self.path, timeout=30)
        db.row_factory = sqlite3.Row
        return db

    def list(self) -> list[DumpRecord]:
        """Every dump, newest first."""
        with closing(self._connect()) as db:
            rows = db.execute("SELECT * FROM dumps ORDER BY created DESC, name").fetchall()
        return [_record(row) for row in rows]

    def get(self, dump_id: str) -> DumpRecord:
        with closing(self._connect()) as db:
            row = db.execute("SELECT * FROM dumps WHERE id = ?", (dump_id,)).fetchone()
        if row is None:
            raise UnknownDump(dump_id)
        return _record(row)

    def exists(self, dump_id: str) -> bool:
        with closing(self._connect()) as db:
            return db.execute("SELECT 1 FROM dumps WHERE id = ?", (dump_id,)).fetchone() is not None

    def find_sha(self, sha256: str) -> DumpRecord | None:
        with closing(self._connect()) as db:
            row = db.execute("SELECT * FROM dumps WHERE sha256 = ?", (sha256,)).fetchone()
        return None if row is None else _record(row)

    def hashes(self) -> set[str]:
        """The SHA-256 of every stored dump (the store keeps only files these name)."""
        with closing(self._connect()) as db:
            return {row["sha256"] for row in db.execute("SELECT sha256 FROM dumps")}

    def insert(self, record: DumpRecord) -> None:
        fields = asdict(record)
        fields["activations"] = json.dumps(list(record.activations))
        with closing(self._connect()) as db, db:
            db.execute(f"INSERT INTO dumps ({', '.join(fields)}) "
                       f"VALUES ({', '.join('?' for _ in fields)})", tuple(fields.values()))

    def update(self, dump_id: str, **values: object) -> None:
        assignments = ", ".join(f"{column} = ?" for column in values)
        with closing(self._connect()) as db, db:
            db.execute(f"UPDATE dumps SET {assignments} WHERE id = ?",
                       (*values.values(), dump_id))

    def claim(self, dump_id: str) -> int:
        """Mark a queued dump ``analysing`` (and ``checking``, unless already checked) and count
        the attempt; returns the attempts so far."""
        with closing(self._connect()) as db, db:
            db.execute("UPDATE dumps SET status = 'analysing', progress = 0, error = NULL, "
                       "attempts = attempts + 1, phase = CASE phase WHEN 'checked' "
                       "THEN 'checked' ELSE 'checking' END WHERE id = ?", (dump_id,))
            row = db.execute("SELECT attempts FROM dumps WHERE id = ?", (dump_id,)).fetchone()
        if row is None:
            raise UnknownDump(dump_id)
        return int(row["attempts"])

    def claim_check(self, dump_id: str) -> int:
        """Mark a queued dump ``checking`` (it stays ``queued``) and count the attempt; returns
        the attempts so far."""
        with closing(self._connect()) as db, db:
            db.execute("UPDATE dumps SET phase = 'checking', error = NULL, "
                       "attempts = attempts + 1 WHERE id = ?", (dump_id,))
            row = db.execute("SELECT attempts FROM dumps WHERE id = ?", (dump_id,)).fetchone()
        if row is None:
            raise UnknownDump(dump_id)
        return int(row["attempts"])

    def end_check(self, dump_id: str) -> None:
        """A check that ended with the readers' answer is no attempt that never finished."""
        with closing(self._connect()) as db, db:
            db.execute("UPDATE dumps SET attempts = MAX(attempts - 1, 0) WHERE id = ?",
                       (dump_id,))

    def delete(self, dump_id: str) -> None:
        with closing(self._connect()) as db, db:
            db.execute("DELETE FROM dumps WHERE id = ?", (dump_id,))

    def pending(self) -> list[DumpRecord]:
        """Dumps whose analysis has not finished (to requeue after a restart), oldest first."""
        with closing(self._connect()) as db:
            rows = db.execute("SELECT * FROM dumps WHERE status IN ('queued', 'analysing') "
                              "ORDER BY created").fetchall()
        return [_record(row) for row in rows]
