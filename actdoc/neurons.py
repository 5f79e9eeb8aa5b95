"""The transfer functions actdoc knows: f(z), f'(z), the inverse, and the zones that matter.

Every function is vectorised, keeps float32 input in float32, and is numerically stable: no
overflow or divide warnings for large |z| or for outputs at an asymptote. ``Neuron`` bundles
one layer's function with its parameters (leaky slope, firing threshold) so the statistics pass
can ask one object for values, gains and zone edges.

Zones (z is the total input):

- saturated: the output is within a margin of an asymptote. Logistic: y < m or y > 1 - m,
  i.e. |z| > logit(1 - m) (m = 0.01 gives ln 99 ~ 4.595). Tanh: |y| > level, i.e.
  |z| > atanh(level) (level 0.99 gives ~ 2.647).
- near-linear: the gain is still close to its maximum, f'(z) >= share * max f'. Logistic:
  s(1 - s) >= share / 4 gives |z| <= 2 atanh(sqrt(1 - share)) (~ 0.655 for share 0.9). Tanh:
  1 - tanh(z)^2 >= share gives |z| <= atanh(sqrt(1 - share)) (~ 0.328 for share 0.9).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from actdoc.model import ActivationKind

Kind = ActivationKind
SQRT_HALF = math.sqrt(0.5)
INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


def _floats(z: np.ndarray | float) -> np.ndarray:
    """Float view of the input: float32/float64 kept, anything else becomes float64."""
    arr = np.asarray(z)
    if arr.dtype not in (np.float32, np.float64):
        arr = arr.astype(np.float64)
    return arr


def logistic(z, out: np.ndarray | None = None):
    """1 / (1 + exp(-z)) without overflow: exp is only ever taken of -|z|.

    With z >= 0 it is 1 / (1 + e), else e / (1 + e), e = exp(-|z|). The numerator is
    max(e, [z >= 0]) (e <= 1, NaN kept), so the result is computed in place in ``out`` (z's
    dtype and shape) with one exp and one division per value and no masked copy: bit for bit
    the values of the two-branch formula, about six times faster in float32.
    """
    z = _floats(z)
    if out is None:
        out = np.empty_like(z)
    numerator = np.empty_like(z)
    np.abs(z, out=out)
    np.negative(out, out=out)
    np.exp(out, out=out)
    np.greater_equal(z, 0, out=numerator)
    np.maximum(out, numerator, out=numerator)
    np.add(out, z.dtype.type(1), out=out)
    return np.divide(numerator, out, out=out)


def logit(y):
    """Inverse of the logistic: log(y) - log(1 - y); 0 and 1 map to -inf and +inf."""
    y = _floats(y)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(y) - np.log1p(-y)


def normal_cdf(z):
    """Standard normal CDF via erf (Abramowitz & Stegun 7.1.26, |error| < 1.5e-7).

    numpy has no erf and the core depends on numpy alone; 1.5e-7 is below float32 resolution.
    """
    z = _floats(z)
    x = np.minimum(np.abs(z), 40.0) * SQRT_HALF  # erf(x) == 1 in float64 long before 40
    t = 1.0 / (1.0 + 0.3275911 * x)
    poly = t * (0.254829592 + t * (-0.284496736 + t * (1.421413741
                + t * (-1.453152027 + t * 1.061405429))))
    erf_abs = 1.0 - poly * np.exp(-x * x)
    return (0.5 * (1.0 + np.sign(z) * erf_abs)).astype(z.dtype, copy=False)


def normal_pdf(z):
    z = _floats(z)
    clipped = np.minimum(np.abs(z), 40.0)
    return (INV_SQRT_2PI * np.exp(-0.5 * clipped * clipped)).astype(z.dtype, copy=False)


def _silu_gain(z: float) -> float:
    s = 1.0 / (1.0 + math.exp(-z))
    return s * (1.0 + z * (1.0 - s))


def _silu_peak() -> float:
    """Maximum of SiLU' : the root of 2 + z(1 - 2 s(z)) = 0 (SiLU'' = 0), found by bisection."""
    lo, hi = 1.0, 4.0
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        s = 1.0 / (1.0 + math.exp(-mid))
        if 2.0 + mid * (1.0 - 2.0 * s) > 0:
            lo = mid
        else:
            hi = mid
    return _silu_gain(0.5 * (lo + hi))


def _gelu_peak() -> float:
    """Maximum of GELU' = Phi(z) + z phi(z): GELU'' = phi(z)(2 - z^2) vanishes at z = sqrt 2."""
    z = math.sqrt(2.0)
    return 0.5 * (1.0 + math.erf(z * SQRT_HALF)) + z * INV_SQRT_2PI * math.exp(-0.5 * z * z)


#: Largest value of f' for each kind (the supremum for softplus). None: no useful gain.
MAX_GAIN: dict[Kind, float | None] = {
    Kind.LINEAR: 1.0,
    Kind.THRESHOLD: None,
    Kind.RELU: 1.0,
    Kind.LEAKY_RELU: 1.0,
    Kind.LOGISTIC: 0.25,
    Kind.TANH: 1.0,
    Kind.STOCHASTIC_BINARY: 0.25,
    Kind.SOFTPLUS: 1.0,
    Kind.GELU: _gelu_peak(),
    Kind.SILU: _silu_peak(),
}

#: Kinds whose output is never negative (mean |y| is then the plain mean).
NONNEGATIVE_OUTPUT = frozenset({Kind.RELU, Kind.LOGISTIC, Kind.THRESHOLD,
                                Kind.STOCHASTIC_BINARY, Kind.SOFTPLUS})


