"""Central moments per unit that merge exactly, and the bimodality coefficient built on them.

A slice's count, mean and central sums M2, M3, M4 are combined with Pebay's pairwise formulas
(P. Pebay, "Formulas for robust, one-pass parallel computation of covariances and arbitrary-order
statistical moments", Sandia report SAND2008-6212, eq. 3.1), so statistics of blocks, shards and
workers merge to the one-pass result within rounding, with no catastrophic cancellation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Moments:
    """Per-unit count (float64 for the formulas), mean and central sums of powers 2 to 4."""

    count: np.ndarray
    mean: np.ndarray
    m2: np.ndarray
    m3: np.ndarray
    m4: np.ndarray

    @classmethod
    def zeros(cls, units: int) -> "Moments":
        return cls(*(np.zeros(units) for _ in range(5)))

    def copy(self) -> "Moments":
        return Moments(self.count.copy(), self.mean.copy(), self.m2.copy(), self.m3.copy(),
                       self.m4.copy())

    def combine(self, other: "Moments") -> "Moments":
        """Pebay's pairwise update: the moments of both sets of observations together."""
        na, nb = self.count, other.count
        n = na + nb
        safe = np.where(n > 0, n, 1.0)
        delta = other.mean - self.mean
        nanb = na * nb
        d_n = delta / safe
        d_n2 = d_n * d_n
        mean = self.mean + nb * d_n
        m2 = self.m2 + other.m2 + delta * d_n * nanb
        m3 = (self.m3 + other.m3 + delta * d_n2 * nanb * (na - nb)
              + 3.0 * d_n * (na * other.m2 - nb * self.m2))
        m4 = (self.m4 + other.m4 + delta * d_n2 * d_n * nanb * (na * na - nanb + nb * nb)
              + 6.0 * d_n2 * (na * na * other.m2 + nb * nb * self.m2)
              + 4.0 * d_n * (na * other.m3 - nb * self.m3))
        return Moments(n, mean, m2, m3, m4)

    # ------------------------------------------------------------------ derived per unit
    @property
    def total(self) -> np.ndarray:
        """Sum of the values."""
        return self.count * self.mean

    @property
    def total_squares(self) -> np.ndarray:
        """Sum of the squared values."""
        return self.m2 + self.count * self.mean * self.mean

    def std(self) -> np.ndarray:
        """Population standard deviation (NaN where no observation)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(np.where(self.count > 0, self.m2 / self.count, np.nan))

    def bimodality(self) -> np.ndarray:
        """Bimodality coefficient per unit (NaN where n < 4 or the unit does not vary)."""
        return bimodality_coefficient(self.count, self.m2, self.m3, self.m4)


class PowerSums:
    """Sums of (x - K)^p, p = 0..4, per unit, over the slices of one block.

    K is the column mean of the first slice seen for each unit, so the deviations stay small and
    converting to central moments loses nothing; adding a slice is four reductions and no
    per-slice combination. Slices may cover a run of units (``cols``), as tiles of a block do.
    """

    def __init__(self, units: int):
        self.shift: np.ndarray | None = None
        self.sums = np.zeros((5, units))
        self._shifted = np.zeros(units, bool)

    def add(self, x: np.ndarray, scratch: np.ndarray, valid: np.ndarray | None = None,
            cols: slice = slice(None)) -> None:
        """Add the float64 slice ``x`` of the units ``cols`` (overwritten; ``scratch`` has its
        shape). With ``valid`` (bool, same shape) only True entries count; ``x`` must hold 0
        elsewhere.
        """
        sums = self.sums[:, cols]
        if valid is None:
            count = x.shape[0]
        else:
            count = np.add.reduce(valid, axis=0, dtype=np.float64)
        if self.shift is None:
            self.shift = np.zeros(self.sums.shape[1])
        if not self._shifted[cols].all():
            self.shift[cols] = np.add.reduce(x, axis=0) / np.maximum(count, 1)
            self._shifted[cols] = True
        shift = self.shift[cols]
        sums[0] += count
        np.subtract(x, shift, out=x)
        if valid is not None:
            np.multiply(x, valid, out=x)
        sums[1] += np.add.reduce(x, axis=0)
        np.multiply(x, x, out=scratch)
        sums[2] += np.add.reduce(scratch, axis=0)
        np.multiply(x, scratch, out=x)
        sums[3] += np.add.reduce(x, axis=0)
        np.multiply(scratch, scratch, out=scratch)
        sums[4] += np.add.reduce(scratch, axis=0)

    def needs_shift(self, cols: slice) -> bool:
        """Whether the units ``cols`` have no shift yet (their first slice is next)."""
        return not self._shifted[cols].all()

    def shift_of(self, cols: slice) -> np.ndarray:
        if self.shift is None:
            self.shift = np.zeros(self.sums.shape[1])
        return self.shift[cols]

    def add_partial(self, cols: slice, count: int, partial: np.ndarray,
                    shift: np.ndarray | None = None) -> None:
        """Add a slice's sums of (x - K)^p, p = 1..4 (``partial``, [4, units]), over ``count``
        rows of the units ``cols``, computed elsewhere (the fused kernel) exactly as ``add``
        computes them; ``shift`` sets K where the slice was the units' first."""
        if shift is not None:
            self.shift_of(cols)[:] = shift
            self._shifted[cols] = True
        sums = self.sums[:, cols]
        sums[0] += count
        sums[1:] += partial

    def moments(self) -> Moments:
        """Central moments from the shifted power sums."""
        n, s1, s2, s3, s4 = self.sums
        shift = np.zeros_like(n) if self.shift is None else self.shift
        with np.errstate(invalid="ignore", divide="ignore"):
            d = np.where(n > 0, s1 / np.where(n > 0, n, 1.0), 0.0)
        m2 = s2 - n * d * d
        m3 = s3 - 3.0 * d * s2 + 2.0 * n * d ** 3
        m4 = s4 - 4.0 * d * s3 + 6.0 * d * d * s2 - 3.0 * n * d ** 4
        return Moments(n.copy(), shift + d, np.maximum(m2, 0.0), m3, np.maximum(m4, 0.0))


