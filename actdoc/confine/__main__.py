"""The confined child: ``python -m actdoc.confine`` reads one job (JSON) on standard input, limits
its own memory, opens and checks the file, analyses it, saves the findings archive, and reports
each step as one JSON line on standard output (see actdoc/confine/__init__.py)."""

from __future__ import annotations

import json
import os
import signal
import sys
from pathlib import Path

#: Linux prctl option: the signal this process gets when the thread that started it ends.
PR_SET_PDEATHSIG = 1


def _protocol_channel():
    """Keep the real standard output for the JSON lines; anything else printed (by a library,
    in C or Python) goes to standard error, so it cannot garble the protocol."""
    channel = os.fdopen(os.dup(1), "w", buffering=1, encoding="utf-8")
    os.dup2(2, 1)
    sys.stdout = sys.stderr
    return channel


def die_with_parent(parent: int | None) -> None:
    """On Linux, be killed when the server that started this process dies, so a killed server
    leaves no child behind working on a file (elsewhere the parent's own kill must do)."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    except (OSError, AttributeError):
        return
    if parent is not None and os.getppid() != parent:  # it died before prctl took effect
        os._exit(1)


def vm_size_bytes() -> int:
    """This process's address space now (Linux ``VmSize``), 0 where /proc does not tell."""
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def limit_memory(budget: int | None, target: str) -> None:
    """Cap the address space: what is mapped now, plus twice the file (read through a map, and
    mapped again to hash it), plus ``budget`` bytes. Past it, allocations fail (MemoryError)
    instead of taking the machine."""
    if budget is None:
        return
    import resource

    try:
        file_bytes = Path(target).stat().st_size if Path(target).is_file() else 0
    except OSError:
        file_bytes = 0
    limit = vm_size_bytes() + 2 * file_bytes + int(budget)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))


def run(job: dict, emit) -> None:
    """Do the job as ``actdoc analyze`` would (``cluster.analyze_target``), with the job's read
    limits: a single file is opened with them and, when it holds weights only and a
    ``/probe/input`` its dense chain starts from (or a probe is given), analysed over the forward
    pass, so an upload gets the findings the command line gives for the same file."""
    from actdoc.analysis import analyze
    from actdoc.analysis.defaults import load_settings
    from actdoc.cluster import analyze_target, is_sharded
    from actdoc.forward import with_forward_pass
    from actdoc.io import ReadLimits, open_dump
    from actdoc.model import SourceInfo
    from actdoc.reports import save_findings

    limit_memory(job.get("memory_bytes"), job["target"])
    target = job["target"]
    limits = ReadLimits(**job["read_limits"]) if job.get("read_limits") else None
    settings = load_settings(job.get("config"), list(job.get("overrides") or ()))
    last = [0.0]

    def progress(fraction: float) -> None:
        if fraction - last[0] >= 0.01 or fraction >= 1.0:
            last[0] = fraction
            emit(event="progress", fraction=float(fraction))

    # A stored upload (it has its digest) is one file whatever its name looks like.
    shards = not job.get("source_sha256") and (job.get("scheduler") or is_sharded(target))
    if shards:
        emit(event="checked", format="shards", layers=None, samples=None)
        findings = analyze_target(target, settings, scheduler=job.get("scheduler"),
                                  progress=progress, activations=job.get("activations") or (),
                                  workers=job.get("workers"), digest=bool(job.get("digest")),
                                  probe=job.get("probe"),
                                  synthetic_probe=job.get("synthetic_probe"), limits=limits)
    else:
        with open_dump(target, activations=job.get("activations") or (),
                       limits=limits) as opened:
            dump = with_forward_pass(opened, job.get("probe"), job.get("synthetic_probe"))
            try:
                emit(event="checked", format=dump.format, layers=len(dump.layers),
                     samples=dump.samples)
                if not job.get("archive"):
                    emit(event="done")
                    return
                source = None
                if job.get("source_sha256"):
                    source = SourceInfo(file=job.get("source_file") or Path(target).name,
                                        sha256=job["source_sha256"], format=dump.format,
                                        samples=dump.samples)
                findings = analyze(dump, settings, progress=progress, source=source,
                                   workers=job.get("workers"), digest=bool(job.get("digest")))
            finally:
                if dump is not opened:
                    dump.close()
    save_findings(findings, job["archive"])
    emit(event="done")


def main() -> int:
    channel = _protocol_channel()

    def emit(**event) -> None:
        channel.write(json.dumps(event) + "\n")
        channel.flush()

    job = json.loads(sys.stdin.read())
    die_with_parent(job.get("parent"))
    # Imported before the memory limit is set, so the limit bounds the file's work only.
    import numpy  # noqa: F401
    import h5py  # noqa: F401

    from actdoc.analysis.checks import all_checks
    from actdoc.errors import ActdocError

    all_checks()
    try:
        run(job, emit)
    except ActdocError as error:
        emit(event="refused", message=error.message)
    except MemoryError:
        emit(event="memory")
    except Exception as error:  # a bug, not the file: the parent words it
        emit(event="internal", type=type(error).__name__, message=str(error)[:300])
    return 0


if __name__ == "__main__":
    sys.exit(main())