@dataclass(frozen=True)
class Zone:
    """A band of total input and the matching band of output (f is monotone where defined)."""

    z_low: float
    z_high: float
    y_low: float
    y_high: float


def logistic_saturation_edge(margin: float) -> float:
    """|z| beyond which a logistic output is within ``margin`` of 0 or 1: logit(1 - margin)."""
    return math.log((1.0 - margin) / margin)


def tanh_saturation_edge(level: float) -> float:
    """|z| beyond which |tanh z| exceeds ``level``: atanh(level)."""
    return math.atanh(level)


@dataclass(frozen=True)
class Neuron:
    """One layer's transfer function with its parameters."""

    kind: Kind
    negative_slope: float = 0.01
    threshold: float = 0.0

    # ----------------------------------------------------------------------------- values
    def output(self, z, out: np.ndarray | None = None):
        """y = f(z). For stochastic binary units: the firing probability logistic(z).

        ``out`` (z's dtype and shape) takes the result where given, saving an allocation per
        call; a linear unit returns z itself.
        """
        z = _floats(z)
        kind = self.kind
        if kind is Kind.LINEAR:
            return z
        if out is None:
            out = np.empty_like(z)
        if kind is Kind.RELU:
            return np.maximum(z, z.dtype.type(0), out=out)
        if kind is Kind.LEAKY_RELU:
            out[...] = np.where(z > 0, z, z * z.dtype.type(self.negative_slope))
            return out
        if kind is Kind.THRESHOLD:
            np.greater(z, self.threshold, out=out, casting="unsafe")
            return out
        if kind in (Kind.LOGISTIC, Kind.STOCHASTIC_BINARY):
            return logistic(z, out=out)
        if kind is Kind.TANH:
            return np.tanh(z, out=out)
        if kind is Kind.SOFTPLUS:
            return np.logaddexp(z.dtype.type(0), z, out=out)
        if kind is Kind.GELU:
            return np.multiply(z, normal_cdf(z), out=out)
        if kind is Kind.SILU:
            return np.multiply(z, logistic(z), out=out)
        raise ValueError(kind)

    def gain(self, z):
        """f'(z): the factor by which the unit passes a gradient back (0 for threshold units)."""
        z = _floats(z)
        kind = self.kind
        one = z.dtype.type(1)
        if kind is Kind.LINEAR:
            return np.ones_like(z)
        if kind is Kind.RELU:
            return (z > 0).astype(z.dtype)
        if kind is Kind.LEAKY_RELU:
            return np.where(z > 0, one, z.dtype.type(self.negative_slope))
        if kind is Kind.THRESHOLD:
            return np.zeros_like(z)
        if kind in (Kind.LOGISTIC, Kind.STOCHASTIC_BINARY):
            s = logistic(z)
            return s * (one - s)
        if kind is Kind.TANH:
            t = np.tanh(z)
            return one - t * t
        if kind is Kind.SOFTPLUS:
            return logistic(z)
        if kind is Kind.GELU:
            return normal_cdf(z) + z * normal_pdf(z)
        if kind is Kind.SILU:
            s = logistic(z)
            return s * (one + z * (one - s))
        raise ValueError(kind)

    @property
    def invertible(self) -> bool:
        """Whether the total input can be read back from the output alone."""
        if self.kind is Kind.LEAKY_RELU:
            return self.negative_slope > 0
        return self.kind in (Kind.LINEAR, Kind.LOGISTIC, Kind.TANH, Kind.SOFTPLUS)

    def inverse(self, y):
        """z = f^-1(y) for invertible kinds (asymptotes map to +-inf); ValueError otherwise."""
        y = _floats(y)
        kind = self.kind
        if not self.invertible:
            raise ValueError(f"{kind.value} outputs do not determine the total input")
        if kind is Kind.LINEAR:
            return y
        if kind is Kind.LEAKY_RELU:
            return np.where(y > 0, y, y / y.dtype.type(self.negative_slope))
        if kind is Kind.LOGISTIC:
            return logit(y)
        with np.errstate(divide="ignore", invalid="ignore"):
            if kind is Kind.TANH:
                return np.arctanh(y)
            return y + np.log(-np.expm1(-y))  # softplus: log(e^y - 1), stable for large y

    @property
    def max_gain(self) -> float | None:
        """max f' (0.25 logistic, 1 tanh); for leaky units the larger of 1 and the slope."""
        if self.kind is Kind.LEAKY_RELU:
            return max(1.0, abs(self.negative_slope))
        return MAX_GAIN[self.kind]

    # ------------------------------------------------------------------------------ zones
    def saturation_zone(self, logistic_margin: float, tanh_level: float) -> Zone | None:
        """Inputs inside (z_low, z_high) are unsaturated; None where the kind does not saturate.

        Stochastic binary units use the logistic edges on their firing probability.
        """
        if self.kind in (Kind.LOGISTIC, Kind.STOCHASTIC_BINARY):
            edge = logistic_saturation_edge(logistic_margin)
            return Zone(-edge, edge, logistic_margin, 1.0 - logistic_margin)
        if self.kind is Kind.TANH:
            edge = tanh_saturation_edge(tanh_level)
            return Zone(-edge, edge, -tanh_level, tanh_level)
        return None

    def linear_zone(self, gain_share: float) -> Zone | None:
        """Inputs where f'(z) >= gain_share * max f' (logistic and tanh); None elsewhere."""
        root = math.sqrt(1.0 - gain_share)
        if self.kind is Kind.LOGISTIC:
            edge = 2.0 * math.atanh(root)
            return Zone(-edge, edge, 0.5 * (1.0 - root), 0.5 * (1.0 + root))
        if self.kind is Kind.TANH:
            edge = math.atanh(root)
            return Zone(-edge, edge, -root, root)
        return None
