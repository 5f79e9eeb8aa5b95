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

    def count(self, values: np.ndarray) -> np.ndarray:
        """Counts per bin of ``values`` (outer bins take the overflow and +-inf; NaN dropped)."""
        flat = np.asarray(values, dtype=np.float64).reshape(-1)
        if self.scale is not None:
            flat = np.arcsinh(flat / self.scale)
        position = (flat - self.low) * (self.bins / (self.high - self.low))
        position = position[~np.isnan(position)]
        np.minimum(np.maximum(position, 0, out=position), self.bins - 1, out=position)
        return np.bincount(position.astype(np.intp), minlength=self.bins).astype(np.int64)


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
