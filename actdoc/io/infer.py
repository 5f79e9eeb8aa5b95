"""Working out a layer's transfer function when the dump does not declare it.

With both the total input z and the output y stored, the function is identified exactly: every
known kind is evaluated on z and compared with y to within the rounding of the stored dtypes.
Only a bounded sample is read (the first rows of each array, one block), never a whole array.
With the output alone, a documented rule on its range and value structure gives a best guess;
with neither, the layer is treated as linear and the note says why.

Ties (the sample cannot tell two functions apart) are broken by a fixed preference order, the
simplest function first, and the note names the others that fit equally well:
linear, relu, leaky_relu, threshold, logistic, tanh, softplus, gelu, silu. For instance when z is
never negative, y == z fits linear, relu and leaky_relu alike and linear is chosen; when z is
never positive and y is all zeros, relu is chosen over a threshold unit that never fires (unless
the output is stored as integers or booleans, which only binary kinds produce).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from actdoc.model import ActivationKind, ArraySource, to_observations

#: At most this many observations (samples times spatial positions) are read for inference.
SAMPLE_OBSERVATIONS = 4096
#: At most this many (z, y) values are compared; wide layers read fewer rows.
SAMPLE_VALUES = 65536
#: Allowed disagreement, in machine epsilons of the coarser dtype, per unit of |y| (rounding of
#: y and a few ulp of error in the framework's own function) and per unit of |z| (z rounded on
#: storage after f was computed from the wider value: |f'| <= 1.13 times half an epsilon).
TOLERANCE_Y_EPSILONS = 8
TOLERANCE_Z_EPSILONS = 2
#: Relu is guessed from the output alone when at least this share of values is exactly zero.
RELU_ZERO_SHARE = 0.01
#: Binned calibration of a stochastic binary unit: bins, and the slack beyond binomial error.
CALIBRATION_BINS = 10
CALIBRATION_SLACK = 0.02

Kind = ActivationKind


@dataclass(frozen=True)
class KindGuess:
    """An inferred kind, its leaky slope or threshold where it has one, and how it was found."""

    kind: ActivationKind
    negative_slope: float | None = None
    note: str = ""
    threshold: float | None = None


def logistic(z: np.ndarray) -> np.ndarray:
    """1 / (1 + exp(-z)) without overflow on either side."""
    out = np.empty_like(z)
    positive = z >= 0
    out[positive] = 1.0 / (1.0 + np.exp(-z[positive]))
    e = np.exp(z[~positive])
    out[~positive] = e / (1.0 + e)
    return out


_erf = np.frompyfunc(math.erf, 1, 1)


def gelu_erf(z: np.ndarray) -> np.ndarray:
    """The exact gelu, z * Phi(z) with Phi the standard normal distribution function."""
    return 0.5 * z * (1.0 + _erf(z / math.sqrt(2.0)).astype(np.float64))


def gelu_tanh(z: np.ndarray) -> np.ndarray:
    """The tanh approximation of gelu (Hendrycks and Gimpel 2016, section 2)."""
    return 0.5 * z * (1.0 + np.tanh(math.sqrt(2.0 / math.pi) * (z + 0.044715 * z**3)))


FUNCTIONS: dict[ActivationKind, Callable[[np.ndarray], np.ndarray]] = {
    Kind.LINEAR: lambda z: z,
    Kind.RELU: lambda z: np.maximum(z, 0.0),
    Kind.LOGISTIC: logistic,
    Kind.TANH: np.tanh,
    Kind.SOFTPLUS: lambda z: np.logaddexp(0.0, z),
    Kind.GELU: gelu_erf,
    Kind.SILU: lambda z: z * logistic(z),
}

PREFERENCE = (Kind.LINEAR, Kind.RELU, Kind.LEAKY_RELU, Kind.THRESHOLD, Kind.LOGISTIC, Kind.TANH,
              Kind.SOFTPLUS, Kind.GELU, Kind.SILU)


def epsilon(dtype: np.dtype) -> float:
    """Machine epsilon of a float dtype; integers and booleans are exact."""
    dt = np.dtype(dtype)
    return float(np.finfo(dt).eps) if dt.kind == "f" else 0.0


def leading_values(source: ArraySource) -> np.ndarray:
    """The first rows of an array, as ``[observations, units]`` float64, in one read."""
    shape = tuple(source.shape)
    positions = math.prod(shape[2:]) if len(shape) > 2 else 1
    per_row = max(1, math.prod(shape[1:]))
    rows = max(1, min(shape[0], SAMPLE_OBSERVATIONS // positions, SAMPLE_VALUES // per_row))
    block = to_observations(np.asarray(source.read_samples(0, rows)))
    # A float type wider than float64 (x87 extended precision, which an HDF5 file may declare)
    # holds values float64 cannot: past its range (cast to inf) and invalid encodings (cast to
    # NaN). Both are non-finite, so the fits drop them; numpy need not warn about it.
    with np.errstate(over="ignore", invalid="ignore"):
        return block.astype(np.float64)


def infer_kind(preact_source: ArraySource | None, output_source: ArraySource | None) -> KindGuess:
    """The layer's kind from its (preact, output) pairs, its output alone, or nothing."""
    if output_source is None:
        what = "only pre-activations are stored" if preact_source is not None else \
            "no activations are stored (weights only)"
        return KindGuess(Kind.LINEAR, note=f"{what}, so the function cannot be seen: treated as "
                                            f"linear; declare the activation to be sure")
    y = leading_values(output_source).reshape(-1)
    y_dtype = np.dtype(output_source.dtype)
    # Huge finite values overflow the tolerances and the slope fit to inf or NaN, which then
    # fails (or, for a tolerance, widens) the comparison as it should: no warning to print.
    with np.errstate(over="ignore", invalid="ignore"):
        if preact_source is None:
            return from_output(y, y_dtype)
        z = leading_values(preact_source).reshape(-1)
        return from_pairs(z, y, np.dtype(preact_source.dtype), y_dtype)


