"""Measuring stored chunks in place (tiles) gives the statistics of the block path.

References: the same arrays measured from memory in full-width blocks (the path every other
reader takes), numpy counts and extremes, and scipy.stats for the moments.
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest
from scipy import stats

from actdoc.analysis import Settings, accumulate_layer, analyze
from actdoc.analysis.tiles import paired_tiles
from actdoc.io import open_dump
from actdoc.io.memory import dump_from_arrays
from actdoc.model import ActivationKind as K

FIELDS = ("nonfinite", "minimum", "maximum", "active", "low", "high", "linear")


def arrays(kind: K, rows=2100, units=300, seed=5):
    from tests.support.planting import reference_output

    rng = np.random.default_rng(seed)
    z = rng.normal(0.2, 3.0, size=(rows, units)).astype(np.float32)
    z[:, :5] = -9.0  # silent or saturated units
    y = reference_output(kind, z.astype(np.float64), rng).astype(np.float32)
    return z, y


def write(path, kind, z, y, chunks=(512, 128), which=("preact", "output")):
    """One layer 'l' with plain h5py; ``chunks`` is one shape, or one per array name."""
    with h5py.File(path, "w") as f:
        group = f.create_group("layers/l")
        group.attrs["activation"] = kind.value
        for name, values in (("preact", z), ("output", y)):
            if name in which:
                shape = chunks[name] if isinstance(chunks, dict) else chunks
                group.create_dataset(name, data=values, chunks=shape)
    return path


def assert_same(a, b):
    assert a.rows == b.rows
    for name in FIELDS:
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None and y is None) or np.array_equal(x, y), name
    assert np.array_equal(a.moments.count, b.moments.count)
    for name in ("mean", "m2", "m3", "m4"):
        np.testing.assert_allclose(getattr(a.moments, name), getattr(b.moments, name),
                                   rtol=1e-9, atol=1e-9, err_msg=name)
    for name in ("abs_sum", "gain_sum"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None)
        if x is not None:
            np.testing.assert_allclose(x, y, rtol=1e-10, err_msg=name)
    for key, counts in a.histograms.items():
        assert np.array_equal(counts, b.histograms[key]), key


@pytest.mark.parametrize("kind", [K.RELU, K.LEAKY_RELU, K.LOGISTIC, K.TANH, K.SOFTPLUS,
                                  K.THRESHOLD])
@pytest.mark.parametrize("which", [("preact", "output"), ("preact",), ("output",)],
                         ids=["both", "preact", "output"])
def test_tiles_equal_blocks_from_memory(tmp_path, kind, which):
    z, y = arrays(kind)
    z[7, 40] = np.nan  # one non-finite observation
    y[7, 40] = np.nan
    spec = {"activation": kind.value, **{n: v for n, v in (("preact", z), ("output", y))
                                         if n in which}}
    settings = Settings(block_observations=700)
    expected = accumulate_layer(dump_from_arrays({"l": spec}).layers[0], settings)
    with open_dump(write(tmp_path / "d.h5", kind, z, y, which=which)) as dump:
        layer = dump.layers[0]
        assert paired_tiles(layer, 700) is not None, "uncompressed chunks are measured in place"
        assert_same(accumulate_layer(layer, settings), expected)
        # shards of the tiled layer merge to the same statistics
        parts = [accumulate_layer(layer, settings, a, b) for a, b in ((0, 1000), (1000, None))]
        assert_same(parts[0].merge(parts[1]), expected)


def test_tiled_statistics_match_numpy_and_scipy(tmp_path):
    z, y = arrays(K.TANH)
    with open_dump(write(tmp_path / "d.h5", K.TANH, z, y, chunks=(333, 100))) as dump:
        s = accumulate_layer(dump.layers[0], Settings(block_observations=1000))
    y64, z64 = y.astype(np.float64), z.astype(np.float64)
    np.testing.assert_allclose(s.moments.mean, y64.mean(0), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(s.moments.std(), y64.std(0), rtol=1e-9, atol=1e-12)
    varied = y64.std(0) > 0
    n = y.shape[0]
    skew = stats.skew(y64[:, varied], bias=False)
    from actdoc.analysis.moments import sample_skewness
    np.testing.assert_allclose(sample_skewness(n, s.moments.m2, s.moments.m3)[varied], skew,
                               rtol=1e-7)
    assert np.array_equal(s.minimum, y64.min(0)) and np.array_equal(s.maximum, y64.max(0))
    edge = np.float32(np.arctanh(0.99))  # the default tanh saturation level, compared in float32
    assert s.low.tolist() == (z < -edge).sum(0).tolist()
    assert s.high.tolist() == (z > edge).sum(0).tolist()


def test_layers_that_cannot_be_tiled_take_the_block_path(tmp_path):
    z, y = arrays(K.RELU, rows=400, units=40)
    # preact and output cut into different tiles, and a spatial layer
    path = write(tmp_path / "mixed.h5", K.RELU, z, y,
                 chunks={"preact": (100, 20), "output": (50, 40)})
    with h5py.File(path, "a") as f:
        spatial = f.create_group("layers/m")
        spatial.attrs["activation"] = "relu"
        spatial.create_dataset("output", data=np.maximum(z, 0).reshape(400, 10, 4))
    with open_dump(path) as dump:
        assert paired_tiles(dump.layers[0], 128) is None
        assert paired_tiles(dump.layers[1], 128) is None
        findings = analyze(dump, digest=False)
    expected = analyze(dump_from_arrays({
        "l": {"activation": "relu", "preact": z, "output": y},
        "m": {"activation": "relu", "output": np.maximum(z, 0).reshape(400, 10, 4)}}))
    assert [f.units for f in findings.findings] == [f.units for f in expected.findings]
    assert findings.source.sha256 == ""


def write_npz(path, kind, z, y, compressed=False):
    """An NPZ dump written with numpy alone, from docs/contract.md section 2."""
    meta = np.array(json.dumps({"layers": [{"name": "l", "activation": kind.value}]}))
    save = np.savez_compressed if compressed else np.savez
    save(path, **{"l/preact": z, "l/output": y, "actdoc_meta": meta})
    return path


@pytest.mark.parametrize("kind", [K.RELU, K.LOGISTIC])
def test_stored_npz_members_are_measured_in_place(tmp_path, kind):
    z, y = arrays(kind, rows=1500, units=90)
    y[3, 4] = np.inf
    settings = Settings(block_observations=512)
    expected = accumulate_layer(dump_from_arrays(
        {"l": {"activation": kind.value, "preact": z, "output": y}}).layers[0], settings)
    with open_dump(write_npz(tmp_path / "d.npz", kind, z, y)) as dump:
        assert paired_tiles(dump.layers[0], 512) is not None
        assert_same(accumulate_layer(dump.layers[0], settings), expected)
        source = dump.layers[0].sources["preact"]
        out = np.empty((100, 90), np.float32)
        assert np.array_equal(source.read_samples(700, 800, out=out), z[700:800])
        assert np.array_equal(source.read_unit(7), z[:, 7])
    with open_dump(write_npz(tmp_path / "c.npz", kind, z, y, compressed=True)) as dump:
        assert paired_tiles(dump.layers[0], 512) is None  # compressed members stream instead
        assert_same(accumulate_layer(dump.layers[0], settings), expected)


def test_preact_and_output_cut_differently_in_later_blocks(tmp_path):
    """Chunks of 600 and 1000 rows agree on the first 512-row block but not on the second:
    such blocks are read into buffers; the statistics stay those of the block path."""
    z, y = arrays(K.LOGISTIC, rows=2100, units=70)
    path = write(tmp_path / "d.h5", K.LOGISTIC, z, y,
                 chunks={"preact": (600, 70), "output": (1000, 70)})
    settings = Settings(block_observations=512)
    expected = accumulate_layer(dump_from_arrays(
        {"l": {"activation": "logistic", "preact": z, "output": y}}).layers[0], settings)
    with open_dump(path) as dump:
        blocks = list(paired_tiles(dump.layers[0], 512))
        assert len(blocks[0][1]) == 1 and blocks[1][1][0][1] == slice(0, 70)
        assert_same(accumulate_layer(dump.layers[0], settings), expected)
