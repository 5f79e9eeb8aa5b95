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

        float32 and float64 input goes through a lookup table that gives exactly the bins of
        the float64 arithmetic below (``TableBins``), several times faster; anything else takes
        the arithmetic directly. Any shape is accepted; strided views are not copied.
        """
        values = np.asarray(values)
        if values.dtype in (np.float32, np.float64):
            table = table_bins(self, values.dtype)
            if table is not None:
                return table.count(values)
        position = self.positions(values)
        position = position[~np.isnan(position)]
        np.minimum(np.maximum(position, 0, out=position), self.bins - 1, out=position)
        return np.bincount(position.astype(np.intp), minlength=self.bins).astype(np.int64)


#: Leading bits of a value that pick its table entry: sign, exponent and 7 (float32) or 6
#: (float64) mantissa bits, buckets under 1.6% wide, each holding at most one bin edge of
#: these grids (checked when a table is built).
TABLE_BITS = {np.dtype(np.float32): 16, np.dtype(np.float64): 18}
UNSIGNED = {np.dtype(np.float32): np.uint32, np.dtype(np.float64): np.uint64}
#: Slots after the last bin: the +inf bucket (NaN stays, +inf moves one up), the -inf bucket
#: (likewise), and the buckets holding only NaN.
PLUS_INF, MINUS_INF, NAN = 0, 2, 4


class TableBins:
    """A grid's bins for float32 or float64 values, by table lookup on their leading bits.

    ``thresholds[k - 1]`` is the smallest value of the dtype whose float64 grid position is at
    least k, so a value's bin is the number of thresholds at or below it: exactly what
    ``Grid.count``'s arithmetic gives, found by bisection once per grid. ``table`` maps the
    leading bits (``TABLE_BITS``) to the bin of the smallest value sharing them; one comparison
    with the next threshold finishes the job, since no bucket holds two thresholds. The two
    buckets of the infinities also hold NaNs: one comparison (true for the infinity, false for
    NaN) separates them, so +inf and -inf land in the outer bins and NaN is dropped, as in the
    arithmetic, without a separate pass over the values.
    """

    def __init__(self, thresholds: np.ndarray, table: np.ndarray, bins: int, dtype: np.dtype):
        self.bins = bins
        self.table = table
        self.dtype = np.dtype(dtype)
        self.unsigned = UNSIGNED[self.dtype]
        self.shift = self.unsigned(self.dtype.itemsize * 8 - TABLE_BITS[self.dtype])
        inf = np.inf
        tail = [inf, inf, inf, -inf, inf, inf]  # last bin, PLUS_INF .. NAN slots
        self.next_threshold = np.concatenate([thresholds, tail]).astype(self.dtype)

    def count(self, values: np.ndarray) -> np.ndarray:
        index = self.table[values.view(self.unsigned) >> self.shift]
        index += values >= self.next_threshold[index]
        counts = np.bincount(index.reshape(-1), minlength=self.bins + NAN + 1)
        result = counts[: self.bins].astype(np.int64)
        result[-1] += counts[self.bins + PLUS_INF + 1]
        result[0] += counts[self.bins + MINUS_INF + 1]
        return result


def _from_keys(keys: np.ndarray, dtype: np.dtype) -> np.ndarray:
    """Inverse of the monotone map float -> int64 (negative values mirrored below zero)."""
    unsigned = UNSIGNED[dtype]
    sign = unsigned(1) << unsigned(dtype.itemsize * 8 - 1)
    magnitude = np.abs(keys).astype(unsigned)
    return np.where(keys >= 0, magnitude, magnitude | sign).astype(unsigned).view(dtype)


@lru_cache(maxsize=None)
def _table_bins(low: float, high: float, bins: int, scale: float | None,
                dtype: np.dtype) -> TableBins | None:
    grid = Grid(low, high, bins, scale)
    unsigned = UNSIGNED[dtype]
    width = dtype.itemsize * 8
    inf_key = int(np.array(np.inf, dtype).view(unsigned))
    wanted = np.arange(1, bins, dtype=np.float64)
    below = np.full(bins - 1, -inf_key, np.int64)  # -inf: position < k
    above = np.full(bins - 1, inf_key, np.int64)  # +inf: position >= k
    with np.errstate(invalid="ignore", over="ignore"):
        while (above > below + 1).any():  # floor of the mean without int64 overflow
            middle = (below >> 1) + (above >> 1) + (below & above & 1)
            reached = grid.positions(_from_keys(middle, dtype)) >= wanted
            above = np.where(reached, middle, above)
            below = np.where(reached, below, middle)
        thresholds = _from_keys(above, dtype)
        shift = unsigned(width - TABLE_BITS[dtype])
        buckets = np.arange(1 << TABLE_BITS[dtype], dtype=np.uint64).astype(unsigned)
        negative = buckets >= (1 << (TABLE_BITS[dtype] - 1))
        rest = (unsigned(1) << shift) - unsigned(1)
        start = buckets << shift
        # Smallest and largest value of each bucket (negative buckets run the other way).
        lowest = np.where(negative, start | rest, start).astype(unsigned).view(dtype)
        highest = np.where(negative, start, start | rest).astype(unsigned).view(dtype)
        first = np.searchsorted(thresholds, lowest, side="right")
        last = np.searchsorted(thresholds, highest, side="right")
    finite = np.isfinite(lowest) & np.isfinite(highest)
    if ((last - first)[finite] > 1).any() or (np.diff(thresholds) <= 0).any():
        return None  # a bucket would need two comparisons: keep the arithmetic path
    table = np.where(finite, first, bins + NAN).astype(np.int16)
    infinities = np.array([np.inf, -np.inf], dtype).view(unsigned) >> shift
    table[int(infinities[0])] = bins + PLUS_INF
    table[int(infinities[1])] = bins + MINUS_INF
    return TableBins(thresholds, table, bins, dtype)


def table_bins(grid: Grid, dtype=np.float32) -> TableBins | None:
    """The lookup table of ``grid`` for float32 or float64 values (built once per grid and
    dtype), or None where it cannot be exact."""
    return _table_bins(grid.low, grid.high, grid.bins, grid.scale, np.dtype(dtype))


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


def sample_stride(observations: int, rows_wanted: int, units: int = 1,
                  values_wanted: int | None = None) -> int:
    """Every k-th observation row is histogrammed: at most about ``rows_wanted`` rows in all,
    and at most about ``values_wanted`` values (rows of ``units`` values each)."""
    rows = max(1, rows_wanted)
    if values_wanted is not None:
        rows = min(rows, max(1, values_wanted // max(1, units)))
    return max(1, -(-observations // rows))


def sampled_rows(block: np.ndarray, first_row: int, stride: int) -> np.ndarray:
    """The rows of ``block`` whose global index (``first_row`` + local) is a multiple of stride."""
    return block[(-first_row) % stride::stride]
