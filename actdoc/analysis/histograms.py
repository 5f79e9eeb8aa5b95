"""Fixed-edge histograms of a layer's total inputs and outputs.

Edges depend only on the activation kind, never on the data, so histograms of blocks, shards and
workers add up exactly. Bounded outputs (logistic, tanh, binary) get a uniform grid over their
range; everything else gets an asinh-spaced grid: uniform steps of about 0.04 near zero, growing
geometrically to +-10^4, so one grid shows both a unit's fine structure and an exploding layer.
Values beyond the outer edges are counted in the outer bins. Zero is an edge of the asinh grid,
so the exact zeros of silent rectified units all land in the bin just above it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from actdoc.model import ActivationKind

Kind = ActivationKind
ASINH_SCALE = 0.05
ASINH_EXTENT = 1e4
ASINH_BINS = 64
BOUNDED_BINS = 40


@dataclass(frozen=True)
class Grid:
    """Bin edges fixed before any data is seen: uniform in x, or in asinh(x / scale).

    Bins are found arithmetically (no search): ``bins`` equal steps of the transformed value
    between ``low`` and ``high``.
    """

    low: float
    high: float
    bins: int
    scale: float | None = None

    @property
    def edges(self) -> np.ndarray:
        steps = np.linspace(self.low, self.high, self.bins + 1)
        if self.scale is None:
            return steps
        edges = self.scale * np.sinh(steps)
        edges[np.abs(steps) < 1e-12] = 0.0
        return edges

    def positions(self, values: np.ndarray) -> np.ndarray:
        """Each value's place on the grid in bins, as float64 (before clipping to the range)."""
        flat = np.asarray(values, dtype=np.float64).reshape(-1)
        if self.scale is not None:
            flat = np.arcsinh(flat / self.scale)
        return (flat - self.low) * (self.bins / (self.high - self.low))

    def count(self, values: np.ndarray) -> np.ndarray:
        """Counts per bin of ``values`` (outer bins take the overflow and +-inf; NaN dropped).

        float32 input goes through a lookup table that gives exactly the bins of the float64
        arithmetic below (``Float32Bins``), about three times faster; anything else, and any
        input holding a non-finite value, takes the arithmetic directly.
        """
        flat = np.asarray(values).reshape(-1)
        if flat.dtype == np.float32:
            table = float32_bins(self)
            counts = None if table is None else table.count(flat)
            if counts is not None:
                return counts
        position = self.positions(flat)
        position = position[~np.isnan(position)]
        np.minimum(np.maximum(position, 0, out=position), self.bins - 1, out=position)
        return np.bincount(position.astype(np.intp), minlength=self.bins).astype(np.int64)


class Float32Bins:
    """A grid's bins for float32 values, by table lookup on the top 16 bits of each value.

    ``thresholds[k - 1]`` is the smallest float32 whose float64 grid position is at least k, so
    a value's bin is the number of thresholds at or below it: exactly what ``Grid.count``'s
    arithmetic gives, found by bisection once per grid. ``table`` maps the top 16 bits (sign,
    exponent, 7 mantissa bits) to the bin of the smallest value sharing them; one comparison
    with the next threshold finishes the job, since no 16-bit bucket (0.8% wide) holds two
    thresholds of these grids (checked when the table is built). Infinite and NaN buckets map
    past the last bin, and their presence sends the input back to the arithmetic path.
    """

    def __init__(self, thresholds: np.ndarray, table: np.ndarray, bins: int):
        self.bins = bins
        self.table = table
        self.next_threshold = np.concatenate(
            [thresholds, np.full(2, np.inf, np.float32)]).astype(np.float32)

    def count(self, values: np.ndarray) -> np.ndarray | None:
        index = self.table[values.view(np.uint32) >> 16]
        index += values >= self.next_threshold[index]
        counts = np.bincount(index, minlength=self.bins + 2)
        if counts[self.bins:].any():
            return None
        return counts[: self.bins].astype(np.int64)


def _ordered_to_float32(keys: np.ndarray) -> np.ndarray:
    """Inverse of the monotone map float32 -> int64 (negative values mirrored below zero)."""
    bits = np.where(keys >= 0, keys, np.int64(0x80000000) | -keys).astype(np.uint32)
    return bits.view(np.float32)


@lru_cache(maxsize=None)
def _float32_bins(low: float, high: float, bins: int, scale: float | None) -> Float32Bins | None:
    grid = Grid(low, high, bins, scale)
    wanted = np.arange(1, bins, dtype=np.float64)
    below = np.full(bins - 1, -0x7F800000, np.int64)  # -inf: position < k
    above = np.full(bins - 1, 0x7F800000, np.int64)  # +inf: position >= k
    with np.errstate(invalid="ignore", over="ignore"):
        while (above - below > 1).any():
            middle = below + (above - below) // 2
            reached = grid.positions(_ordered_to_float32(middle)) >= wanted
            above = np.where(reached, middle, above)
            below = np.where(reached, below, middle)
        thresholds = _ordered_to_float32(above)
        buckets = np.arange(1 << 16, dtype=np.int64)
        negative = buckets >= 1 << 15
        # Smallest and largest value of each bucket (negative buckets run the other way).
        lowest = np.where(negative, (buckets << 16) | 0xFFFF, buckets << 16).astype(np.uint32)
        highest = np.where(negative, buckets << 16, (buckets << 16) | 0xFFFF).astype(np.uint32)
        lowest, highest = lowest.view(np.float32), highest.view(np.float32)
        first = np.searchsorted(thresholds, lowest, side="right")
        last = np.searchsorted(thresholds, highest, side="right")
    finite = np.isfinite(lowest) & np.isfinite(highest)
    if ((last - first)[finite] > 1).any() or (np.diff(thresholds) <= 0).any():
        return None  # a bucket would need two comparisons: keep the arithmetic path
    table = np.where(finite, first, bins).astype(np.int16)
    return Float32Bins(thresholds, table, bins)


def float32_bins(grid: Grid) -> Float32Bins | None:
    """The lookup table of ``grid`` (built once per grid), or None where it cannot be exact."""
    return _float32_bins(grid.low, grid.high, grid.bins, grid.scale)


ASINH_GRID = Grid(-math.asinh(ASINH_EXTENT / ASINH_SCALE), math.asinh(ASINH_EXTENT / ASINH_SCALE),
                  ASINH_BINS, ASINH_SCALE)


def grids_for(kind: Kind) -> dict[str, Grid]:
    """The preact and output grids of a kind."""
    if kind in (Kind.LOGISTIC, Kind.STOCHASTIC_BINARY):
        output = Grid(0.0, 1.0, BOUNDED_BINS)
    elif kind is Kind.TANH:
        output = Grid(-1.0, 1.0, BOUNDED_BINS)
    elif kind is Kind.THRESHOLD:
        output = Grid(-0.5, 1.5, 2)
    else:
        output = ASINH_GRID
    return {"preact": ASINH_GRID, "output": output}


def sample_stride(observations: int, rows_wanted: int) -> int:
    """Every k-th observation row is histogrammed: at most about ``rows_wanted`` in all."""
    return max(1, -(-observations // max(1, rows_wanted)))


def sampled_rows(block: np.ndarray, first_row: int, stride: int) -> np.ndarray:
    """The rows of ``block`` whose global index (``first_row`` + local) is a multiple of stride."""
    return block[(-first_row) % stride::stride]
