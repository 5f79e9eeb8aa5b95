"""``analyze``: one pass over every layer, then the registered checks, then the Findings.

Each layer's arrays are read once (``accumulate_layer``); everything after that works on the
small per-unit statistics (``actdoc.analysis.verdicts`` runs the registered checks on them).
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace
from pathlib import Path
from typing import Callable

import numpy as np

from actdoc.analysis import kernel, verdicts
from actdoc.analysis.accumulate import block_rows
from actdoc.analysis.defaults import Settings
from actdoc.analysis.stats import LayerStats, accumulate_layer
from actdoc.digest import BackgroundDigest, file_sha256
from actdoc.model import Dump, Findings, Layer, SourceInfo


def source_info(dump: Dump, digest: bool = True) -> SourceInfo:
    """File name, SHA-256 of the file's bytes where it exists and ``digest`` asks for it (else
    ""), format, samples."""
    path = Path(dump.path)
    digest = file_sha256(path) if digest and path.is_file() else ""
    return SourceInfo(file=path.name, sha256=digest, format=dump.format, samples=dump.samples)


#: Stored activation bytes per task: layers larger than this are cut into sample ranges so the
#: worker threads share even one big layer; small enough to balance, large enough that the
#: per-task overhead (buffers, a merge) is negligible.
TASK_BYTES = 96 << 20
#: Worker threads never exceed this: each holds its own blocks (16 MiB of each stored array
#: where blocks are read into buffers, about one chunk of each where chunks are measured in
#: place), so the peak grows with the workers (docs/scale.md has the measured peaks).
MAX_WORKERS = 3


def available_cores() -> int:
    """Cores this process may run on (the affinity mask where the OS has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # no affinity masks on this OS
        return max(1, os.cpu_count() or 1)


def activation_bytes(dump: Dump) -> int:
    """Stored bytes of every layer's preact and output arrays."""
    return sum(np.dtype(shape.dtype).itemsize * int(np.prod(shape.shape))
               for layer in dump.layers for name, shape in layer.info.arrays.items()
               if name in ("preact", "output"))


def _random_access(layer: Layer) -> bool:
    """Whether every activation source can start reading at any sample (a compressed NPZ
    member cannot: it would decompress everything before the range again)."""
    return not any(getattr(source, "sequential_only", False) for source in layer.sources.values())


def _tasks(dump: Dump, settings: Settings) -> list[tuple[int, int, int, int]]:
    """(layer index, first sample, stop sample, work) pieces, biggest layers' pieces first.

    Range boundaries fall on whole blocks (``block_rows``) so every block is full.
    """
    tasks = []
    for index, layer in enumerate(dump.layers):
        info = layer.info
        stored = [info.arrays[a] for a in ("preact", "output") if info.has(a)]
        if not stored or info.samples == 0:
            continue
        row_bytes = sum(np.dtype(a.dtype).itemsize * int(np.prod(a.shape[1:])) for a in stored)
        block = max(1, block_rows(info, settings) // max(1, info.positions))
        pieces = 1
        if _random_access(layer):
            pieces = max(1, min(-(-info.samples * row_bytes // TASK_BYTES),
                                -(-info.samples // block)))
        per_piece = -(-info.samples // pieces)
        step = -(-per_piece // block) * block
        for first in range(0, info.samples, step):
            stop = min(info.samples, first + step)
            tasks.append((index, first, stop, (stop - first) * info.positions * info.units))
    return sorted(tasks, key=lambda task: -task[3])


def _measure_all(dump: Dump, settings: Settings, progress: Callable[[float], None] | None,
                 workers: int | None = None) -> list[LayerStats | None]:
    """Per-layer statistics (None for layers without activations), reporting progress.

    Layers (and sample ranges of big layers) are measured by worker threads: numpy releases
    the GIL in its loops and h5py serialises its own calls, so reading and computing overlap
    on every core while memory stays that of one process. Each layer's pieces are merged in
    sample order, so the result does not depend on which thread finished first.
    """
    tasks = _tasks(dump, settings)
    total = max(1, sum(task[3] for task in tasks))
    done = 0
    lock = threading.Lock()

    def run(task: tuple[int, int, int, int]) -> LayerStats:
        index, first, stop, _ = task
        layer = dump.layers[index]

        def advance(rows: int) -> None:
            nonlocal done
            with lock:
                done += rows * max(1, layer.info.units)
                if progress is not None:
                    progress(min(1.0, done / total) * 0.99)

        return accumulate_layer(layer, settings, first, stop, progress=advance)

    count = min(workers or min(MAX_WORKERS, available_cores()), max(1, len(tasks)))
    merger = InOrderMerge(tasks)
    if count <= 1:
        for task in tasks:
            merger.add(task, run(task))
    else:
        with ThreadPoolExecutor(max_workers=count, thread_name_prefix="actdoc-measure") as pool:
            for task, stats in zip(tasks, pool.map(run, tasks)):
                merger.add(task, stats)
    return [merger.merged.get(index) for index in range(len(dump.layers))]


class InOrderMerge:
    """Each layer's pieces merged in sample order as they arrive: the same left fold as merging
    them all at the end (so the same bits whichever thread finishes first), without holding
    every piece's statistics until the last one is done (about 1 MB a piece with 8192 units,
    dozens of pieces on a 4 GB dump)."""

    def __init__(self, tasks: list[tuple[int, int, int, int]]):
        self._next: dict[int, list[int]] = {}
        for index, first, _stop, _work in sorted(tasks, key=lambda task: task[:2]):
            self._next.setdefault(index, []).append(first)
        self._waiting: dict[int, dict[int, LayerStats]] = {}
        self.merged: dict[int, LayerStats] = {}

    def add(self, task: tuple[int, int, int, int], stats: LayerStats) -> None:
        index, first = task[0], task[1]
        waiting = self._waiting.setdefault(index, {})
        waiting[first] = stats
        queue = self._next[index]
        while queue and queue[0] in waiting:
            piece = waiting.pop(queue.pop(0))
            known = self.merged.get(index)
            self.merged[index] = piece if known is None else known.merge(piece)


def analyze(dump: Dump, settings: Settings | None = None,
            progress: Callable[[float], None] | None = None,
            source: SourceInfo | None = None, workers: int | None = None,
            digest: bool = True) -> Findings:
    """Measure every layer of ``dump``, run every registered check, and return the Findings.

    ``workers`` is the number of measuring threads (default: the available cores, at most
    MAX_WORKERS; 1 measures in the calling thread). With ``digest=False`` the file is not
    hashed and ``source.sha256`` is "": for outputs that never show it (hashing costs about as
    much CPU as reading the dump).
    """
    settings = settings or Settings()
    if progress is not None:
        progress(0.0)
    if kernel.worth_loading(activation_bytes(dump)):
        kernel.start_loading()  # loads beside the pass; numpy measures until it is ready
    hashing = None
    if source is None:
        source = source_info(dump, digest=False)
        if digest and Path(dump.path).is_file():  # hashed beside the pass (hashlib frees the GIL)
            hashing = BackgroundDigest(dump.path)
    measured = _measure_all(dump, settings, progress, workers)
    if hashing is not None:
        source = replace(source, sha256=hashing.result())
    findings = findings_from_stats(dump, measured, settings, source)
    if progress is not None:
        progress(1.0)
    return findings


def findings_from_stats(dump: Dump, measured: list[LayerStats | None], settings: Settings,
                        source: SourceInfo | None = None) -> Findings:
    """Findings from per-layer statistics already measured (one entry per layer of ``dump``,
    None for a layer without activations), e.g. merged from shards or workers."""
    return verdicts.findings_from_stats(dump, measured, settings, source or source_info(dump))
