"""The workspace's files: dumps by content hash, their findings archives, a scratch folder, and a
small in-memory cache of loaded findings.

Layout::

    dumps/<sha256>/<name>      the uploaded file, under its original (sanitised) name
    findings/<sha256>/         the whole Findings object (reports.save_findings)
    tmp/                       uploads and analyses in progress; never read by anyone else

Files enter ``dumps/`` and ``findings/`` only by renaming a finished folder out of ``tmp/``, so a
kill leaves half-written things in ``tmp/`` alone; they are removed when the workspace is next
opened by a process that finds no other one using it (a lock file tells).
"""

from __future__ import annotations

import logging
import os
import shutil
import tempfile
import threading
from collections import OrderedDict
from pathlib import Path
from typing import Callable, Iterable

from actdoc.model import Findings

try:  # POSIX; elsewhere the clean-up at start runs unguarded
    import fcntl
except ImportError:  # pragma: no cover - not on Linux or macOS
    fcntl = None

log = logging.getLogger(__name__)

#: Loaded findings kept in memory, most recently used last.
CACHED_FINDINGS = 8
LOCK_FILE = "workspace.lock"


class FileStore:
    """The folders of one workspace. ``open_and_clean`` must run once before use."""

    def __init__(self, root: Path):
        self.root = Path(root)
        self.tmp = self.root / "tmp"
        self._lock_file = None

    def create(self) -> None:
        for sub in ("dumps", "findings", "tmp"):
            (self.root / sub).mkdir(parents=True, exist_ok=True)

    def dump_path(self, sha256: str, name: str) -> Path:
        return self.root / "dumps" / sha256 / name

    def findings_dir(self, sha256: str) -> Path:
        return self.root / "findings" / sha256

    def scratch(self, prefix: str) -> Path:
        """A fresh folder in ``tmp/`` (the caller moves it out or removes it)."""
        return Path(tempfile.mkdtemp(prefix=prefix, dir=self.tmp))

    def place_dump(self, folder: Path, sha256: str) -> None:
        """Move a finished upload folder to ``dumps/<sha256>`` (replacing a leftover)."""
        self._place(folder, self.root / "dumps" / sha256)

    def place_findings(self, folder: Path, sha256: str) -> None:
        """Move a finished findings archive to ``findings/<sha256>``."""
        self._place(folder, self.findings_dir(sha256))

    @staticmethod
    def _place(folder: Path, target: Path) -> None:
        if target.exists():  # left by an interrupted earlier attempt: replace it
            shutil.rmtree(target)
        os.replace(folder, target)

    def remove(self, sha256: str) -> None:
        shutil.rmtree(self.root / "dumps" / sha256, ignore_errors=True)
        shutil.rmtree(self.findings_dir(sha256), ignore_errors=True)

    def open_and_clean(self, known_hashes: Callable[[], Iterable[str]]) -> bool:
        """Hold the workspace's lock for this store's life; clean up when no one else holds it.

        Cleaning empties ``tmp/`` (upload spools and findings half-written when a server was
        killed) and removes ``dumps/`` and ``findings/`` folders that no catalog row names.
        Returns whether it cleaned: a second live server on the same folder skips it.
        """
        exclusive = True
        if fcntl is not None:
            self._lock_file = open(self.root / LOCK_FILE, "a+b")
            try:
                fcntl.flock(self._lock_file, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                exclusive = False
        if exclusive:
            self._clean(set(known_hashes()))
        if self._lock_file is not None:
            fcntl.flock(self._lock_file, fcntl.LOCK_SH)
        return exclusive

    def _clean(self, known: set[str]) -> None:
        removed = 0
        for entry in self.tmp.iterdir():
            removed += 1
            if entry.is_dir() and not entry.is_symlink():
                shutil.rmtree(entry, ignore_errors=True)
            else:
                entry.unlink(missing_ok=True)
        for sub in ("dumps", "findings"):
            for entry in (self.root / sub).iterdir():
                if entry.name not in known:
                    removed += 1
                    shutil.rmtree(entry, ignore_errors=True)
        if removed:
            log.info("workspace %s: removed %d leftover(s) of an interrupted run",
                     self.root, removed)

    def close(self) -> None:
        if self._lock_file is not None:
            self._lock_file.close()
            self._lock_file = None


class FindingsCache:
    """The last few loaded Findings by SHA-256, shared by every request thread."""

    def __init__(self, size: int = CACHED_FINDINGS):
        self.size = size
        self._items: "OrderedDict[str, Findings]" = OrderedDict()
        self._lock = threading.Lock()

    def get(self, sha256: str, load: Callable[[], Findings]) -> Findings:
        with self._lock:
            cached = self._items.get(sha256)
            if cached is not None:
                self._items.move_to_end(sha256)
                return cached
        loaded = load()  # outside the lock: other pages keep being served meanwhile
        self.put(sha256, loaded)
        return loaded

    def put(self, sha256: str, findings: Findings) -> None:
        with self._lock:
            self._items[sha256] = findings
            self._items.move_to_end(sha256)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def drop(self, sha256: str) -> None:
        with self._lock:
            self._items.pop(sha256, None)
