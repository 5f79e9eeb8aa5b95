"""The compiled kernel gives the numpy path's statistics bit for bit, so which path measured a
slice never shows (actdoc/analysis/kernel.py). Reference: the numpy path itself, whose own
results are checked against the findings recorded before the speed work (test_same_findings)
and against scipy and numpy elsewhere in the suite."""

from __future__ import annotations

import numpy as np
import pytest

from actdoc.analysis import Settings, analyze, kernel
from actdoc.io import open_dump
from actdoc.io.memory import dump_from_arrays
from actdoc.neurons import Neuron
from actdoc.model import ActivationKind
from benchmarks.cells import CELLS, cell_named, write_cell
from benchmarks.reference import SMALL, analyse, small_samples, summarize


@pytest.fixture(scope="module")
def compiled():
    assert kernel.wait(timeout=600), f"numba is a declared dependency: {kernel.failure()}"
    return kernel.loaded()


@pytest.fixture
def calls(compiled, monkeypatch):
    """Counts the kernel's calls (and the slices it accepted)."""
    seen = {"calls": 0, "clean": 0}

    def counting(*args):
        seen["calls"] += 1
        done = compiled(*args)
        seen["clean"] += bool(done)
        return done

    monkeypatch.setattr(kernel, "_fused", counting)
    return seen


def both_paths(monkeypatch, measure):
    """(numpy path result, kernel path result) of ``measure()``."""
    monkeypatch.setenv("ACTDOC_KERNEL", "numpy")
    plain = measure()
    monkeypatch.delenv("ACTDOC_KERNEL")
    return plain, measure()


@pytest.mark.parametrize("name", [cell.name for cell in CELLS])
def test_every_cell_measures_the_same_on_both_paths(name, calls, monkeypatch, tmp_path):
    cell = cell_named(name)
    path = write_cell(cell, tmp_path / f"{name}{cell.suffix}", small_samples(cell))
    for settings in (Settings(), Settings(**SMALL)):
        plain, fused = both_paths(monkeypatch, lambda: analyse(path, settings))
        assert fused == plain
    assert calls["clean"] > 0


KINDS = ("relu", "leaky_relu", "logistic", "tanh", "threshold", "linear")


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("stored", ["both", "preact", "output"])
@pytest.mark.parametrize("kind", KINDS)
def test_values_on_every_edge_count_the_same(kind, stored, dtype, calls, monkeypatch):
    """Values on, just below and just above each zone edge (where a comparison done in the
    wrong precision would count differently), plus NaN and infinity in some slices."""
    neuron = Neuron(ActivationKind.parse(kind), 0.01, 0.25)
    settings = Settings()
    zone = neuron.saturation_zone(settings.logistic_saturation_margin,
                                  settings.tanh_saturation_level)
    linear = neuron.linear_zone(settings.linear_gain_share)
    edges = [0.0, 0.25, 0.5]
    for band in (zone, linear):
        if band is not None:
            edges += [band.z_low, band.z_high, band.y_low, band.y_high,
                      0.5 * (band.y_low + band.y_high)]
    points = np.array(edges, dtype)
    points = np.concatenate([points, np.nextafter(points, dtype(-np.inf)),
                             np.nextafter(points, dtype(np.inf))])
    rng = np.random.default_rng(5)
    z = rng.choice(points, size=(3000, 96)).astype(dtype)
    z[:, :8] = rng.standard_normal((3000, 8)) * 4
    if stored == "output" and kind == "threshold":
        pytest.skip("a threshold layer's output alone is 0/1, covered by the others")
    y = neuron.output(z).astype(dtype)
    if stored != "output":
        z[2500, 3] = np.nan  # one slice holding NaN and one infinity: numpy takes those
        z[2600, 5] = np.inf
    else:
        y[2500, 3] = np.nan
    spec = {"activation": kind}
    if stored in ("both", "preact"):
        spec["preact"] = z
    if stored in ("both", "output"):
        spec["output"] = y

    def measure():
        dump = dump_from_arrays({"layer": spec})
        return summarize(analyze(dump, Settings(block_observations=700), workers=1,
                                 digest=False))

    plain, fused = both_paths(monkeypatch, measure)
    assert fused == plain
    assert calls["clean"] > 0 and calls["calls"] > calls["clean"]


def test_a_wide_float64_layer_is_measured_the_same(calls, monkeypatch, tmp_path):
    cell = cell_named("contiguous-8192-out-64")
    path = write_cell(cell, tmp_path / "wide64.h5", 300)

    def measure():
        with open_dump(path) as dump:
            return summarize(analyze(dump, Settings(block_bytes=1 << 20), digest=False))

    plain, fused = both_paths(monkeypatch, measure)
    assert fused == plain and calls["clean"] > 0
