"""The workspace's runner: queues of stored dumps and background threads that check and analyse
each in a confined child process (actdoc/confine), so the server keeps answering whatever a file
does.

Two slots by default: the check slot opens and validates each new upload (quick: the readers
only), so its layer count and samples show, or its refusal, while the analysis slot measures one
dump at a time, however long that takes (``analysis_slots`` analyses at once, if more). With
``check_slot=False`` the analysis slots do both, each dump in one child. A job ends ``ready`` (findings archived) or ``failed`` with one sentence: the
readers' refusal, a time or memory limit passed, or a child that died without an answer. A child
that dies, and a server killed mid-check or mid-analysis, count as attempts (a check that ended
with an answer does not): after ``MAX_ATTEMPTS`` the dump is failed rather than queued again
forever.
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
    """Threads that work through the queued dumps, each job in a confined child: one checks
    new uploads (with ``check_slot``), ``analysis_slots`` analyse checked dumps in turn."""

    def __init__(self, catalog: Catalog, store: FileStore, cache: FindingsCache,
                 read_limits: ReadLimits | None, job_limits: JobLimits, check_slot: bool = True,
                 analysis_slots: int = 1):
        if analysis_slots < 1:
            raise ValueError(f"the runner needs at least one analysis slot, not {analysis_slots}")
        self.catalog = catalog
        self.store = store
        self.cache = cache
        self.read_limits = read_limits
        self.job_limits = job_limits
        self._queue: "queue.Queue[str]" = queue.Queue()
        self._checks: "queue.Queue[str] | None" = queue.Queue() if check_slot else None
        self._threads = [threading.Thread(target=self._loop, args=(self._queue, self.analyse),
                                          name=f"actdoc-analysis-{slot}", daemon=True)
                         for slot in range(analysis_slots)]
        if self._checks is not None:
            self._threads.append(threading.Thread(target=self._loop,
                                                  args=(self._checks, self.check),
                                                  name="actdoc-check", daemon=True))
        self._started = False
        self._lock = threading.Lock()
        #: The child process of each job in progress, by dump id.
        self.running: dict[str, subprocess.Popen] = {}

    @property
    def current(self) -> tuple[str, subprocess.Popen] | None:
        """One job in progress, (dump id, child), or None."""
        return next(iter(list(self.running.items())), None)

    def start(self) -> None:
        """Start the threads and requeue what a previous run left unfinished (oldest first);
        a dump already started ``MAX_ATTEMPTS`` times is failed instead."""
        with self._lock:
            if self._started:
                return
            self._started = True
        for record in self.catalog.pending():
            if record.attempts >= MAX_ATTEMPTS:
                self.catalog.update(record.id, status="failed", error=gave_up(record))
                continue
            if record.status == "analysing" or record.phase == "checking":  # interrupted
                self.catalog.update(record.id, status="queued", progress=0.0,
                                    phase="checked" if record.checked else "waiting")
            self._queue_for(record.id, record.checked)
        for thread in self._threads:
            thread.start()

    def submit(self, dump_id: str) -> None:
        """Queue a new upload: for its check first, with a check slot."""
        self._queue_for(dump_id, checked=False)

    def _queue_for(self, dump_id: str, checked: bool) -> None:
        (self._queue if checked or self._checks is None else self._checks).put(dump_id)

    @staticmethod
    def _loop(jobs: "queue.Queue[str]", work) -> None:
        while True:
            dump_id = jobs.get()
            try:
                work(dump_id)
            except UnknownDump:  # deleted while it waited
                continue
            except Exception:
                log.exception("analysis runner: dump %s", dump_id)

    def _record_check(self, dump_id: str, facts: dict) -> None:
        """The child's ``checked`` answer: the file's format, layer count and samples."""
        values: dict = {key: facts[key] for key in ("layers", "samples")
                        if isinstance(facts.get(key), int)}
        if isinstance(facts.get("format"), str):
            values["format"] = facts["format"]
        if self.catalog.exists(dump_id):
            self.catalog.update(dump_id, phase="checked", **values)

    def _started_child(self, dump_id: str):
        def started(process: subprocess.Popen) -> None:
            self.running[dump_id] = process
        return started

    def check(self, dump_id: str) -> DumpRecord:
        """Open and validate one queued dump in a child (the readers only, no measuring), then
        queue it for analysis; a refusal or a limit passed fails it with its sentence."""
        record = self.catalog.get(dump_id)
        if record.status != "queued" or record.checked:
            if record.status == "queued":
                self._queue.put(dump_id)
            return record
        attempts = self.catalog.claim_check(dump_id)
        job = Job(target=str(self.store.dump_path(record.sha256, record.name)),
                  read_limits=self.read_limits, source_file=record.name,
                  source_sha256=record.sha256, activations=record.activations)
        try:
            outcome = run_confined(job, self.job_limits, record.name,
                                   on_checked=lambda facts: self._record_check(dump_id, facts),
                                   on_start=self._started_child(dump_id))
        except Exception as error:  # a bug or the machine (no process), not the file
            log.exception("check of %s failed", record.name)
            outcome = Outcome("internal", f"{record.name}: the check stopped on an internal "
                                          f"error ({type(error).__name__}: {error})")
        finally:
            self.running.pop(dump_id, None)
        if not self.catalog.exists(dump_id):  # deleted while it was checked
            return record
        checked = self.catalog.get(dump_id).checked
        if outcome.ok:
            self.catalog.end_check(dump_id)
            self._queue.put(dump_id)
        elif outcome.state == "crashed" and attempts < MAX_ATTEMPTS:
            if not checked:
                self.catalog.update(dump_id, phase="waiting")
            self._queue_for(dump_id, checked)
        else:
            self.catalog.update(dump_id, status="failed", error=outcome.message)
        return self.catalog.get(dump_id)

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

        job = Job(target=str(self.store.dump_path(record.sha256, record.name)),
                  archive=str(scratch), read_limits=self.read_limits,
                  source_file=record.name, source_sha256=record.sha256,
                  activations=record.activations)
        try:
            outcome = run_confined(job, self.job_limits, record.name,
                                   on_checked=lambda facts: self._record_check(dump_id, facts),
                                   on_progress=progress, on_start=self._started_child(dump_id))
            self.running.pop(dump_id, None)
            self._conclude(record, outcome, scratch, attempts)
        except Exception as error:  # a bug or the machine (no process, no disk), not the file
            log.exception("analysis of %s failed", record.name)
            if self.catalog.exists(dump_id):
                self.catalog.update(dump_id, status="failed",
                                    error=f"{record.name}: the analysis stopped on an internal "
                                          f"error ({type(error).__name__}: {error})")
        finally:
            self.running.pop(dump_id, None)
            shutil.rmtree(scratch, ignore_errors=True)
        return self.catalog.get(dump_id) if self.catalog.exists(dump_id) else record

    def _conclude(self, record: DumpRecord, outcome: Outcome, scratch: Path,
                  attempts: int) -> None:
        from actdoc.reports import load_findings
        from actdoc.reports.document import verdict

        if not self.catalog.exists(record.id):  # deleted while it was analysed
            return
        if outcome.state == "crashed" and attempts < MAX_ATTEMPTS:
            checked = self.catalog.get(record.id).checked
            self.catalog.update(record.id, status="queued", progress=0.0,
                                phase="checked" if checked else "waiting")
            self._queue_for(record.id, checked)
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
        process = self.running.get(dump_id)
        if process is not None:
            try:
                process.kill()
            except OSError:
                pass
