"""Analyse a sharded dump on a dask.distributed cluster.

This module sits on top of the core, beside the command line: it opens dumps (``actdoc.io``)
and measures them (``actdoc.analysis``), which the engine itself never does.

Each task opens one shard by path on a worker, passes over one layer and sends back that
layer's ``LayerStats`` (per-unit counts, moments, extremes and fixed-edge histograms: a few
kilobytes per thousand units). The client merges them per layer in shard order and turns the
merged statistics into findings with the same code as the local engine, so a sharded dump gives
the findings of the one file its shards would make if concatenated.

Every worker must reach the shard files at the same path as the client (a shared or replicated
filesystem): only paths travel to the workers and only statistics travel back. Dask is an
optional dependency (``pip install 'actdoc[dask]'``); it is imported when this module is used.
"""

from __future__ import annotations

import hashlib
import os
from contextlib import contextmanager
from functools import reduce
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

from actdoc.analysis.defaults import Settings
from actdoc.analysis.engine import analyze, findings_from_stats
from actdoc.analysis.stats import LayerStats, accumulate_layer
from actdoc.digest import file_sha256 as sha256_of
from actdoc.errors import ActdocError
from actdoc.io import ReadLimits, open_dump
from actdoc.io.shards import is_sharded, place_layer, shard_layout
from actdoc.model import Dump, Findings, Layer, SourceInfo

#: How long to wait for a scheduler given by address before giving up with one sentence.
CONNECT_TIMEOUT = "20s"


def shard_layer_stats(path: str, layer_name: str, settings: Settings,
                      open_options: dict[str, Any], offset: int = 0,
                      total_samples: int | None = None) -> LayerStats:
    """On a worker: open one shard, pass over one layer, return its statistics.

    The shard's samples are numbered from ``offset`` within a dump of ``total_samples``, as in
    the concatenated file, so the statistics equal that file's over the same samples.
    """

    with open_dump(path, **open_options) as dump:
        layer = dump.layer(layer_name)
        samples = layer.info.samples
        if total_samples is not None:
            layer = place_layer(layer, offset, total_samples)
        return accumulate_layer(layer, settings, start_sample=offset,
                                stop_sample=offset + samples)


def _import_dask():
    try:
        import distributed
    except ImportError:
        raise ActdocError(
            "analysing shards on a cluster needs dask; install it with "
            "pip install 'actdoc[dask]'") from None
    return distributed


@contextmanager
def connect(scheduler: Any = None, workers: int | None = None) -> Iterator[Any]:
    """A dask Client: on a new LocalCluster for None or "local", else for the given address.

    An existing ``distributed.Client`` is used as it is and left open.
    """
    distributed = _import_dask()
    if isinstance(scheduler, distributed.Client):
        yield scheduler
        return
    if scheduler is None or str(scheduler) == "local":
        count = workers or max(1, min(4, os.cpu_count() or 1))
        with distributed.LocalCluster(n_workers=count, threads_per_worker=1, processes=True,
                                      dashboard_address=None) as cluster, \
                distributed.Client(cluster) as client:
            yield client
        return
    try:
        client = distributed.Client(str(scheduler), timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError) as exc:
        raise ActdocError(f"cannot reach the dask scheduler at {scheduler} ({exc})") from None
    with client:
        yield client


