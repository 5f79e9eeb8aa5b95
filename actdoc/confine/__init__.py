"""Opening and analysing an untrusted dump in a child process that can be stopped.

A malformed file can make a reader loop forever inside a C library while holding the GIL, or ask
for gigabytes of memory: in the dashboard's own process that would stall every page. So the
dashboard (and ``actdoc analyze --time-limit``) runs the readers and the engine in a fresh
Python process (``python -m actdoc.confine``) with

- a wall-clock limit for opening and checking the file, and another for measuring it, after
  which the process group is killed;
- a memory limit (``RLIMIT_AS``, set by the child on itself once its modules are imported).

Nothing unpickles anything: the job goes to the child as JSON on its standard input, the child
answers with JSON lines (``checked``, ``progress``, then one of ``done``, ``refused``,
``memory``, ``internal``) and leaves its findings as the archive of actdoc/reports/archive.py,
which loads with pickling refused. Every way a job can end becomes an ``Outcome`` with one
sentence naming the file.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import os
import selectors
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import actdoc
from actdoc.escaping import visible, visible_lines
from actdoc.io.limits import ReadLimits

log = logging.getLogger(__name__)

#: The last words of the child's standard error kept for the log when a job ends badly.
STDERR_TAIL_BYTES = 4096
#: Longest protocol line kept; the child's lines are short JSON objects.
MAX_LINE_BYTES = 1024 * 1024


@dataclass(frozen=True)
class JobLimits:
    """How long and how much memory one confined job may take.

    ``check_seconds`` bounds opening and validating the file, ``analysis_seconds`` the
    measuring that follows; ``memory_mb`` is the address space the child may add to its own
    start-up size and twice the size of the file it maps (``None``: no limit of that kind).
    """

    check_seconds: float | None = 60.0
    analysis_seconds: float | None = 1800.0
    memory_mb: int | None = 4096


@dataclass(frozen=True)
class Job:
    """What the child does: open ``target`` with ``read_limits``; with ``archive`` also analyse
    it and save the findings there. ``source_file``/``source_sha256`` name a file already
    hashed (the workspace's); the other fields are the command line's analysis options."""

    target: str
    archive: str | None = None
    read_limits: ReadLimits | None = None
    source_file: str | None = None
    source_sha256: str | None = None
    overrides: tuple[str, ...] = ()
    config: str | None = None
    activations: tuple[str, ...] = ()
    workers: int | None = None
    scheduler: str | None = None
    digest: bool = True
    probe: str | None = None
    synthetic_probe: int | None = None

    def to_json(self, memory_mb: int | None) -> str:
        data = dataclasses.asdict(self)
        data["read_limits"] = (None if self.read_limits is None
                               else dataclasses.asdict(self.read_limits))
        data["memory_bytes"] = None if memory_mb is None else int(memory_mb) * 1024**2
        data["parent"] = os.getpid()
        return json.dumps(data)


@dataclass(frozen=True)
class Outcome:
    """How a confined job ended: ``state`` is ``done`` or the kind of failure, ``message`` its
    one sentence; ``checked`` holds the file's format, layer count and samples once known."""

    state: str
    message: str = ""
    checked: dict | None = None
    returncode: int | None = None

    @property
    def ok(self) -> bool:
        return self.state == "done"


def _signal_name(number: int) -> str:
    try:
        return f"signal {number} ({signal.Signals(number).name})"
    except ValueError:
        return f"signal {number}"


def child_environment() -> dict[str, str]:
    """The parent's environment, with this actdoc importable and one BLAS thread."""
    env = dict(os.environ)
    package_root = str(Path(actdoc.__file__).resolve().parent.parent)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (package_root, env.get("PYTHONPATH")) if p)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.setdefault("OMP_NUM_THREADS", "1")
    env.setdefault("MALLOC_ARENA_MAX", "2")  # fewer 64 MB malloc reservations under RLIMIT_AS
    return env


def _kill(process: subprocess.Popen) -> None:
    """Kill the child and anything it started (it leads its own session)."""
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
    process.wait()


def run(job: Job, limits: JobLimits, name: str, *,
        on_checked: Callable[[dict], None] | None = None,
        on_progress: Callable[[float], None] | None = None,
        on_start: Callable[[subprocess.Popen], None] | None = None,
        log_failures: bool = True) -> Outcome:
    """Run ``job`` in a child process under ``limits``; ``name`` is the file's name for the
    sentences. Blocks until the child ends or is killed; the calling process never runs the
    readers, so it keeps answering whatever the file does. With ``log_failures`` a job that
    ends badly is logged with the tail of the child's standard error (for a server's log)."""
    with tempfile.TemporaryFile() as err:
        process = subprocess.Popen(
            [sys.executable, "-m", "actdoc.confine"], stdin=subprocess.PIPE,
            stdout=subprocess.PIPE, stderr=err, env=child_environment(),
            start_new_session=True, close_fds=True)
        try:
            if on_start is not None:
                on_start(process)
            outcome = _watch(process, job, limits, name, on_checked, on_progress)
        finally:
            if process.poll() is None:
                _kill(process)
            process.stdout.close()
            if process.stdin and not process.stdin.closed:
                process.stdin.close()
        if log_failures and not outcome.ok:
            err.seek(max(0, err.seek(0, os.SEEK_END) - STDERR_TAIL_BYTES))
            # The child's words may quote the file (names, attributes): shown escaped.
            tail = visible_lines(err.read().decode("utf-8", "replace").strip())
            log.warning("confined job on %s ended %s: %s%s", visible(name), outcome.state,
                        visible(outcome.message),
                        f"\nchild's stderr (tail):\n{tail}" if tail else "")
    return outcome


