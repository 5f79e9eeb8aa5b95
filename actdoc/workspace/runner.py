"""The workspace's runner: a queue of stored dumps and one background thread that checks and
analyses each in a confined child process (actdoc/confine), so the server keeps answering
whatever a file does.

A job ends ``ready`` (findings archived) or ``failed`` with one sentence: the readers' refusal,
a time or memory limit passed, or a child that died without an answer. A child that dies, and a
server killed mid-analysis, count as attempts: after ``MAX_ATTEMPTS`` the dump is failed rather
than queued again forever.
"""

from __future__ import annotations

import logging
import queue
import shutil
import subprocess
import threading
from pathlib import Path

from actdoc.confine import Job, JobLimits, Outcome, run as run_confined
from actdoc.io.limits import ReadLimits
from actdoc.workspace.catalog import Catalog, DumpRecord, UnknownDump
from actdoc.workspace.store import FileStore, FindingsCache

log = logging.getLogger(__name__)

#: Analyses started for one dump before it is failed instead of queued again.
MAX_ATTEMPTS = 3
#: Progress is written to the catalog only when it moved at least this much.
PROGRESS_STEP = 0.01


def gave_up(record: DumpRecord) -> str:
    return (f"{record.name}: the analysis was started {record.attempts} times and never "
            f"finished; it is not tried again")


class Runner:
    """One thread that works through the queued dumps in turn, each in a confined child."""

    def __init__(self, catalog: Catalog, store: FileStore, cache: FindingsCache,
                 read_limits: ReadLimits | None, job_limits: JobLimits):
        self.catalog = catalog
        self.store = store
        self.cache = cache
        self.read_limits = read_limits
        self.job_limits = job_limits
        self._queue: "queue.Queue[str]" = queue.Queue()
        self._thread = threading.Thread(target=self._loop, name="actdoc-analysis", daemon=True)
        self._started = False
        self._lock = threading.Lock()
        #: The child process of the job in progress and its dump id (None between jobs).
        self.current: tuple[str, subprocess.Popen] | None = None

    def start(self) -> None:
        """Start the thread and requeue what a previous run left unfinished (oldest first);
        a dump already started ``MAX_ATTEMPTS`` times is failed instead."""
        with self._lock:
            if self._started:
                return
            self._started = True
        for record in self.catalog.pending():
            if record.attempts >= MAX_ATTEMPTS:
                self.catalog.update(record.id, status="failed", error=gave_up(record))
            else:
                self._queue.put(record.id)
        self._thread.start()

    def submit(self, dump_id: str) -> None:
        self._queue.put(dump_id)

    def _loop(self) -> None:
        while True:
            dump_id = self._queue.get()
            try:
                self.analyse(dump_id)
            except UnknownDump:  # deleted while it waited
                continue
            except Exception:
                log.exception("analysis runner: dump %s", dump_id)

    def analyse(self, dump_id: str) -> DumpRecord:
        """Check and analyse one dump in a child; ends ``ready``, ``failed`` or (after a child
        died, with attempts left) ``queued`` again at the back of the queue."""
        record = self.catalog.get(dump_id)
        if record.status not in ("queued", "analysing"):  # queued twice: already done
            return record
        attempts = self.catalog.claim(dump_id)
        scratch = self.store.scratch("findings-")
        last = [0.0]

        def progress(fraction: float) -> None:
            if fraction - last[0] >= PROGRESS_STEP:
                last[0] = fraction
                self.catalog.update(dump_id, progress=fraction)

        def checked(facts: dict) -> None:
            values = {key: facts[key] for key in ("layers", "samples")
                      if isinstance(facts.get(key), int)}
            if isinstance(facts.get("format"), str):
                values["format"] = facts["format"]
            if values:
                self.catalog.update(dump_id, **values)

        def started(process: subprocess.Popen) -> None:
            self.current = (dump_id, process)

        job = Job(target=str(self.store.dump_path(record.sha256, record.name)),
                  archive=str(scratch), read_limits=self.read_limits,
                  source_file=record.name, source_sha256=record.sha256)
        try:
            outcome = run_confined(job, self.job_limits, record.name, on_checked=checked,
                                   on_progress=progress, on_start=started)
            self.current = None
            self._conclude(record, outcome, scratch, attempts)
        except Exception as error:  # a bug or the machine (no process, no disk), not the file
            log.exception("analysis of %s failed", record.name)
            if self.catalog.exists(dump_id):
                self.catalog.update(dump_id, status="failed",
                                    error=f"{record.name}: the analysis stopped on an internal "
                                          f"error ({type(error).__name__}: {error})")
        finally:
            self.current = None
            shutil.rmtree(scratch, ignore_errors=True)
        return self.catalog.get(dump_id) if self.catalog.exists(dump_id) else record

    def _conclude(self, record: DumpRecord, outcome: Outcome, scratch: Path,
                  attempts: int) -> None:
        from actdoc.reports import load_findings
        from actdoc.reports.document import verdict

        if not self.catalog.exists(record.id):  # deleted while it was analysed
            return
        if outcome.state == "crashed" and attempts < MAX_ATTEMPTS:
            self.catalog.update(record.id, status="queued", progress=0.0)
            self.submit(record.id)
            return
        if not outcome.ok:
            self.catalog.update(record.id, status="failed", error=outcome.message)
            return
        # The archive is the child's answer: loading it (no pickle) is also its check.
        findings = load_findings(scratch)
        self.store.place_findings(scratch, record.sha256)
        if not self.catalog.exists(record.id):
            self.store.remove(record.sha256)
            return
        self.cache.put(record.sha256, findings)
        self.catalog.update(record.id, status="ready", progress=1.0,
                            **verdict(findings)["layers"])

    def cancel(self, dump_id: str) -> None:
        """Stop the child working on ``dump_id``, if one is (its dump is being deleted)."""
        current = self.current
        if current is not None and current[0] == dump_id:
            try:
                current[1].kill()
            except OSError:
                pass