#: The note a layer gets when its stored pre-activations look like a copy of its outputs.
IN_PLACE_NOTE = (
    "preact equals output exactly and is never negative on the first {n} observations: it was "
    "probably recorded after an in-place activation overwrote it (copy z before the activation "
    "runs, as actdoc.capture does; docs/dump-layout.md), so the findings describe y, not z")


def in_place_note(preact_source: ArraySource, output_source: ArraySource) -> str:
    """A warning when the first block of z equals y exactly and is never negative, the mark of
    a framework hook that kept a reference to z while an in-place rectifier overwrote it; ""
    otherwise. Reads one bounded block of each array, like inference."""
    if tuple(preact_source.shape) != tuple(output_source.shape):
        return ""
    z = leading_values(preact_source)
    y = leading_values(output_source)
    if z.shape != y.shape or z.size == 0 or not np.isfinite(z).all():
        return ""
    if np.array_equal(z, y) and z.min() >= 0 and z.max() > 0:
        return IN_PLACE_NOTE.format(n=z.shape[0])
    return ""


def from_output(y: np.ndarray, y_dtype: np.dtype, prefix: str = "") -> KindGuess:
    """Best guess from output values alone (rule documented in docs/dump-layout.md)."""
    y = y[np.isfinite(y)]
    lead = prefix or "guessed from the output alone (no preact stored)"
    if y.size == 0:
        return KindGuess(Kind.LINEAR, note=f"{lead}: no finite output values; treated as linear")
    low, high = float(y.min()), float(y.max())
    if np.all((y == 0) | (y == 1)):
        return KindGuess(Kind.THRESHOLD, note=f"{lead}: values are only 0 and 1 (a stochastic "
                                              f"binary unit looks the same without its preact)")
    zero_share = float(np.mean(y == 0))
    if low >= 0 and zero_share >= RELU_ZERO_SHARE:
        return KindGuess(Kind.RELU, note=f"{lead}: values >= 0 with {zero_share:.0%} exact zeros")
    if low >= 0 and high <= 1:
        return KindGuess(Kind.LOGISTIC, note=f"{lead}: values within [0, 1]")
    if low >= -1 and high <= 1:
        return KindGuess(Kind.TANH, note=f"{lead}: values within [-1, 1], some negative")
    return KindGuess(Kind.LINEAR, note=f"{lead}: values from {low:.3g} to {high:.3g} match no "
                                       f"rule; could not be identified, treated as linear")


class PairTest:
    """Fits of the known functions to (z, y) pairs within a dtype-aware tolerance."""

    def __init__(self, z: np.ndarray, y: np.ndarray, z_dtype: np.dtype, y_dtype: np.dtype):
        self.z, self.y = z, y
        eps = max(epsilon(z_dtype), epsilon(y_dtype), float(np.finfo(np.float64).eps))
        self.tolerance = eps * (TOLERANCE_Y_EPSILONS * np.abs(y) + TOLERANCE_Z_EPSILONS * np.abs(z)
                                + 1e-3)
        self.integer_output = np.dtype(y_dtype).kind in "iub"
        self.binary = bool(np.all((y == 0) | (y == 1)))

    def matches(self, values: Callable[[np.ndarray], np.ndarray]) -> bool:
        """All pairs within tolerance; a short prefix is tried first to fail cheaply."""
        head = slice(0, 512)
        if not np.all(np.abs(values(self.z[head]) - self.y[head]) <= self.tolerance[head]):
            return False
        return bool(np.all(np.abs(values(self.z) - self.y) <= self.tolerance))

    def leaky_slope(self) -> float | None:
        """The slope on the negative side when a leaky rectifier fits, rounded where it can be."""
        negative = self.z < 0
        if not np.any(negative):
            return None
        zn, yn = self.z[negative], self.y[negative]
        slope = float(np.dot(yn, zn) / np.dot(zn, zn))
        if not 0.0 < slope < 1.0:
            return None
        for decimals in range(1, 7):
            rounded = round(slope, decimals)
            if 0.0 < rounded < 1.0 and self.matches(lambda z: np.where(z > 0, z, rounded * z)):
                return rounded
        return slope if self.matches(lambda z: np.where(z > 0, z, slope * z)) else None

    def threshold_gap(self) -> tuple[float, float] | None:
        """(lo, hi) with every non-firing z <= lo < hi <= every firing z, if such a gap exists."""
        if not self.binary:
            return None
        fired = self.y == 1
        lo = float(self.z[~fired].max()) if np.any(~fired) else -math.inf
        hi = float(self.z[fired].min()) if np.any(fired) else math.inf
        return (lo, hi) if lo < hi else None