def analyze_shards(
    paths: str | Path | Sequence[str | Path],
    settings: Settings | None = None,
    scheduler: Any = None,
    progress: Callable[[float], None] | None = None,
    open_options: dict[str, Any] | None = None,
    digest: bool = True,
) -> Findings:
    """Findings for a sharded dump: in this process, or on a dask cluster given ``scheduler``.

    ``paths`` is anything ``actdoc.io.shards.open_shards`` accepts (a folder, a glob pattern or
    a list of files); the shards are validated first. ``scheduler`` is a scheduler address
    ("tcp://host:8786"), an existing Client, "local" for a LocalCluster on this machine, or
    None to measure the shards here one after another (no dask needed). ``progress(fraction)``
    is called as (shard, layer) tasks finish, weighted by the values each covers. The findings'
    source names the shards (see ``sharded_source``); ``digest=False`` skips hashing them.
    """

    settings = settings or Settings()
    open_options = dict(open_options or {})
    layout = shard_layout(paths, **open_options)
    if progress is not None:
        progress(0.0)
    tasks = _shard_tasks(layout)
    if scheduler is None:
        merged = _merge(layout, _run_here(tasks, settings, open_options, progress))
        source = sharded_source(layout, [file_sha256(str(p)) if digest else ""
                                         for p in layout.paths])
    else:
        with connect(scheduler) as client:
            digests = client.map(file_sha256, [str(Path(p).resolve()) for p in layout.paths],
                                 pure=False) if digest else None
            merged = _merge(layout, _run_on_cluster(client, tasks, settings, open_options,
                                                    progress))
            source = sharded_source(layout, client.gather(digests) if digest
                                    else [""] * len(layout.paths))
    with open_dump(layout.paths[0], **open_options) as first:
        whole = _concatenated_dump(first, layout)
        findings = findings_from_stats(whole, merged, settings, source)
    if progress is not None:
        progress(1.0)
    return findings


def analyze_target(
    dump: str | Path,
    settings: Settings | None = None,
    *,
    scheduler: Any = None,
    progress: Callable[[float], None] | None = None,
    activations: Sequence[str] = (),
    workers: int | None = None,
    digest: bool = True,
    probe: str | Path | None = None,
    synthetic_probe: int | None = None,
    limits: ReadLimits | None = None,
) -> Findings:
    """What ``actdoc analyze DUMP [--scheduler ADDRESS]`` runs, in one call.

    A single file without a scheduler goes to the local engine; a folder or glob of shards, or
    any target with a scheduler ("local" for a LocalCluster), goes to ``analyze_shards``.
    ``activations`` are the command line's ``--activation`` values; ``workers`` the local
    engine's measuring threads; ``digest=False`` skips hashing the dump (``source.sha256``
    is then "").
    ``probe`` (a probe file) and ``synthetic_probe`` (a sample count) run the forward pass of a
    weights-only checkpoint (``actdoc.forward``), as does a ``/probe/input`` in such a file.
    ``limits`` bounds what each file may declare (``actdoc.io.ReadLimits``).
    """
    from actdoc.forward import with_forward_pass

    options = {"activations": list(activations), "limits": limits}
    if scheduler is None and not is_sharded(dump):
        with open_dump(dump, **options) as opened:
            prepared = with_forward_pass(opened, probe, synthetic_probe)
            try:
                return analyze(prepared, settings, progress=progress, workers=workers,
                               digest=digest)
            finally:
                if prepared is not opened:
                    prepared.close()
    if probe is not None or synthetic_probe is not None:
        raise ActdocError("a probe (--probe, --synthetic-probe) applies to one checkpoint file, "
                          "not to shards or a cluster")
    return analyze_shards(dump, settings, scheduler=scheduler, progress=progress,
                          open_options=options, digest=digest)


def file_sha256(path: str) -> str:
    """On a worker: the SHA-256 of one shard file, so hashing runs in parallel too."""
    return sha256_of(path)


def sharded_source(layout, digests: Sequence[str]) -> SourceInfo:
    """The findings' source for shards: a manifest digest over the shards' own digests.

    ``sha256`` is the SHA-256 of the text ``sha256sum`` prints for the shard files in shard
    order ("<hex>  <name>" lines), so ``sha256sum part1.h5 part2.h5 ... | sha256sum`` gives the
    same value. ``file`` names the first and last shard and their count.
    """
    manifest = "".join(f"{digest}  {Path(path).name}\n"
                       for digest, path in zip(digests, layout.paths))
    names = [Path(p).name for p in layout.paths]
    if not any(digests):  # not hashed: no manifest digest either
        manifest = ""
    label = names[0] if len(names) == 1 else f"{names[0]} .. {names[-1]} ({len(names)} shards)"
    return SourceInfo(file=label,
                      sha256=hashlib.sha256(manifest.encode()).hexdigest() if manifest else "",
                      format=layout.format, samples=layout.samples)


