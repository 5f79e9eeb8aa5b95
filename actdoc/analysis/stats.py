"""One-pass, mergeable per-unit statistics of a layer's activations.

``accumulate_layer`` reads a layer's preact and output once, block by block through
``Layer.paired_blocks``, and works through each block in cache-sized row slices with reused
buffers. ``LayerStats.merge`` combines the statistics of blocks, sample ranges (shards) or
workers: counts, minima, maxima and histograms exactly, float sums within rounding.

What is measured on which array:

- output statistics (mean, spread, moments, min, max, mean |y|) are of y; a preact-only layer
  gets y = f(z) (a stochastic binary unit: its firing probability logistic(z));
- zones (saturated low/high, near-linear) are decided on z where it is stored, else on y against
  the matching output edges (f is monotone for the kinds that have zones);
- "active": relu y > 0; leaky_relu z > 0 (y > 0 is the same for a positive slope); threshold and
  stochastic binary: the output is 1 (y > 0.5); a stochastic binary layer with z alone counts
  as active the observations whose firing probability is above the low saturation edge;
- an observation holding NaN or infinity in any stored array is counted as non-finite for that
  unit and kept out of every other statistic.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field, replace
from queue import Empty, Full, Queue
from typing import Callable, Iterator

import numpy as np

from actdoc.analysis.accumulate import Accumulator, block_rows
from actdoc.analysis.defaults import Settings
from actdoc.analysis.histograms import grids_for
from actdoc.analysis.moments import Moments
from actdoc.analysis.sidestats import SideStats
from actdoc import heap
from actdoc.analysis.tiles import paired_tiles
from actdoc.model import ActivationKind, Layer
from actdoc.neurons import NONNEGATIVE_OUTPUT, Neuron

Kind = ActivationKind
#: Kinds whose f' is not a function of y and the moments: summed element by element.
ELEMENTWISE_GAIN = frozenset({Kind.SOFTPLUS, Kind.GELU, Kind.SILU, Kind.STOCHASTIC_BINARY})


@dataclass
class LayerStats:
    """Per-unit statistics of one layer over the observations seen so far."""

    name: str
    neuron: Neuron
    units: int
    arrays: tuple[str, ...]
    rows: int
    moments: Moments
    nonfinite: np.ndarray
    minimum: np.ndarray
    maximum: np.ndarray
    abs_sum: np.ndarray | None
    active: np.ndarray | None = None
    low: np.ndarray | None = None
    high: np.ndarray | None = None
    linear: np.ndarray | None = None
    gain_sum: np.ndarray | None = None
    histograms: dict[str, np.ndarray] = field(default_factory=dict)
    #: non-finite samples, per-sample firing, gradient sums (actdoc.analysis.sidestats)
    side: SideStats | None = None

    @property
    def kind(self) -> Kind:
        return self.neuron.kind

    @property
    def count(self) -> np.ndarray:
        """Finite observations per unit (int64)."""
        return self.moments.count.astype(np.int64)

    @np.errstate(over="ignore", invalid="ignore")
    def merge(self, other: "LayerStats") -> "LayerStats":
        """Statistics of both sets of observations (same layer, disjoint observations)."""
        if (other.name, other.neuron, other.units) != (self.name, self.neuron, self.units):
            raise ValueError(f"cannot merge statistics of '{self.name}' and '{other.name}'")

        def add(a, b):
            return None if a is None or b is None else a + b

        return replace(
            self,
            rows=self.rows + other.rows,
            moments=self.moments.combine(other.moments),
            nonfinite=self.nonfinite + other.nonfinite,
            minimum=np.minimum(self.minimum, other.minimum),
            maximum=np.maximum(self.maximum, other.maximum),
            abs_sum=add(self.abs_sum, other.abs_sum),
            active=add(self.active, other.active), low=add(self.low, other.low),
            high=add(self.high, other.high), linear=add(self.linear, other.linear),
            gain_sum=add(self.gain_sum, other.gain_sum),
            histograms={k: v + other.histograms[k] for k, v in self.histograms.items()},
            side=None if self.side is None or other.side is None else self.side.merge(other.side),
        )

    def mean_abs(self) -> np.ndarray:
        """E|y| per unit (NaN where no finite observation)."""
        m = self.moments
        total = m.total if self.abs_sum is None else self.abs_sum
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(m.count > 0, total / m.count, np.nan)

    def gain_total(self) -> np.ndarray | None:
        """Sum of f'(z) per unit, or None where it cannot be measured.

        Derived from the moments where f' is a function of y (logistic y(1-y), tanh 1-y^2),
        from the active count for rectified kinds; summed per element otherwise.
        """
        kind, m = self.kind, self.moments
        if self.gain_sum is not None:
            return self.gain_sum
        if kind is Kind.LINEAR:
            return m.count.copy()
        if kind is Kind.RELU:
            return self.active.astype(np.float64)
        if kind is Kind.LEAKY_RELU:
            on = self.active.astype(np.float64)
            return on + self.neuron.negative_slope * (m.count - on)
        if kind is Kind.LOGISTIC:
            return m.total - m.total_squares
        if kind is Kind.TANH:
            return m.count - m.total_squares
        return None


def empty_stats(layer: Layer, settings: Settings) -> LayerStats:
    """Statistics of no observations, with the fields the layer's kind and arrays need."""
    info = layer.info
    neuron = Neuron(info.kind, info.negative_slope, info.threshold)
    arrays = tuple(a for a in ("preact", "output") if info.has(a))
    kind, units = info.kind, info.units
    has_z = "preact" in arrays

    def counter(needed: bool) -> np.ndarray | None:
        return np.zeros(units, np.int64) if needed else None

    zoned = kind in (Kind.LOGISTIC, Kind.TANH) or (kind is Kind.STOCHASTIC_BINARY and has_z)
    gain_elementwise = kind in ELEMENTWISE_GAIN and (has_z or kind is Kind.SOFTPLUS)
    firing = kind in (Kind.RELU, Kind.LEAKY_RELU, Kind.THRESHOLD, Kind.STOCHASTIC_BINARY)
    return LayerStats(
        name=info.name, neuron=neuron, units=units, arrays=arrays, rows=0,
        moments=Moments.zeros(units),
        nonfinite=np.zeros(units, np.int64),
        minimum=np.full(units, np.inf), maximum=np.full(units, -np.inf),
        abs_sum=None if kind in NONNEGATIVE_OUTPUT else np.zeros(units),
        active=counter(kind in (Kind.RELU, Kind.LEAKY_RELU, Kind.THRESHOLD,
                                Kind.STOCHASTIC_BINARY)),
        low=counter(zoned), high=counter(zoned),
        linear=counter(kind in (Kind.LOGISTIC, Kind.TANH)),
        gain_sum=np.zeros(units) if gain_elementwise else None,
        histograms={k: np.zeros(g.bins, np.int64) for k, g in grids_for(kind).items()
                    if k in arrays or k == "output" or neuron.invertible},
        side=SideStats.empty(layer, per_sample=firing and info.positions > 1),
    )


