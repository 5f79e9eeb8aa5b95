"""Activation inference against outside references.

Outputs are computed with scipy.special (expit for the logistic, erf for gelu) and numpy (tanh,
log1p/exp for softplus), then stored in float16, float32 or float64 as a framework would store them.
Formulas: gelu(z) = z * Phi(z) and its tanh approximation, Hendrycks and Gimpel, "Gaussian Error
Linear Units" (2016), section 2; silu(z) = z * logistic(z), Elfwing et al. 2018 eq. 3 (from
memory); leaky relu, Maas et al. 2013 (from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from actdoc.io.infer import SAMPLE_OBSERVATIONS, infer_kind
from actdoc.io.memory import MemorySource
from actdoc.model import ActivationKind as K

DTYPES = [np.float16, np.float32, np.float64]

REFERENCES = {
    "linear": (K.LINEAR, lambda z: z),
    "relu": (K.RELU, lambda z: np.maximum(z, 0)),
    "logistic": (K.LOGISTIC, special.expit),
    "tanh": (K.TANH, np.tanh),
    "softplus": (K.SOFTPLUS, lambda z: np.log1p(np.exp(z))),
    "gelu": (K.GELU, lambda z: z * 0.5 * (1 + special.erf(z / np.sqrt(2)))),
    "gelu_tanh": (K.GELU, lambda z: 0.5 * z * (1 + np.tanh(np.sqrt(2 / np.pi)
                                                           * (z + 0.044715 * z**3)))),
    "silu": (K.SILU, lambda z: z * special.expit(z)),
}


def pair(z: np.ndarray, y: np.ndarray, dtype, out_dtype=None):
    return MemorySource(z.astype(dtype)), MemorySource(y.astype(out_dtype or dtype))


def preacts(seed: int = 0, shape=(600, 16), scale: float = 2.0) -> np.ndarray:
    return np.random.default_rng(seed).normal(scale=scale, size=shape)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("name", sorted(REFERENCES))
def test_each_kind_identified(name, dtype):
    kind, function = REFERENCES[name]
    z = preacts().astype(dtype).astype(np.float64)  # the stored z is what the framework used
    guess = infer_kind(*pair(z, function(z), dtype))
    assert guess.kind is kind, guess.note
    if name == "gelu_tanh" and dtype is not np.float16:
        assert "tanh approximation" in guess.note  # 3e-4 apart: visible above float16 precision
    if name == "gelu" and dtype is not np.float16:
        assert "erf form" in guess.note


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("slope", [0.01, 0.2, 0.3])
def test_leaky_relu_slope(slope, dtype):
    z = preacts(1).astype(dtype).astype(np.float64)
    guess = infer_kind(*pair(z, np.where(z > 0, z, slope * z), dtype))
    assert guess.kind is K.LEAKY_RELU
    assert guess.negative_slope == pytest.approx(slope, rel=1e-6)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("theta", [0.0, 0.7, -1.5])
def test_threshold_and_its_level(theta, dtype):
    z = preacts(2).astype(dtype).astype(np.float64)
    y = (z > theta)
    for out in (dtype, np.int8, np.bool_):
        guess = infer_kind(*pair(z, y, dtype, out))
        assert guess.kind is K.THRESHOLD
        below, above = z[z <= theta].max(), z[z > theta].min()
        assert below <= guess.threshold < above  # fires exactly when z > threshold
        if theta == 0.0:
            assert guess.threshold == 0.0


def test_stochastic_binary_tracks_logistic():
    rng = np.random.default_rng(4)
    z = preacts(3, shape=(2000, 4))
    y = (rng.random(z.shape) < special.expit(z)).astype(np.float32)
    guess = infer_kind(*pair(z, y, np.float32))
    assert guess.kind is K.STOCHASTIC_BINARY
    assert "follows logistic(z)" in guess.note and "does not" not in guess.note


def test_binary_noise_not_logistic_is_still_stochastic_but_says_so():
    rng = np.random.default_rng(5)
    z = preacts(4, shape=(2000, 4), scale=6.0)
    flips = rng.random(z.shape) < 0.1
    y = ((z > 0) ^ flips).astype(np.uint8)
    guess = infer_kind(*pair(z, y, np.float32, np.uint8))
    assert guess.kind is K.STOCHASTIC_BINARY
    assert "does not follow logistic(z)" in guess.note


def test_ambiguous_positive_preacts_pick_linear_and_say_so():
    """All z > 0: y == z is linear, relu and leaky relu alike; the simplest (linear) is picked."""
    z = np.abs(preacts(6)) + 0.1
    guess = infer_kind(*pair(z, z, np.float32))
    assert guess.kind is K.LINEAR
    assert "relu" in guess.note and "fit equally well" in guess.note


def test_ambiguous_negative_preacts_with_zero_output():
    """All z < 0 and y == 0: relu for float outputs, threshold for integer outputs."""
    z = -np.abs(preacts(7)) - 0.1
    float_guess = infer_kind(*pair(z, np.zeros_like(z), np.float32))
    assert float_guess.kind is K.RELU and "threshold" in float_guess.note
    assert infer_kind(*pair(z, np.zeros_like(z), np.float32, np.int8)).kind is K.THRESHOLD


def test_non_finite_pairs_are_skipped():
    z = preacts(8)
    y = np.tanh(z)
    z[0, :3] = np.nan
    y[5, 2] = np.inf
    assert infer_kind(*pair(z, y, np.float32)).kind is K.TANH


@pytest.mark.parametrize("values, kind, fragment", [
    (np.array([[0.0, 1.0], [1.0, 1.0]]), K.THRESHOLD, "only 0 and 1"),
    (np.maximum(preacts(9), 0), K.RELU, "exact zeros"),
    (special.expit(preacts(9)), K.LOGISTIC, "within [0, 1]"),
    (np.tanh(preacts(9)), K.TANH, "within [-1, 1]"),
    (preacts(9) * 3, K.LINEAR, "could not be identified"),
])
def test_output_only_rule(values, kind, fragment):
    guess = infer_kind(None, MemorySource(values.astype(np.float32)))
    assert guess.kind is kind and fragment in guess.note


def test_nothing_to_go_on_is_linear():
    guess = infer_kind(None, None)
    assert guess.kind is K.LINEAR and "weights only" in guess.note
    only_preact = infer_kind(MemorySource(preacts(10).astype(np.float32)), None)
    assert only_preact.kind is K.LINEAR and "only pre-activations" in only_preact.note


class CountingSource(MemorySource):
    """Records every read, to show inference reads one bounded block."""

    def __init__(self, array):
        super().__init__(array)
        self.reads: list[tuple[int, int]] = []

    def read_samples(self, start, stop, out=None):
        self.reads.append((start, stop))
        return super().read_samples(start, stop, out)


def test_reads_one_bounded_block():
    z = preacts(11, shape=(50_000, 2)).astype(np.float32)
    pre, out = CountingSource(z), CountingSource(np.maximum(z, 0))
    assert infer_kind(pre, out).kind is K.RELU
    for source in (pre, out):
        assert len(source.reads) == 1 and source.reads[0][1] <= SAMPLE_OBSERVATIONS


@pytest.mark.parametrize("wide, narrow", [(np.float32, np.float16), (np.float64, np.float16),
                                          (np.float64, np.float32)])
@pytest.mark.parametrize("name", sorted(REFERENCES))
def test_computed_wide_then_rounded_on_storage(name, wide, narrow):
    """A framework computing in a wider type, storing z and y rounded separately."""
    kind, function = REFERENCES[name]
    z = preacts(12).astype(wide)
    y = function(z.astype(np.float64)).astype(wide)
    assert infer_kind(*pair(z, y, narrow)).kind is kind


def x87_oddities(count: int) -> np.ndarray:
    """``count`` long doubles float64 cannot hold: a pseudo-NaN and an unnormal (encodings the
    x87 80-bit format reserves as invalid, Intel SDM vol. 1 section 8.2.2, from memory) and
    1e4000, past float64's range."""
    raw = np.zeros((count, np.dtype(np.longdouble).itemsize), dtype=np.uint8)
    for row in range(count):
        kind = row % 3
        if kind == 0:  # exponent all ones, integer bit clear: pseudo-NaN
            raw[row, :8] = np.frombuffer((1).to_bytes(8, "little"), np.uint8)
            raw[row, 8:10] = [0xFF, 0x7F]
        elif kind == 1:  # non-zero exponent, integer bit clear: unnormal
            raw[row, :8] = np.frombuffer((5).to_bytes(8, "little"), np.uint8)
            raw[row, 8:10] = [0x00, 0x40]
    values = raw.view(np.longdouble).reshape(count)
    values[2::3] = np.longdouble("1e4000")
    return values


@pytest.mark.parametrize("wide", [False, True])
def test_nan_inf_and_huge_values_warn_nothing_and_are_left_out(wide, recwarn):
    """NaN, +-inf, values near float64's maximum and (for a long-double layer, as an HDF5 file
    may declare one) values float64 cannot hold at all: inference warns nothing and still
    identifies the rectifier, max(0, z) (common practice), on the rest of the sample."""
    if wide and np.finfo(np.longdouble).nmant < 63:
        pytest.skip("long double is not the x87 80-bit format on this machine")
    z = preacts(7, shape=(400, 8))
    z[::5, 0] = np.nan
    z[1::5, 1] = np.inf
    z[2::5, 2] = -np.inf
    z[3::5, 3] = 1e308
    z[4::5, 4] = -1e308
    dtype = np.longdouble if wide else np.float64
    z = z.astype(dtype)
    if wide:
        z[::4, 5] = x87_oddities(z[::4, 5].size)
    y = np.maximum(z, 0)
    # What numpy warns about by default (all but underflow) raises here instead.
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        guess = infer_kind(MemorySource(z), MemorySource(y))
    assert guess.kind is K.RELU
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]
