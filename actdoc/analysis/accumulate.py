"""Adding observations to a LayerStats, one tile at a time, in numpy row slices.

A tile is a run of observation rows over a run of units (``cols``): a whole block of every unit
when blocks are read into buffers, or one stored chunk viewed in place (``actdoc.io.direct``).
Each tile is worked through in row slices with reused scratch buffers: comparisons become
boolean masks counted as ``uint16``, power sums are taken about the first slice's mean, and
the histogram sample of each slice is binned while the slice is in the cache. Once the
compiled kernel has loaded (``kernel.py``), a clean C-ordered slice is measured by it in one
pass instead, to the same bits.

Every budget is in bytes or values, never in rows, so a wide layer costs what a narrow one of
the same bytes does: blocks hold at most ``block_bytes`` of each array (``block_rows``), so a
tile (at most a block) does too; slices hold ``SLICE_BYTES`` of float64, and the histogram
sample at most ``histogram_values`` values. Wide tiles are not cut into runs of units: the
strided slices that makes measured 10-20% slower than whole rows of 8192 units.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from actdoc.analysis import kernel
from actdoc.analysis.defaults import Settings
from actdoc.analysis.histograms import grids_for, sample_stride, sampled_rows
from actdoc.analysis.moments import PowerSums
from actdoc.model import ACTIVATION_ARRAYS, LayerInfo
from actdoc.model import ActivationKind as Kind

#: Bytes of float64 scratch per row slice (2 MiB: a whole (1024, 256) chunk in one slice, in
#: the L3 cache). Each numpy call lets another measuring thread take the GIL, so fewer, larger
#: calls matter more than staying in L2: on the project's 2-core machine a 2 GB analysis took
#: 1.8-2.4 s with 2 MiB slices against 2.6-3.0 s with 512 KiB ones (4 and 8 MiB: no better).
SLICE_BYTES = 1 << 21
#: Per-slice counts are summed as uint16, so a slice holds at most 65535 rows.
MAX_SLICE_ROWS = 65535


def block_rows(info: LayerInfo, settings: Settings) -> int:
    """Observations per block: at most ``block_observations``, and at most ``block_bytes`` of
    each stored activation array as it is measured (float16 is widened to float32)."""
    itemsize = max((max(4, np.dtype(info.arrays[name].dtype).itemsize)
                    for name in ACTIVATION_ARRAYS if info.has(name)), default=4)
    by_bytes = settings.block_bytes // max(1, info.units * itemsize)
    return int(max(1, min(settings.block_observations, by_bytes)))


@dataclass(frozen=True)
class Count:
    """One per-unit counter of the statistics (a LayerStats field): the rows where ``source``
    ("y" or "z") is above (``kernel.GREATER``) or below (``kernel.LESS``) ``edge``, or within
    ``limit`` of it (``kernel.NEAR``)."""

    field: str
    source: str
    op: int
    edge: float
    limit: float = 0.0


def count_plan(stats, zone, linear_zone) -> tuple[Count, ...]:
    """The counters a layer's statistics need, and on which array each is decided."""
    kind, has_z = stats.kind, "preact" in stats.arrays
    plan = []
    if stats.active is not None:
        if kind is Kind.RELU:
            plan.append(Count("active", "y", kernel.GREATER, 0.0))
        elif kind is Kind.LEAKY_RELU:
            plan.append(Count("active", "z" if has_z else "y", kernel.GREATER, 0.0))
        elif "output" in stats.arrays:  # threshold, stochastic binary with stored output
            plan.append(Count("active", "y", kernel.GREATER, 0.5))
        elif kind is Kind.THRESHOLD:
            plan.append(Count("active", "z", kernel.GREATER, stats.neuron.threshold))
    if stats.low is not None:
        if has_z:
            plan += [Count("low", "z", kernel.LESS, zone.z_low),
                     Count("high", "z", kernel.GREATER, zone.z_high)]
        else:
            plan += [Count("low", "y", kernel.LESS, zone.y_low),
                     Count("high", "y", kernel.GREATER, zone.y_high)]
    if stats.linear is not None:
        lin = linear_zone
        plan.append(Count("linear", "z", kernel.NEAR, 0.0, lin.z_high) if has_z else
                    Count("linear", "y", kernel.NEAR, 0.5 * (lin.y_low + lin.y_high),
                          0.5 * (lin.y_high - lin.y_low)))
    return tuple(plan)