def _read_ahead(blocks: Iterator[tuple], depth: int) -> Iterator[tuple]:
    """Yield copies of ``blocks`` while a thread reads the next ones.

    Reading (file I/O, decompression) and the statistics (numpy, which releases the GIL) then
    overlap on two cores. Copies are needed because ``paired_blocks`` reuses its buffers.
    """
    queue: Queue = Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def produce() -> None:
        try:
            for pair in blocks:
                copied = tuple(None if a is None else a.copy() for a in pair)
                while not stop.is_set():
                    try:
                        queue.put(copied, timeout=0.1)
                        break
                    except Full:
                        continue
                if stop.is_set():
                    return
            queue.put(done)
        except BaseException as exc:  # handed to the consumer, raised there
            queue.put(exc)

    worker = threading.Thread(target=produce, name="actdoc-read-ahead", daemon=True)
    worker.start()
    try:
        while True:
            item = queue.get()
            if item is done:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        while worker.is_alive():
            try:
                queue.get_nowait()
            except Empty:
                worker.join(0.05)


#: Finite values beyond about 1e154 square past the float64 range: their moments become
#: infinite (written as null) instead of warning on stderr once per slice.
@np.errstate(over="ignore", invalid="ignore")
def accumulate_layer(
    layer: Layer,
    settings: Settings | None = None,
    start_sample: int = 0,
    stop_sample: int | None = None,
    progress: Callable[[int], None] | None = None,
) -> LayerStats:
    """Statistics of samples ``start_sample:stop_sample`` of ``layer``, in one pass.

    ``progress(rows)`` is called after each block with the observation rows it held. Shards of
    one layer merge (``LayerStats.merge``) into the statistics of the whole range. Where the
    dump's storage allows it (``actdoc.analysis.tiles``), stored chunks are measured in place.
    """
    settings = settings or Settings()
    stats = empty_stats(layer, settings)
    if not stats.arrays:
        return stats
    acc = Accumulator(stats, settings, layer.info.observations)
    units = stats.units
    block = block_rows(layer.info, settings)
    tiled = None if settings.read_ahead_blocks > 0 else paired_tiles(
        layer, block, start_sample, stop_sample)
    side = stats.side
    if tiled is not None:  # uncompressed storage seen in place: no block is copied
        for rows, tiles in tiled:
            bad = int(stats.nonfinite.sum())
            acc.add_block(tiles)
            side.add_tiles(tiles, stats, int(stats.nonfinite.sum()) != bad)
            stats.rows += rows
            if progress is not None:
                progress(rows)
    else:
        first_row = start_sample * layer.info.positions
        blocks = layer.paired_blocks(block, start_sample=start_sample,
                                     stop_sample=stop_sample)
        if settings.read_ahead_blocks > 0:
            blocks = _read_ahead(blocks, settings.read_ahead_blocks)
        for z, y in blocks:
            rows = (y if y is not None else z).shape[0]
            bad = int(stats.nonfinite.sum())
            tile = [(first_row, slice(0, units), z, y)]
            acc.add_block(tile)
            side.add_tiles(tile, stats, int(stats.nonfinite.sum()) != bad)
            stats.rows += rows
            first_row += rows
            heap.give_back()  # decompression buffers freed in this thread (actdoc.heap)
            if progress is not None:
                progress(rows)
    if stats.kind is Kind.STOCHASTIC_BINARY and "output" not in stats.arrays:
        stats.active = stats.count - stats.low
    if side.grad_squares is not None:
        side.add_gradient(layer, block, start_sample,
                          layer.info.samples if stop_sample is None else stop_sample)
    return stats
