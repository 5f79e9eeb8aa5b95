"""One-pass statistics: numpy/scipy references, exact merges, one read per array."""

import numpy as np
import pytest
from scipy import stats

from actdoc.analysis import Settings, accumulate_layer
from actdoc.analysis.histograms import grids_for
from actdoc.analysis.moments import bimodality_coefficient, sample_excess_kurtosis, \
    sample_skewness
from actdoc.io.memory import dump_from_arrays
from actdoc.model import ActivationKind as K
from actdoc.model import Layer


def central_sums(x):
    d = x - x.mean(axis=0)
    return x.shape[0], (d ** 2).sum(0), (d ** 3).sum(0), (d ** 4).sum(0)


def test_skewness_kurtosis_and_bimodality_match_scipy():
    # reference: scipy.stats.skew / kurtosis with bias=False; BC formula of Pfister et al. 2013
    rng = np.random.default_rng(0)
    x = np.column_stack([rng.gamma(2.0, size=300), rng.normal(size=300),
                         np.r_[rng.normal(-3, 1, 150), rng.normal(3, 1, 150)]])
    n, m2, m3, m4 = central_sums(x)
    g = stats.skew(x, axis=0, bias=False)
    k = stats.kurtosis(x, axis=0, bias=False)
    np.testing.assert_allclose(sample_skewness(n, m2, m3), g, rtol=1e-10)
    np.testing.assert_allclose(sample_excess_kurtosis(n, m2, m4), k, rtol=1e-10)
    expected = (g ** 2 + 1) / (k + 3 * (n - 1) ** 2 / ((n - 2) * (n - 3)))
    np.testing.assert_allclose(bimodality_coefficient(n, m2, m3, m4), expected, rtol=1e-10)


def test_bimodality_large_sample_values():
    # Pfister et al. 2013 (Frontiers in Psychology 4:700): normal 1/3, uniform 5/9,
    # symmetric two-point 1
    rng = np.random.default_rng(1)
    n = 400_000
    x = np.column_stack([rng.normal(size=n), rng.uniform(size=n),
                         rng.integers(0, 2, size=n).astype(float)])
    dump = dump_from_arrays({"l": {"activation": "linear", "preact": x}})
    bc = accumulate_layer(dump.layers[0]).moments.bimodality()
    np.testing.assert_allclose(bc, [1 / 3, 5 / 9, 1.0], atol=0.005)


def make_layer(kind=K.TANH, dtype=np.float32, rows=3001, units=7, spatial=(), seed=2):
    rng = np.random.default_rng(seed)
    z = (rng.normal(0.3, 2.0, size=(rows, units) + spatial)).astype(dtype)
    z.reshape(-1)[::97] = 0.0
    from tests.support.planting import reference_output
    y = reference_output(kind, z.astype(np.float64), rng).astype(dtype)
    return dump_from_arrays({"l": {"activation": kind.value, "preact": z, "output": y}}).layers[0]


@pytest.mark.parametrize("kind", [K.TANH, K.RELU, K.LOGISTIC, K.SOFTPLUS, K.STOCHASTIC_BINARY])
def test_block_and_shard_merges_equal_the_one_shot_pass(kind):
    layer = make_layer(kind)
    whole = accumulate_layer(layer, Settings(block_observations=10_000))
    # small blocks inside, and three uneven shards merged
    blocks = accumulate_layer(layer, Settings(block_observations=37))
    shards = [accumulate_layer(layer, Settings(block_observations=500), a, b)
              for a, b in ((0, 1000), (1000, 1001), (1001, None))]
    merged = shards[0].merge(shards[1]).merge(shards[2])
    for other in (blocks, merged):
        assert other.rows == whole.rows
        for name in ("nonfinite", "minimum", "maximum", "active", "low", "high", "linear"):
            a, b = getattr(whole, name), getattr(other, name)
            assert (a is None and b is None) or np.array_equal(a, b), name
        assert np.array_equal(whole.moments.count, other.moments.count)
        for name in ("total", "total_squares"):
            np.testing.assert_allclose(getattr(other.moments, name),
                                       getattr(whole.moments, name), rtol=1e-12)
        np.testing.assert_allclose(other.moments.bimodality(), whole.moments.bimodality(),
                                   rtol=1e-9)
        for q, counts in whole.histograms.items():
            assert np.array_equal(counts, other.histograms[q]), q


def test_statistics_match_numpy_on_a_spatial_float16_layer():
    layer = make_layer(K.TANH, np.float16, rows=200, units=3, spatial=(4, 5))
    s = accumulate_layer(layer, Settings(block_observations=256))
    # reference: numpy on [observations, channels]
    y = np.moveaxis(layer.sources["output"].read_all(), 1, -1).reshape(-1, 3).astype(np.float64)
    z = np.moveaxis(layer.sources["preact"].read_all(), 1, -1).reshape(-1, 3).astype(np.float64)
    assert s.count.tolist() == [4000] * 3
    np.testing.assert_allclose(s.moments.mean, y.mean(0), rtol=1e-12)
    np.testing.assert_allclose(s.moments.std(), y.std(0), rtol=1e-10)
    np.testing.assert_allclose(s.moments.bimodality(), bimodality_coefficient(
        *central_sums(y)), rtol=1e-9)
    assert np.array_equal(s.minimum, y.min(0)) and np.array_equal(s.maximum, y.max(0))
    edge = np.arctanh(0.99)
    assert s.low.tolist() == (z < -edge).sum(0).tolist()
    assert s.high.tolist() == (z > edge).sum(0).tolist()
    assert s.linear.tolist() == (np.abs(z) <= np.arctanh(np.sqrt(0.1))).sum(0).tolist()
    # mean |y| for the dormant score (Sokar et al. 2023)
    np.testing.assert_allclose(s.mean_abs(), np.abs(y).mean(0), rtol=1e-12)


def test_histograms_agree_with_numpy_on_their_subsample():
    layer = make_layer(K.LOGISTIC, rows=5000, units=4)
    s = accumulate_layer(layer, Settings(histogram_rows=1000, block_observations=333))
    stride = 5  # ceil(5000 / 1000)
    z = layer.sources["preact"].read_all()[::stride].astype(np.float64)
    y = layer.sources["output"].read_all()[::stride].astype(np.float64)
    grids = grids_for(K.LOGISTIC)
    # reference: numpy.histogram over the same fixed edges (values all inside the grid)
    for q, values in (("preact", z), ("output", y)):
        expected, _ = np.histogram(values, bins=grids[q].edges)
        assert np.array_equal(s.histograms[q], expected), q
        assert s.histograms[q].sum() == values.size


class CountingSource:
    """Wraps an ArraySource and records which rows were read, and how."""

    def __init__(self, inner):
        self.inner, self.shape, self.dtype = inner, inner.shape, inner.dtype
        self.rows_read, self.whole_reads = [], 0

    def read_samples(self, start, stop, out=None):
        self.rows_read.extend(range(start, stop))
        return self.inner.read_samples(start, stop, out)

    def read_unit(self, unit):
        self.whole_reads += 1
        return self.inner.read_unit(unit)

    def read_all(self):
        self.whole_reads += 1
        return self.inner.read_all()


def test_each_array_is_read_once_front_to_back_in_blocks():
    layer = make_layer(K.RELU, rows=2500)
    counting = {k: CountingSource(v) for k, v in layer.sources.items()}
    accumulate_layer(Layer(layer.info, counting), Settings(block_observations=300))
    for source in counting.values():
        assert source.rows_read == list(range(2500)) and source.whole_reads == 0