class Accumulator:
    """Adds tiles of observations to ``stats`` (a LayerStats), reusing scratch buffers."""

    def __init__(self, stats, settings: Settings, observations: int):
        self.stats = stats
        self.neuron = stats.neuron
        self.kind = stats.kind
        values = SLICE_BYTES // 8
        self._x, self._scratch = np.empty(values), np.empty(values)
        self._mask = np.empty(values, bool)
        self._outputs: dict = {}
        self._copies: dict = {}
        self.zone = self.neuron.saturation_zone(settings.logistic_saturation_margin,
                                                settings.tanh_saturation_level)
        self.linear_zone = self.neuron.linear_zone(settings.linear_gain_share)
        self.plan = count_plan(stats, self.zone, self.linear_zone)
        self.grids = grids_for(self.kind)
        # The fused kernel, once loaded, takes clean slices of kinds whose gain is not summed
        # value by value (it gives numpy's results bit for bit: kernel.py).
        self.fusable = stats.gain_sum is None and kernel.wanted()
        self._partials: dict = {}
        self.stride = sample_stride(observations, settings.histogram_rows, stats.units,
                                    settings.histogram_values)

    def slice_rows(self, width: int) -> int:
        """Rows per slice for tiles ``width`` units wide."""
        return int(min(MAX_SLICE_ROWS, max(8, (SLICE_BYTES // 8) // max(1, width))))

    def _buffers(self, rows: int, width: int):
        size = rows * width
        if size > self._x.size:  # units so many that even the fewest rows pass SLICE_BYTES
            self._x, self._scratch = np.empty(size), np.empty(size)
            self._mask = np.empty(size, bool)
        return (self._x[:size].reshape(rows, width), self._scratch[:size].reshape(rows, width),
                self._mask[:size].reshape(rows, width))

    # ------------------------------------------------------------------------- tiles
    def add_block(self, tiles) -> None:
        """Add one block given as tiles ``(first_row, cols, z, y)`` (z or y may be None).

        The block's power sums are kept across its tiles and turned into moments once.
        """
        sums = PowerSums(self.stats.units)
        for first_row, cols, z, y in tiles:
            self._add_tile(z, y, first_row, cols, sums)
        self.stats.moments = self.stats.moments.combine(sums.moments())

    def _add_tile(self, z: np.ndarray | None, y: np.ndarray | None, first_row: int,
                  cols: slice, sums: PowerSums) -> None:
        rows, width = (z if y is None else y).shape
        step = self.slice_rows(width)
        for start in range(0, rows, step):
            stop = min(start + step, rows)
            z_part = None if z is None else self._aligned(z[start:stop], "z")
            y_part = self._output(z_part) if y is None else self._aligned(y[start:stop], "y")
            clean = self._add_slice(z_part, y_part, sums, cols)
            self._add_histograms(z_part, y_part, first_row + start, clean)

    def _aligned(self, values: np.ndarray, name: str) -> np.ndarray:
        """The slice itself, or where its values are not aligned to their size (HDF5 and zip
        put data at any byte offset) a copy in a reused aligned buffer: numpy's loops on
        unaligned floats go through buffered copies, several times slower per operation."""
        if values.flags.aligned:
            return values
        key = (name, values.dtype)
        buffer = self._copies.get(key)
        if buffer is None or buffer.size < values.size:
            buffer = self._copies[key] = np.empty(max(values.size, self._x.size), values.dtype)
        out = buffer[:values.size].reshape(values.shape)
        np.copyto(out, values)
        return out

    def _output(self, z: np.ndarray) -> np.ndarray:
        """f(z) of a slice, into a reused buffer of z's dtype where the kind allows it."""
        out = self._outputs.get(z.dtype)
        if out is None or out.size < z.size:
            out = self._outputs[z.dtype] = np.empty(max(z.size, self._x.size), z.dtype)
        out = out[:z.size].reshape(z.shape)
        with np.errstate(over="ignore", invalid="ignore"):
            return self.neuron.output(z, out=out)

    def _add_histograms(self, z, y, first_row: int, clean: bool) -> None:
        """Bin the slice's sampled rows. A slice with a non-finite value keeps out the whole
        observation (preact and output) wherever either value is not finite."""
        ys = sampled_rows(y, first_row, self.stride)
        if ys.shape[0] == 0:
            return
        zs = None if z is None else sampled_rows(z, first_row, self.stride)
        hist = self.stats.histograms
        if not clean:
            finite = np.isfinite(ys)
            if zs is not None:
                finite &= np.isfinite(zs)
                zs = zs[finite]
            ys = ys[finite]
        if zs is not None:
            hist["preact"] += self.grids["preact"].count(zs)
        elif "preact" in hist:
            with np.errstate(divide="ignore", invalid="ignore"):
                hist["preact"] += self.grids["preact"].count(self.neuron.inverse(ys))
        hist["output"] += self.grids["output"].count(ys)

    # ------------------------------------------------------------------------- slices
    def _count(self, out: np.ndarray | None, compare, values, edge, valid) -> None:
        """Add, per unit, how many rows satisfy ``compare(values, edge)`` (and are valid)."""
        mask = self._buffers(*values.shape)[2]
        compare(values, edge, out=mask)
        if valid is not None:
            np.logical_and(mask, valid, out=mask)
        out += np.add.reduce(mask.view(np.uint8), axis=0, dtype=np.uint16)

    def _add_slice(self, z: np.ndarray | None, y: np.ndarray, sums: PowerSums,
                   cols: slice) -> bool:
        """Add one slice; whether every value in it was finite."""
        fused = kernel.loaded() if self.fusable else None
        if fused is not None and self._fused_slice(fused, z, y, sums, cols):
            return True
        stats = self.stats
        low = np.minimum.reduce(y, axis=0)
        high = np.maximum.reduce(y, axis=0)
        clean = np.isfinite(low).all() and np.isfinite(high).all()
        if z is not None and clean:
            with np.errstate(over="ignore", invalid="ignore"):  # finite values may sum past max
                clean = bool(np.isfinite(np.add.reduce(z, axis=None)))
        valid = None
        x, scratch, _ = self._buffers(*y.shape)
        minimum, maximum = stats.minimum[cols], stats.maximum[cols]
        if clean:
            np.minimum(minimum, low, out=minimum)
            np.maximum(maximum, high, out=maximum)
            np.copyto(x, y)
        else:
            valid = np.isfinite(y)
            if z is not None:
                valid &= np.isfinite(z)
            stats.nonfinite[cols] += y.shape[0] - np.add.reduce(valid, axis=0, dtype=np.int64)
            np.minimum(minimum, np.where(valid, y, np.inf).min(axis=0), out=minimum)
            np.maximum(maximum, np.where(valid, y, -np.inf).max(axis=0), out=maximum)
            np.copyto(x, np.where(valid, y, 0.0))
            if z is not None:
                z = np.where(valid, z, 0.0)
        self._add_counts(z, y, valid, cols)
        if stats.gain_sum is not None:
            self._add_gain(z, y, valid, cols)
        if stats.abs_sum is not None:
            np.abs(x, out=scratch)
            stats.abs_sum[cols] += np.add.reduce(scratch, axis=0)
        sums.add(x, scratch, valid, cols)
        return bool(clean)

    def _add_counts(self, z, y, valid, cols: slice) -> None:
        for count in self.plan:
            source = z if count.source == "z" else y
            target = getattr(self.stats, count.field)[cols]
            if count.op == kernel.GREATER:
                self._count(target, np.greater, source, count.edge, valid)
            elif count.op == kernel.LESS:
                self._count(target, np.less, source, count.edge, valid)
            else:
                dist = self._buffers(*source.shape)[1]
                if count.edge:
                    np.subtract(source, count.edge, out=dist)  # in the source's dtype
                    np.abs(dist, out=dist)
                else:
                    np.abs(source, out=dist)
                self._count(target, np.less_equal, dist, count.limit, valid)

    def _fused_slice(self, fused, z, y, sums: PowerSums, cols: slice) -> bool:
        """Measure a slice with the compiled kernel; False (nothing added) if it is not clean."""
        rows, width = y.shape
        parts = self._partials.get(width)
        if parts is None:
            parts = self._partials[width] = {
                "shift": np.empty(width), "acc": np.empty((8, width)),
                "counts": np.zeros((len(self.plan), width), np.int64),
                "sources": np.array([c.source == "z" for c in self.plan], np.int64),
                "ops": np.array([c.op for c in self.plan], np.int64),
                "limits": np.array([c.limit for c in self.plan], np.float64)}
        z_values = y if z is None else z
        if not (y.flags.c_contiguous and z_values.flags.c_contiguous):
            return False  # the kernel is compiled for whole rows; numpy takes the rest
        need_shift = sums.needs_shift(cols)
        shift = parts["shift"] if need_shift else sums.shift_of(cols)
        edges = [c.edge for c in self.plan]
        acc, stats = parts["acc"], self.stats
        if not fused(kernel.readonly(y), kernel.readonly(z_values), z is not None, need_shift,
                     shift, parts["sources"], parts["ops"], np.array(edges, y.dtype),
                     np.array(edges, z_values.dtype), parts["limits"], acc, parts["counts"]):
            return False
        minimum, maximum = stats.minimum[cols], stats.maximum[cols]
        np.minimum(minimum, acc[0], out=minimum)
        np.maximum(maximum, acc[1], out=maximum)
        for index, count in enumerate(self.plan):
            getattr(stats, count.field)[cols] += parts["counts"][index]
        if stats.abs_sum is not None:
            stats.abs_sum[cols] += acc[3]
        sums.add_partial(cols, rows, acc[4:], parts["shift"] if need_shift else None)
        return True

    def _add_gain(self, z, y, valid, cols: slice) -> None:
        """Add f'(z) per unit (from z, or for softplus from its output y)."""
        if z is not None:
            gain = self.neuron.gain(z)
        else:  # softplus from its output: f'(z) = logistic(z) = 1 - exp(-y)
            gain = -np.expm1(-(y if valid is None else np.where(valid, y, 0.0)))
        if valid is not None:
            gain = np.where(valid, gain, 0.0)
        self.stats.gain_sum[cols] += np.add.reduce(gain, axis=0, dtype=np.float64)