def _watch(process: subprocess.Popen, job: Job, limits: JobLimits, name: str,
           on_checked, on_progress) -> Outcome:
    try:
        process.stdin.write(job.to_json(limits.memory_mb).encode("utf-8"))
        process.stdin.close()
    except BrokenPipeError:  # the child died at once; its exit status tells below
        pass
    analysing = job.archive is not None
    phase, checked, verdict = "check", None, None
    started = time.monotonic()
    deadline = started + (limits.check_seconds if limits.check_seconds is not None else math.inf)
    pending = b""
    selector = selectors.DefaultSelector()
    selector.register(process.stdout, selectors.EVENT_READ)
    try:
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                _kill(process)
                return _timeout(name, phase, limits, checked)
            if not selector.select(min(left, 1.0)):
                continue
            chunk = os.read(process.stdout.fileno(), 65536)
            if not chunk:
                break
            pending += chunk
            *lines, pending = pending.split(b"\n")
            pending = pending[-MAX_LINE_BYTES:]  # only a runaway line is this long
            for line in lines:
                event = _parse(line)
                kind = event.get("event")
                if kind == "checked" and phase == "check":
                    checked = {key: event.get(key) for key in ("format", "layers", "samples")}
                    phase = "analyse"
                    if analysing:
                        budget = limits.analysis_seconds
                        deadline = time.monotonic() + (budget if budget is not None
                                                       else math.inf)
                    if on_checked is not None:
                        on_checked(checked)
                elif kind == "progress" and on_progress is not None:
                    value = event.get("fraction")
                    if isinstance(value, (int, float)) and math.isfinite(value):
                        on_progress(min(1.0, max(0.0, float(value))))
                elif kind in ("done", "refused", "memory", "internal"):
                    verdict = event
    finally:
        selector.close()
    try:
        returncode = process.wait(timeout=10)
    except subprocess.TimeoutExpired:
        _kill(process)
        returncode = process.returncode
    return _conclude(name, phase, verdict, checked, returncode, limits)


def _parse(line: bytes) -> dict:
    try:
        event = json.loads(line)
    except ValueError:
        return {}
    return event if isinstance(event, dict) else {}


def _doing(phase: str) -> str:
    return "check" if phase == "check" else "analyse"


def _timeout(name: str, phase: str, limits: JobLimits, checked) -> Outcome:
    if phase == "check":
        message = (f"{name}: took longer than {limits.check_seconds:g} s to check; "
                   f"it may be malformed")
    else:
        message = (f"{name}: took longer than {limits.analysis_seconds:g} s to analyse, "
                   f"the time allowed for one analysis")
    return Outcome("timeout", message, checked)


def _conclude(name: str, phase: str, verdict: dict | None, checked, returncode: int,
              limits: JobLimits) -> Outcome:
    kind = verdict.get("event") if verdict else None
    if kind == "done" and returncode == 0:
        return Outcome("done", "", checked, returncode)
    if kind == "refused":
        message = str(verdict.get("message") or f"{name}: the readers refused the file")
        return Outcome("refused", message, checked, returncode)
    if kind == "memory":
        return Outcome("memory", f"{name}: needed more than {limits.memory_mb} MB to "
                                 f"{_doing(phase)}; it may be malformed", checked, returncode)
    if kind == "internal":
        detail = f"{verdict.get('type', 'Error')}: {verdict.get('message', '')}"
        return Outcome("internal", f"{name}: the analysis stopped on an internal error "
                                   f"({detail})", checked, returncode)
    how = _signal_name(-returncode) if returncode < 0 else f"exit status {returncode}"
    return Outcome("crashed", f"{name}: the process that had to {_doing(phase)} it stopped "
                              f"without an answer ({how}); it may be malformed",
                   checked, returncode)


def analyse_in_child(job: Job, limits: JobLimits, name: str,
                     progress: Callable[[float], None] | None = None):
    """The command line's confined analysis: the Findings, or ActdocError with the sentence."""
    from actdoc.errors import ActdocError
    from actdoc.reports import load_findings

    folder = Path(tempfile.mkdtemp(prefix="actdoc-findings-"))
    try:
        outcome = run(dataclasses.replace(job, archive=str(folder)), limits, name,
                      on_progress=progress, log_failures=False)
        if not outcome.ok:
            raise ActdocError(outcome.message)
        return load_findings(folder)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
