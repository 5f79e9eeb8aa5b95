"""Running one reader case where a hang, a crash or a memory blow-up cannot hurt the caller.

A ``CaseRunner`` starts one worker process (``python -m tests.support.fuzzing``) that imports
actdoc once and forks a fresh child for every case, so a case costs a fork rather than an
interpreter start. The child sets an address-space limit (``resource.setrlimit(RLIMIT_AS)``,
Python's resource module docs) and an alarm whose default action, SIGALRM, ends the process even
inside a C loop that holds the GIL; ``faulthandler`` writes the Python stack shortly before, so a
hang can be placed (inside h5py or not). The worker is single-threaded, so forking it is safe.

A case opens the dump with ``actdoc.io.open_dump`` and reads every array the way the analysis
does (``Layer.paired_blocks`` front to back, ``Layer.unit_values`` of the first and last unit,
the weight, the bias, a few probe rows), or with mode "analyze" runs the whole analysis. Outcomes:

- ``ok``: read through; ``refused``: an ``actdoc.errors`` exception (the one-sentence error);
- ``crash``: any other exception, or death by a signal other than the alarm;
- ``hang``: the alarm fired (``where`` is "hdf5" when the innermost Python frame is in h5py);
- ``memory``: MemoryError, i.e. the case tried to allocate past the address-space limit.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import subprocess
import sys
import tempfile
import traceback
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
#: Address space a case may add to what the worker already maps, in bytes.
DEFAULT_MEMORY = 1536 * 1024**2


def exercise(path: str, limits_name: str, mode: str) -> None:
    """Open the dump and read it as the analysis would (or run the analysis)."""
    from actdoc.io import ReadLimits, open_dump

    limits = ReadLimits.for_uploads() if limits_name == "uploads" else ReadLimits()
    with open_dump(path, limits=limits) as dump:
        if mode == "analyze":
            from actdoc.analysis import analyze

            analyze(dump, digest=False, workers=1)
            return
        for layer in dump.layers:
            for _ in layer.paired_blocks(4096):
                pass
            for array in ("preact", "output"):
                if layer.info.has(array):
                    layer.unit_values(array, 0)
                    layer.unit_values(array, layer.info.units - 1)
            layer.weight()
            layer.bias()
        if dump.probe_input is not None:
            dump.probe_input.read_samples(0, 16)


def _address_space() -> int:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[0]) * resource.getpagesize()


def run_in_child(path: str, limits_name: str, mode: str, timeout: float, memory: int) -> dict:
    """Fork, run one case under the limits, and classify how it ended."""
    trace = tempfile.TemporaryFile(mode="w+")
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: never returns
        os.close(read_end)
        try:
            import faulthandler

            limit = _address_space() + memory
            resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
            faulthandler.dump_traceback_later(max(0.2, timeout - 0.5), file=trace)
            signal.alarm(max(1, int(round(timeout))))
            try:
                exercise(path, limits_name, mode)
                result = {"outcome": "ok"}
            except MemoryError:
                result = {"outcome": "memory", "trace": traceback.format_exc()[-3000:]}
            except Exception as exc:
                from actdoc.errors import ActdocError

                if isinstance(exc, ActdocError):
                    result = {"outcome": "refused", "error": type(exc).__name__,
                              "message": str(exc)}
                else:
                    result = {"outcome": "crash", "error": type(exc).__name__,
                              "message": str(exc)[:500], "trace": traceback.format_exc()[-3000:]}
            os.write(write_end, json.dumps(result).encode())
        finally:
            os._exit(0)
    os.close(write_end)
    chunks = []
    while True:
        chunk = os.read(read_end, 65536)
        if not chunk:
            break
        chunks.append(chunk)
    os.close(read_end)
    _, status, usage = os.wait4(pid, 0)
    peak = usage.ru_maxrss * 1024
    if chunks:
        result = json.loads(b"".join(chunks))
    elif os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGALRM:
        trace.seek(0)
        stack = trace.read()
        frames = [line for line in stack.splitlines() if line.strip().startswith("File")]
        inner = frames[0] if frames else ""
        result = {"outcome": "hang", "where": "hdf5" if "/h5py/" in inner else "python",
                  "trace": stack[-3000:]}
    elif os.WIFSIGNALED(status):
        result = {"outcome": "crash", "error": f"signal {os.WTERMSIG(status)}", "message": ""}
    else:
        result = {"outcome": "crash", "error": f"exit {os.WEXITSTATUS(status)}", "message": ""}
    trace.close()
    result["peak_rss"] = peak
    return result


def serve() -> None:
    """The worker loop: one JSON request per line on stdin, one JSON answer per line."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    import actdoc.analysis  # noqa: F401  imported once, before any fork
    import actdoc.io  # noqa: F401

    for line in sys.stdin:
        request = json.loads(line)
        answer = run_in_child(request["path"], request.get("limits", "default"),
                              request.get("mode", "read"), float(request.get("timeout", 10)),
                              int(request.get("memory", DEFAULT_MEMORY)))
        sys.stdout.write(json.dumps(answer) + "\n")
        sys.stdout.flush()


class CaseRunner:
    """A worker process answering cases; use as a context manager."""

    def __init__(self) -> None:
        env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1")
        self._proc = subprocess.Popen([sys.executable, "-m", "tests.support.fuzzing"],
                                      stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                                      cwd=ROOT, env=env)

    def run(self, path: Path, *, limits: str = "default", mode: str = "read",
            timeout: float = 10, memory: int = DEFAULT_MEMORY) -> dict:
        request = {"path": str(path), "limits": limits, "mode": mode, "timeout": timeout,
                   "memory": memory}
        self._proc.stdin.write(json.dumps(request) + "\n")
        self._proc.stdin.flush()
        line = self._proc.stdout.readline()
        if not line:
            raise RuntimeError("the fuzz worker died")
        return json.loads(line)

    def close(self) -> None:
        if self._proc.poll() is None:
            self._proc.stdin.close()
            try:
                self._proc.wait(10)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait()

    def __enter__(self) -> "CaseRunner":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


if __name__ == "__main__":
    serve()