def sample_skewness(n, m2, m3):
    """Adjusted Fisher-Pearson skewness G1 (scipy.stats.skew with bias=False)."""
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        g1 = (m3 / n) / (m2 / n) ** 1.5
        return np.sqrt(n * (n - 1.0)) / (n - 2.0) * g1


def sample_excess_kurtosis(n, m2, m4):
    """Bias-corrected excess kurtosis G2 (scipy.stats.kurtosis with bias=False)."""
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        g2 = (m4 / n) / (m2 / n) ** 2 - 3.0
        return (n - 1.0) / ((n - 2.0) * (n - 3.0)) * ((n + 1.0) * g2 + 6.0)


def bimodality_coefficient(n, m2, m3, m4):
    """BC = (g^2 + 1) / (k + 3(n-1)^2 / ((n-2)(n-3))) (Pfister et al. 2013, Front. Psychol.).

    g and k are the sample skewness and excess kurtosis. Large-sample values: 1/3 for a normal
    distribution, 5/9 for a uniform one, 1 for a symmetric two-point one; above 5/9 suggests
    bimodality.
    """
    n = np.asarray(n, dtype=np.float64)
    g = sample_skewness(n, m2, m3)
    k = sample_excess_kurtosis(n, m2, m4)
    with np.errstate(invalid="ignore", divide="ignore"):
        bc = (g * g + 1.0) / (k + 3.0 * (n - 1.0) ** 2 / ((n - 2.0) * (n - 3.0)))
    spread = np.asarray(m2, dtype=np.float64)
    return np.where((n >= 4) & (spread > 0), bc, np.nan)
