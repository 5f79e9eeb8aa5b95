"""One fused pass over a clean slice, compiled with numba where it is installed.

numpy makes a pass over memory per operation: about thirteen per value for the statistics of a
slice (extremes, counts, power sums), about 2 ns per value in a full pass on the project's
machine (slices of 2 MiB stay in the cache). The kernel does them all in one vectorised pass
(about 1 ns per value) and releases the GIL, so measuring threads run side by side. It gives
bit for bit the numpy path's results: the same float32 or float64 arithmetic in the same order
(numpy reduces a C-ordered block along its rows one row after the other, and so does the
kernel), so which path measured a slice never shows in the findings (tested). Slices holding a
non-finite value or not C-ordered, and kinds whose gain is summed value by value, stay with
numpy.

numba is an optional dependency (``pip install 'actdoc[fast]'``). It is imported and the kernel
loaded in a background thread (``start_loading``) when an analysis of more than
``LOAD_ABOVE_BYTES`` starts: about 0.6 s of CPU and 125 MB of memory once per process (from
numba's cache; the very first run compiles for a few seconds), during which the numpy path
measures. ``ACTDOC_KERNEL=numba`` loads it for any size, ``ACTDOC_KERNEL=numpy`` never; where
numba is missing or fails to load, numpy simply stays.
"""

from __future__ import annotations

import os
import threading

import numpy as np

#: Comparison codes of the counting tests (``Count.op`` in accumulate.py).
GREATER, LESS, NEAR = 0, 1, 2
#: Activation bytes from which an analysis loads the kernel by itself. Measured on this
#: project's 2-core machine: the numpy path takes about 2 ns per value in a full pass and the
#: kernel about 1, so loading it (0.6 CPU-s, 125 MB) only pays for itself past about 2.5 GB of
#: float32, and it would take the peak memory of a 2-4 GB analysis from about 135 MB to
#: about 260 MB. ``ACTDOC_KERNEL=numba`` loads it whatever the size.
LOAD_ABOVE_BYTES = 8 * 10**9

_lock = threading.Lock()
_loader: threading.Thread | None = None
_fused = None
_failed: str | None = None


def _choice() -> str:
    return os.environ.get("ACTDOC_KERNEL", "").strip().lower()


def wanted() -> bool:
    """Whether the compiled path may be used (``ACTDOC_KERNEL=numpy`` turns it off)."""
    return _choice() != "numpy"


def worth_loading(activation_bytes: int) -> bool:
    """Whether an analysis of this many activation bytes should load the kernel."""
    return _choice() == "numba" or (wanted() and activation_bytes >= LOAD_ABOVE_BYTES)


#: Address-space limit (RLIMIT_AS) below which the kernel is not loaded: LLVM's compiler
#: takes about 125 MB of resident memory and more address space (measured on this project's
#: machines), better left to the blocks in a process held that tight.
MIN_ADDRESS_SPACE = 2 << 30


def _room() -> bool:
    try:
        import resource
        soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    except (ImportError, ValueError, OSError):  # no such limit on this OS
        return True
    return soft == resource.RLIM_INFINITY or soft >= MIN_ADDRESS_SPACE


def start_loading() -> None:
    """Import numba and load the kernel in a daemon thread, once per process (not under a
    tight address-space limit)."""
    global _loader
    if not wanted() or not _room():
        return
    with _lock:
        if _loader is None:
            _loader = threading.Thread(target=_load, name="actdoc-kernel-load", daemon=True)
            _loader.start()


def wait(timeout: float | None = None) -> bool:
    """Wait for the kernel (starting the load if needed); whether it is usable."""
    start_loading()
    if _loader is not None:
        _loader.join(timeout)
    return _fused is not None


def loaded():
    """The compiled function if it has finished loading, else None (never waits)."""
    return _fused


def readonly(values: np.ndarray) -> np.ndarray:
    """A read-only view, the one kind of array the kernel is compiled for."""
    view = values.view()
    view.flags.writeable = False
    return view


def failure() -> str | None:
    """Why the kernel could not be loaded, or None."""
    return _failed


