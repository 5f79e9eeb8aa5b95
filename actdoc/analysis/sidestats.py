"""Statistics the checks need beside the per-unit moments, kept as their own small accumulation.

- **non-finite samples**: which probe samples hold NaN or infinity anywhere in the layer's
  activations (so the non_finite check can say on how many samples a NaN starts). Looked for
  only in blocks where the main pass counted a non-finite value, so clean data costs nothing.
- **per-sample firing** of spatial layers: on how many samples a channel is active at any
  position. A channel that fires on few positions but on many samples is a sparse detector,
  not a dormant unit (docs/checks.md).
- **gradient**: the sum of squares of dL/dz per unit, where the dump stores ``grad``.

Each statistic merges exactly (a union of sample indices, integer counts, float sums), so
blocks, shards and workers combine as the main statistics do.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from actdoc.model import ActivationKind as Kind
from actdoc.model import GRADIENT_ARRAY, Layer


@dataclass
class SideStats:
    """Non-finite samples, per-sample firing and gradient sums of one layer."""

    positions: int
    nonfinite_samples: np.ndarray
    sample_active: np.ndarray | None = None
    grad_squares: np.ndarray | None = None
    grad_count: np.ndarray | None = None
    grad_nonfinite: np.ndarray | None = None

    @classmethod
    def empty(cls, layer: Layer, per_sample: bool) -> "SideStats":
        units = layer.info.units
        gradient = layer.info.has(GRADIENT_ARRAY)
        return cls(
            positions=layer.info.positions,
            nonfinite_samples=np.zeros(0, np.int64),
            sample_active=np.zeros(units, np.int64) if per_sample else None,
            grad_squares=np.zeros(units) if gradient else None,
            grad_count=np.zeros(units, np.int64) if gradient else None,
            grad_nonfinite=np.zeros(units, np.int64) if gradient else None)

    def merge(self, other: "SideStats") -> "SideStats":
        def add(a, b):
            return None if a is None or b is None else a + b

        return replace(
            self,
            nonfinite_samples=np.union1d(self.nonfinite_samples, other.nonfinite_samples),
            sample_active=add(self.sample_active, other.sample_active),
            grad_squares=add(self.grad_squares, other.grad_squares),
            grad_count=add(self.grad_count, other.grad_count),
            grad_nonfinite=add(self.grad_nonfinite, other.grad_nonfinite))

    # ------------------------------------------------------------------ per block of the pass
    def add_tiles(self, tiles, stats, had_nonfinite: bool) -> None:
        """Add one block, given as the tiles the main pass measured (``stats`` is its
        LayerStats; ``had_nonfinite``: the main pass counted a non-finite value in it)."""
        for first_row, cols, z, y in tiles:
            if had_nonfinite:
                self._add_nonfinite(first_row, z, y)
            if self.sample_active is not None:
                self._add_sample_firing(stats, cols, z, y)

    def _add_nonfinite(self, first_row: int, z, y) -> None:
        bad = None
        for values in (z, y):
            if values is None:
                continue
            rows = ~np.isfinite(values).all(axis=1)
            bad = rows if bad is None else bad | rows
        if bad is None or not bad.any():
            return
        samples = (first_row + np.flatnonzero(bad)) // self.positions
        self.nonfinite_samples = np.union1d(self.nonfinite_samples, samples)

    def _add_sample_firing(self, stats, cols: slice, z, y) -> None:
        """Samples on which each channel is active somewhere (a block holds whole samples)."""
        active = _active(stats, z, y)
        if active is None:
            return
        per_sample = active.reshape(-1, self.positions, active.shape[1]).any(axis=1)
        self.sample_active[cols] += per_sample.sum(axis=0)

    # ------------------------------------------------------------------ the gradient array
    def add_gradient(self, layer: Layer, block_observations: int, start: int, stop: int) -> None:
        """Sum dL/dz squared per unit over samples ``start:stop`` (finite values only)."""
        for (grad,) in layer.paired_blocks(block_observations, arrays=(GRADIENT_ARRAY,),
                                           start_sample=start, stop_sample=stop):
            finite = np.isfinite(grad)
            clean = np.where(finite, grad, 0.0).astype(np.float64)
            self.grad_squares += np.einsum("ij,ij->j", clean, clean)
            counted = finite.sum(axis=0)
            self.grad_count += counted
            self.grad_nonfinite += grad.shape[0] - counted

    def gradient_rms(self) -> float | None:
        """RMS of dL/dz over the layer's units and observations (None: no gradient stored)."""
        if self.grad_squares is None:
            return None
        n = float(self.grad_count.sum())
        return float(np.sqrt(self.grad_squares.sum() / n)) if n else None


def _active(stats, z, y) -> np.ndarray | None:
    """The main pass's rule for "active" (actdoc.analysis.stats), on one tile."""
    kind = stats.kind
    with np.errstate(invalid="ignore"):
        if kind is Kind.RELU:
            return (y if y is not None else z) > 0
        if kind is Kind.LEAKY_RELU:
            return (z if z is not None else y) > 0
        if y is not None and "output" in stats.arrays:
            return y > 0.5
        if kind is Kind.THRESHOLD and z is not None:
            return z > stats.neuron.threshold
    return None
