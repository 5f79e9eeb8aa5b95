"""Analyse a sharded dump on a dask.distributed cluster.

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

from contextlib import contextmanager
from functools import reduce
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

from actdoc.analysis.defaults import Settings
from actdoc.analysis.stats import LayerStats, accumulate_layer
from actdoc.errors import ActdocError
from actdoc.model import Findings


def shard_layer_stats(path: str, layer_name: str, settings: Settings,
                      open_options: dict[str, Any]) -> LayerStats:
    """On a worker: open one shard, pass over one layer, return its statistics."""
    from actdoc.io import open_dump

    with open_dump(path, **open_options) as dump:
        return accumulate_layer(dump.layer(layer_name), settings)


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
        import os

        count = workers or max(1, min(4, os.cpu_count() or 1))
        with distributed.LocalCluster(n_workers=count, threads_per_worker=1, processes=True,
                                      dashboard_address=None) as cluster, \
                distributed.Client(cluster) as client:
            yield client
        return
    try:
        client = distributed.Client(str(scheduler), timeout="20s")
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
) -> Findings:
    """Findings for a sharded dump, computed on a dask cluster.

    ``paths`` is anything ``actdoc.io.shards.open_shards`` accepts (a folder, a glob pattern or
    a list of files); the shards are validated first. ``scheduler`` is a scheduler address
    ("tcp://host:8786"), an existing Client, or None / "local" for a LocalCluster on this
    machine. ``progress(fraction)`` is called as (shard, layer) tasks finish, weighted by the
    observations each covers.
    """
    from actdoc.io.shards import shard_layout

    settings = settings or Settings()
    open_options = dict(open_options or {})
    layout = shard_layout(paths, **open_options)
    with connect(scheduler) as client:
        merged = _gather_merged(client, layout, settings, open_options, progress)
    return _findings(layout, merged, settings)


def _gather_merged(client, layout, settings, open_options, progress) -> list[LayerStats]:
    """Submit one task per (shard, layer); merge each layer's results in shard order."""
    import distributed

    futures = {}
    weights = {}
    for shard_index, path in enumerate(layout.paths):
        for layer_index, info in enumerate(layout.layers):
            key = (shard_index, layer_index)
            futures[key] = client.submit(
                shard_layer_stats, str(Path(path).resolve()), info.name, settings, open_options,
                key=f"actdoc-stats-{shard_index}-{layer_index}-{id(futures)}", pure=False)
            weights[key] = max(1, info.units * layout.shard_samples[shard_index])
    owner = {future.key: key for key, future in futures.items()}
    results: dict[tuple[int, int], LayerStats] = {}
    total, done = float(sum(weights.values())), 0.0
    for future in distributed.as_completed(list(futures.values())):
        key = owner[future.key]
        results[key] = _result(future, layout.paths[key[0]], layout.layers[key[1]].name)
        done += weights[key]
        if progress is not None:
            progress(done / total)
    return [
        reduce(LayerStats.merge, [results[(s, index)] for s in range(len(layout.paths))])
        for index in range(len(layout.layers))
    ]


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


def _findings(layout, merged: list[LayerStats], settings: Settings) -> Findings:
    raise NotImplementedError  # replaced once the engine's stats-to-findings function exists
