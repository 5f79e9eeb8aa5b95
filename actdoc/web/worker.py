"""The background analysis: one thread works through the queued dumps (no Flask here)."""

from __future__ import annotations

import logging
import queue
import threading
from typing import Callable

from actdoc.workspace import DumpRecord, UnknownDump, Workspace

log = logging.getLogger(__name__)


class AnalysisWorker:
    """One background thread that analyses queued dumps in turn (the server stays responsive).

    ``notify`` is called after each analysis with the finished record (tests and logs use it).
    """

    def __init__(self, workspace: Workspace,
                 notify: Callable[[DumpRecord], None] | None = None):
        self.workspace = workspace
        self.notify = notify
        self._queue: "queue.Queue[str]" = queue.Queue()
        self._thread = threading.Thread(target=self._loop, name="actdoc-analysis", daemon=True)
        self._started = False

    def start(self) -> None:
        """Start the thread and requeue whatever a previous run left unfinished."""
        if self._started:
            return
        self._started = True
        for dump_id in self.workspace.pending():
            self._queue.put(dump_id)
        self._thread.start()

    def submit(self, dump_id: str) -> None:
        self._queue.put(dump_id)

    def _loop(self) -> None:
        while True:
            dump_id = self._queue.get()
            try:
                record = self.workspace.analyse(dump_id)
            except UnknownDump:  # deleted while it waited
                continue
            except Exception:
                log.exception("analysis worker: dump %s", dump_id)
                continue
            if self.notify is not None:
                self.notify(record)