def threshold_in_gap(lo: float, hi: float) -> float:
    """A threshold theta with lo <= theta < hi: zero if it fits, else the gap's middle."""
    if lo <= 0.0 < hi:
        return 0.0
    if math.isinf(hi):
        return lo
    if math.isinf(lo):
        return float(np.nextafter(hi, -math.inf))
    return 0.5 * (lo + hi)


def from_pairs(z: np.ndarray, y: np.ndarray, z_dtype: np.dtype, y_dtype: np.dtype) -> KindGuess:
    """Identify the function from (z, y) pairs; see the module docstring for ties."""
    finite = np.isfinite(z) & np.isfinite(y)
    z, y = z[finite], y[finite]
    if z.size == 0:
        return from_output(y, y_dtype, "no finite (preact, output) pairs")
    test = PairTest(z, y, z_dtype, y_dtype)
    fits: dict[ActivationKind, KindGuess] = {}
    for kind in PREFERENCE:
        guess = candidate(test, kind)
        if guess is not None:
            fits[kind] = guess
    counted = f"{z.size} observations"
    if fits:
        kind, chosen = next(iter(fits.items()))
        others = [k.value for k in fits if k is not kind]
        tie = f"; {', '.join(others)} fit equally well on this sample" if others else ""
        note = f"identified from (preact, output) pairs: {chosen.note or kind.value} on " \
               f"{counted}{tie}"
        return KindGuess(kind, chosen.negative_slope, note, chosen.threshold)
    if test.binary:
        return stochastic_guess(z, y, counted)
    return from_output(y, y_dtype, "(preact, output) pairs match no known function, guessed "
                                   "from the output range")


def candidate(test: PairTest, kind: ActivationKind) -> KindGuess | None:
    """The guess for ``kind`` when it fits the pairs, else None."""
    if test.integer_output and kind is not Kind.THRESHOLD:
        return None
    if kind is Kind.LEAKY_RELU:
        slope = test.leaky_slope()
        return None if slope is None else KindGuess(kind, slope, f"leaky_relu, slope {slope:g}")
    if kind is Kind.THRESHOLD:
        gap = test.threshold_gap()
        if gap is None:
            return None
        theta = threshold_in_gap(*gap)
        return KindGuess(kind, note=f"threshold {theta:g} (any value in [{gap[0]:.4g}, "
                                    f"{gap[1]:.4g}) separates the sample)", threshold=theta)
    if kind is Kind.GELU:
        exact = test.matches(gelu_erf)
        approx = test.matches(gelu_tanh)
        if exact and approx:
            return KindGuess(kind, note="gelu (erf form; its tanh approximation agrees at this "
                                        "precision)")
        if exact or approx:
            return KindGuess(kind, note="gelu (erf form)" if exact else "gelu (tanh approximation)")
        return None
    return KindGuess(kind, note=kind.value) if test.matches(FUNCTIONS[kind]) else None


def stochastic_guess(z: np.ndarray, y: np.ndarray, counted: str) -> KindGuess:
    """0/1 outputs that are not a function of z: a sampled binary unit.

    The note says whether the firing rate follows logistic(z): in each of up to ten bins of z
    (equal counts), the share of ones must lie within four binomial standard errors plus a small
    slack of the mean logistic(z).
    """
    agree = float(np.mean((z > 0) == (y == 1)))
    order = np.argsort(z, kind="stable")
    bins = np.array_split(order, min(CALIBRATION_BINS, max(1, z.size // 100)))
    calibrated = True
    for members in bins:
        p = float(np.mean(logistic(z[members])))
        rate = float(np.mean(y[members]))
        allowed = 4.0 * math.sqrt(max(p * (1 - p), 1e-12) / members.size) + CALIBRATION_SLACK
        calibrated &= abs(rate - p) <= allowed
    rate_text = "the firing rate follows logistic(z)" if calibrated else \
        "the firing rate does not follow logistic(z)"
    return KindGuess(Kind.STOCHASTIC_BINARY,
                     note=f"outputs are 0/1 but not a function of the preact (agree with z > 0 on "
                          f"{agree:.1%} of {counted}); {rate_text}")