def _shard_tasks(layout) -> list[tuple[tuple[int, int], Path, Any, int, int]]:
    """One task per (shard, layer) with activations: key, shard path, layer info, the shard's
    first sample in the joined dump, and the values it covers (to weigh progress)."""
    tasks = []
    for layer_index, info in enumerate(layout.layers):
        if not any(info.has(array) for array in ("preact", "output")):
            continue
        offset = 0
        for shard_index, path in enumerate(layout.paths):
            samples = layout.layer_samples[shard_index][layer_index]
            tasks.append(((shard_index, layer_index), Path(path).resolve(), info, offset,
                          max(1, info.units * info.positions * samples)))
            offset += samples
    return tasks


def _merge(layout, results: dict[tuple[int, int], LayerStats]) -> list[LayerStats | None]:
    """Each layer's statistics merged in shard order; None for layers without activations."""
    merged: list[LayerStats | None] = []
    for index in range(len(layout.layers)):
        parts = [results[(s, index)] for s in range(len(layout.paths)) if (s, index) in results]
        merged.append(reduce(LayerStats.merge, parts) if parts else None)
    return merged


def _run_here(tasks, settings, open_options, progress) -> dict[tuple[int, int], LayerStats]:
    """The tasks one after another in this process (no scheduler given)."""
    results = {}
    total, done = float(sum(task[4] for task in tasks) or 1), 0.0
    for key, path, info, offset, weight in tasks:
        results[key] = shard_layer_stats(str(path), info.name, settings, open_options, offset,
                                         info.samples)
        done += weight
        if progress is not None:
            progress(0.99 * done / total)
    return results


def _run_on_cluster(client, tasks, settings, open_options,
                    progress) -> dict[tuple[int, int], LayerStats]:
    """The tasks on the cluster behind ``client``, collected as they finish."""
    import distributed

    futures = {key: client.submit(shard_layer_stats, str(path), info.name, settings,
                                  open_options, offset, info.samples, pure=False)
               for key, path, info, offset, _ in tasks}
    weights = {key: weight for key, _, _, _, weight in tasks}
    described = {key: (path, info.name) for key, path, info, _, _ in tasks}
    owner = {future.key: key for key, future in futures.items()}
    results: dict[tuple[int, int], LayerStats] = {}
    total, done = float(sum(weights.values()) or 1), 0.0
    for future in distributed.as_completed(list(futures.values())):
        key = owner[future.key]
        results[key] = _result(future, *described[key])
        done += weights[key]
        if progress is not None:
            progress(0.99 * done / total)
    return results


def _result(future, path: Path, layer: str) -> LayerStats:
    """A task's statistics; an actdoc error raised on the worker is re-raised as it was."""
    try:
        return future.result()
    except ActdocError:
        raise
    except Exception as exc:  # noqa: BLE001 - anything else a worker hit, named in one line
        raise ActdocError(
            f"{Path(path).name}, layer '{layer}': the worker failed ({type(exc).__name__}: "
            f"{exc})") from None


def _concatenated_dump(first: Dump, layout) -> Dump:
    """The dump the shards make together: the layout's layer descriptions (total samples) with
    the first shard's parameter arrays (equal in every shard). It carries no activation arrays:
    their statistics come merged from the workers."""
    layers = tuple(Layer(info=info, sources={name: source for name, source in layer.sources.items()
                                             if name in ("weight", "bias")})
                   for info, layer in zip(layout.layers, first.layers))
    return Dump(path=first.path, format=layout.format, layers=layers, samples=layout.samples)
