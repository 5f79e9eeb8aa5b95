"""Run one command as a whole process and measure its wall time and peak memory.

Two memory figures are kept because a process may start helpers of its own:

* ``peak_rss_mb``: the kernel's high-water mark of resident memory, from ``os.wait4``'s rusage.
  Linux folds reaped children into it as a maximum, so it is the largest single process. The
  kernel also carries the high-water mark of the process that forked the child across ``exec``,
  so the command is started by a small launcher process (this file run as a script) rather
  than by the benchmark, whose own memory would otherwise be counted.
* ``tree_rss_mb``: the largest sum of resident memory over the process and all its descendants,
  sampled from ``/proc`` every few milliseconds (it can miss a peak shorter than the interval).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

SAMPLE_INTERVAL_S = 0.02


@dataclass(frozen=True)
class ProcessRun:
    """What one child process cost and what it printed."""

    label: str
    wall_s: float
    cpu_s: float
    peak_rss_mb: float
    tree_rss_mb: float
    returncode: int
    stdout: str
    stderr: str


def _children(pid: int) -> list[int]:
    """Direct children of ``pid``, from /proc/<pid>/task/*/children."""
    found: list[int] = []
    tasks = Path(f"/proc/{pid}/task")
    try:
        for task in tasks.iterdir():
            text = (task / "children").read_text()
            found.extend(int(part) for part in text.split())
    except OSError:
        pass
    return found


def _rss_kb(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def tree_rss_kb(root: int) -> int:
    """Resident memory of ``root`` and every descendant, in KiB."""
    total, pending, seen = 0, [root], set()
    while pending:
        pid = pending.pop()
        if pid in seen:
            continue
        seen.add(pid)
        total += _rss_kb(pid)
        pending.extend(_children(pid))
    return total


def run_measured(
    label: str,
    command: Sequence[str],
    env: dict[str, str] | None = None,
    timeout_s: float = 3600.0,
) -> ProcessRun:
    """Run ``command`` through the launcher and sample its process tree meanwhile."""
    with tempfile.TemporaryDirectory(prefix="actdoc-measure-") as folder:
        report = Path(folder) / "usage.json"
        launcher = [sys.executable, "-S", __file__, str(report), str(timeout_s), *command]
        child = subprocess.Popen(launcher, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                 env=env, text=True)
        peak_tree = [0]
        done = threading.Event()

        def sample() -> None:
            while not done.is_set():
                peak_tree[0] = max(peak_tree[0], tree_rss_kb(child.pid) - _rss_kb(child.pid))
                done.wait(SAMPLE_INTERVAL_S)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        stdout, stderr = child.communicate()
        done.set()
        sampler.join()
        usage = json.loads(report.read_text()) if report.exists() else {
            "wall_s": float("nan"), "cpu_s": float("nan"), "maxrss_kb": 0,
            "returncode": child.returncode}
    return ProcessRun(
        label=label,
        wall_s=usage["wall_s"],
        cpu_s=usage["cpu_s"],
        peak_rss_mb=usage["maxrss_kb"] / 1024.0,
        tree_rss_mb=max(peak_tree[0], usage["maxrss_kb"]) / 1024.0,
        returncode=usage["returncode"],
        stdout=stdout,
        stderr=stderr,
    )


def launch(report: Path, timeout_s: float, command: Sequence[str]) -> int:
    """Run ``command`` with inherited pipes, wait for it with ``os.wait4``, write the usage."""
    started = time.perf_counter()
    child = subprocess.Popen(list(command))
    deadline = started + timeout_s
    while True:
        pid, status, usage = os.wait4(child.pid, os.WNOHANG)
        if pid:
            break
        if time.perf_counter() > deadline:
            child.kill()
            pid, status, usage = os.wait4(child.pid, 0)
            break
        time.sleep(0.002)
    wall = time.perf_counter() - started
    code = os.waitstatus_to_exitcode(status)
    # ru_maxrss is in KiB on Linux.
    report.write_text(json.dumps({"wall_s": wall, "cpu_s": usage.ru_utime + usage.ru_stime,
                                  "maxrss_kb": usage.ru_maxrss, "returncode": code}))
    return code


if __name__ == "__main__":
    sys.exit(launch(Path(sys.argv[1]), float(sys.argv[2]), sys.argv[3:]))