def _load() -> None:
    global _fused, _failed
    try:
        _fused = _compile()
    except Exception as exc:  # numba missing, or a platform it cannot compile for
        _failed = f"{type(exc).__name__}: {exc}"


def _compile():
    import numba

    def values(dtype):  # C-ordered read-only slices: with a known layout the loops vectorise
        return numba.types.Array(dtype, 2, "C", readonly=True)

    signatures = []
    for y_type in (numba.float32, numba.float64):
        for z_type in (numba.float32, numba.float64):
            signatures.append(numba.boolean(
                values(y_type), values(z_type), numba.boolean, numba.boolean, numba.float64[::1],
                numba.int64[::1], numba.int64[::1], y_type[::1], z_type[::1],
                numba.float64[::1], numba.float64[:, ::1], numba.int64[:, ::1]))

    @numba.njit(signatures, cache=True, nogil=True, fastmath=False, error_model="numpy")
    def fused(y, z, has_z, need_shift, shift, sources, ops, edges_y, edges_z, limits,
              acc, counts):
        """Statistics of one slice into ``acc`` (rows: minimum, maximum, a non-finite marker,
        sum of |y|, then the sums of (y - shift)^p for p = 1..4, per unit) and ``counts``
        (one row per test); False (outputs meaningless) when a value of y or (with
        ``has_z``) z is not finite.

        Test k counts, per unit, the rows where its source (0: y, 1: z) is above (GREATER) or
        below (LESS) ``edges[k]``, compared in the source's dtype as numpy compares with a
        Python float; or (NEAR) where |source - edges[k]|, computed in the source's dtype, is
        at most ``limits[k]`` in float64. ``shift`` is taken as given, or (``need_shift``) set
        to the slice's column means first. Every loop writes one array and runs along a row,
        so it is vectorised, and each per-unit sum is taken row after row as numpy's reduction
        along the rows takes it.
        """
        rows, width = y.shape
        low, high, bad, absolute = acc[0], acc[1], acc[2], acc[3]
        s1, s2, s3, s4 = acc[4], acc[5], acc[6], acc[7]
        for j in range(width):
            low[j] = np.inf
            high[j] = -np.inf
        acc[2:] = 0.0
        if need_shift:
            shift[:] = 0.0
            for i in range(rows):
                row = y[i]
                for j in range(width):
                    shift[j] += np.float64(row[j])
            for j in range(width):
                shift[j] = shift[j] / rows
        for i in range(rows):
            row = y[i]
            for j in range(width):
                x = np.float64(row[j])
                low[j] = min(low[j], x)
                high[j] = max(high[j], x)
                bad[j] += x * 0.0
                absolute[j] += abs(x)
                x = x - shift[j]
                x2 = x * x
                s1[j] += x
                s2[j] += x2
                s3[j] += x * x2
                s4[j] += x2 * x2
        if has_z:
            for i in range(rows):
                row_z = z[i]
                for j in range(width):
                    bad[j] += np.float64(row_z[j]) * 0.0
        for j in range(width):
            if bad[j] != 0.0:
                return False
        for k in range(sources.size):
            tally = counts[k]
            tally[:] = 0
            op = ops[k]
            limit = limits[k]
            if sources[k] == 0:
                edge_y = edges_y[k]
                for i in range(rows):
                    row = y[i]
                    if op == 0:
                        for j in range(width):
                            tally[j] += row[j] > edge_y
                    elif op == 1:
                        for j in range(width):
                            tally[j] += row[j] < edge_y
                    else:
                        for j in range(width):
                            tally[j] += np.float64(abs(row[j] - edge_y)) <= limit
            else:
                edge_z = edges_z[k]
                for i in range(rows):
                    row_z = z[i]
                    if op == 0:
                        for j in range(width):
                            tally[j] += row_z[j] > edge_z
                    elif op == 1:
                        for j in range(width):
                            tally[j] += row_z[j] < edge_z
                    else:
                        for j in range(width):
                            tally[j] += np.float64(abs(row_z[j] - edge_z)) <= limit
        return True

    return fused
