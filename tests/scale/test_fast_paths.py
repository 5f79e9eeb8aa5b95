"""The engine's speed-ups change nothing but speed: table-driven bins and threaded measuring."""

from __future__ import annotations

import numpy as np
import pytest

from actdoc.analysis import Settings, analyze
from actdoc.analysis.histograms import Grid, grids_for, table_bins
from actdoc.io import open_dump
from actdoc.model import ActivationKind

GRIDS = {kind.value: grids_for(kind) for kind in
         (ActivationKind.RELU, ActivationKind.LOGISTIC, ActivationKind.TANH,
          ActivationKind.THRESHOLD)}


def reference_counts(grid: Grid, values: np.ndarray) -> np.ndarray:
    """numpy.histogram over the grid's float64 arithmetic, as a reference for the table path
    (numpy's own histogram, an outside reference for the binning).

    Each value's float64 position (asinh-transformed where the grid is) is binned by
    np.histogram on integer edges 0..bins, after clipping into the outer bins.
    """
    with np.errstate(over="ignore", invalid="ignore"):  # huge floats / scale overflow; NaN
        position = grid.positions(values)
    position = np.clip(position[~np.isnan(position)], 0, grid.bins - 0.5)
    return np.histogram(position, bins=np.arange(grid.bins + 1))[0]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("kind", sorted(GRIDS))
def test_table_bins_equal_the_float64_arithmetic(kind, dtype):
    rng = np.random.default_rng(3)
    big = np.finfo(dtype).max
    for grid in GRIDS[kind].values():
        assert table_bins(grid, dtype) is not None
        edges = grid.edges.astype(dtype)
        # Values on, just below and just above every edge, plus wide and narrow random values.
        near = np.concatenate([edges, np.nextafter(edges, dtype(-np.inf)),
                               np.nextafter(edges, dtype(np.inf))])
        values = np.concatenate([
            near, (rng.standard_normal(200_000) * 3).astype(dtype),
            rng.uniform(grid.edges[0], grid.edges[-1], 200_000).astype(dtype),
            np.array([0.0, -0.0, big, -big, 1e-40, -1e-40], dtype)])
        counts = grid.count(values)
        np.testing.assert_array_equal(counts, reference_counts(grid, values))
        assert counts.sum() == values.size
        # A strided two-dimensional view is binned in place, to the same counts.
        square = values[: 400_000].reshape(800, 500)[::3, 1::2]
        np.testing.assert_array_equal(grid.count(square), reference_counts(grid, square))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_non_finite_values_go_to_the_outer_bins_or_nowhere(dtype):
    """+-inf in the outer bins and NaN dropped, as the arithmetic does, on the table path
    (float32 tanh returns exactly +-1, whose inverse is infinite: a common case)."""
    unsigned = np.uint32 if dtype == np.float32 else np.uint64
    quiet = np.array([np.nan, -np.nan], dtype)
    payload = np.array([0x7F800001 if dtype == np.float32 else 0x7FF0000000000001],
                       unsigned).view(dtype)  # a NaN sharing the +inf table bucket
    for grid in (GRIDS["relu"]["preact"], GRIDS["tanh"]["output"]):
        values = np.concatenate([np.array([0.5, np.inf, -np.inf, np.inf], dtype), quiet,
                                 payload, -payload])
        counts = grid.count(values)
        assert counts.sum() == 4 and counts[0] == 1 and counts[-1] == 2
        np.testing.assert_array_equal(counts, reference_counts(grid, values))


def test_threaded_measuring_gives_the_serial_findings(sharded, monkeypatch):
    from actdoc.analysis import engine

    whole, _, _ = sharded
    settings = Settings(block_observations=1024)
    with open_dump(whole) as dump:
        serial = analyze(dump, settings, workers=1)
        monkeypatch.setattr(engine, "TASK_BYTES", 100_000)  # several sample ranges per layer
        assert len(engine._tasks(dump, settings)) > 2 * len(dump.layers)
        threaded = analyze(dump, settings, workers=3)
    assert threaded.findings == serial.findings
    for mine, theirs in zip(threaded.layers, serial.layers):
        for name, hist in theirs.histograms.items():
            np.testing.assert_array_equal(mine.histograms[name].counts, hist.counts)
        np.testing.assert_allclose(mine.unit_table["std"], theirs.unit_table["std"], rtol=1e-10)


@pytest.mark.parametrize("compress", [False, True])
def test_npz_members_split_only_where_they_can_be_read_from_anywhere(tmp_path, monkeypatch,
                                                                     compress):
    from actdoc.analysis import engine
    from actdoc.io.writer import write_npz

    from tests.support.scale import recording

    path = write_npz(tmp_path / "run.npz", recording(), compress=compress)
    settings = Settings(block_observations=1024)
    with open_dump(path) as dump:
        serial = analyze(dump, settings, workers=1)
        monkeypatch.setattr(engine, "TASK_BYTES", 100_000)
        tasks = engine._tasks(dump, settings)
        # A compressed member decompresses from its start: one task per layer, never ranges.
        assert (len(tasks) == len(dump.layers)) == compress
        threaded = analyze(dump, settings, workers=3)
    assert threaded.findings == serial.findings
