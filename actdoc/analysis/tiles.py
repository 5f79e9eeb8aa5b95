"""Blocks of a layer as tiles viewed in place in the dump, where its storage allows it.

A source that can show its stored values without copying them offers ``tiles(start, stop)``
(``actdoc.io.direct`` for uncompressed HDF5 datasets and stored NPZ members). When every
activation array of a dense layer offers them, cut the same way, the statistics read the stored
chunks in place instead of having each block copied into a buffer first: on a dump in the page
cache that copy costs about as much as the statistics themselves.
"""

from __future__ import annotations

from typing import Iterator

import numpy as np

from actdoc.model import ACTIVATION_ARRAYS, Layer

#: (first observation row, units, preact values or None, output values or None)
PairedTile = tuple[int, slice, np.ndarray | None, np.ndarray | None]


def _tiles(source, start: int, stop: int):
    tiles = getattr(source, "tiles", None)
    return None if tiles is None else tiles(start, stop)


def _paired(sources: list, tiles: list) -> list[PairedTile] | None:
    """The preact and output tiles of one block side by side, or None where they are cut
    differently (their chunks differ) or a stored array could not be mapped."""
    if any(s is not None and t is None for s, t in zip(sources, tiles)):
        return None
    present = [t for t in tiles if t is not None]
    cuts = {tuple(tile[:4] for tile in t) for t in present}
    if len(cuts) != 1:
        return None
    return [(row0, slice(col0, col1), *(None if t is None else t[index][4] for t in tiles))
            for index, (row0, _, col0, col1, _) in enumerate(present[0])]


class ReleasedAsMeasured:
    """A block's tiles that drop each tile's mapped pages as soon as the loop over them moves
    past it, so a measuring thread holds about one tile of each array instead of a whole block
    (16 MiB of each array): with two threads on a 2 GB dump of 8192 units in the writer's chunks
    that was about 60 MB of the peak. A second loop over them (side statistics of non-finite
    blocks and spatial layers) reads the pages back from the page cache."""

    def __init__(self, tiles: list[PairedTile], sources: list):
        self.tiles = tiles
        self.sources = [s for s in sources if s is not None and hasattr(s, "release")]
        self.released = False  # every tile released at least once

    def __len__(self) -> int:
        return len(self.tiles)

    def __iter__(self) -> Iterator[PairedTile]:
        for tile in self.tiles:
            yield tile
            row0, units, z, y = tile
            stop = row0 + (z if y is None else y).shape[0]
            for source in self.sources:
                source.release(row0, stop, units)
        self.released = True


#: Values per tile below which a layer cut into several tiles across its units is read into
#: blocks instead: every tile costs some forty numpy calls, so h5py's own small chunks (7630 x 4
#: for 256 units, 1908 x 16 for 1024) made measuring in place 5-18 times slower than the raw
#: read, while copying them into a block is a memcpy.
MIN_TILE_VALUES = 1 << 16


def _too_small(tiles: list[PairedTile], units: int) -> bool:
    row0, cols, z, y = tiles[0]
    rows, width = (z if y is None else y).shape
    return width < units and rows * width < MIN_TILE_VALUES


def paired_tiles(layer: Layer, block_observations: int, start_sample: int = 0,
                 stop_sample: int | None = None
                 ) -> Iterator[tuple[int, list[PairedTile]]] | None:
    """``(rows, tiles)`` per block of samples, or None when the layer's storage has no tiles.

    Only dense layers qualify (a spatial layer's observations are not rows of its arrays), and
    only storage whose chunks hold at least MIN_TILE_VALUES values (or span every unit). A
    block whose preact and output are cut differently, or that cannot be mapped, is read into
    buffers and given as one tile of every unit.
    """
    info = layer.info
    stop = info.samples if stop_sample is None else min(stop_sample, info.samples)
    sources = [layer.sources.get(name) for name in ACTIVATION_ARRAYS]
    if info.positions != 1 or stop <= start_sample or not any(sources):
        return None
    step = max(1, block_observations)

    def cut(begin: int, end: int) -> list:
        return [None if s is None else _tiles(s, begin, end) for s in sources]

    pending = [cut(start_sample, min(stop, start_sample + step))]
    first = _paired(sources, pending[0])
    if first is None or _too_small(first, info.units):
        return None

    def blocks() -> Iterator[tuple[int, list[PairedTile]]]:
        for begin in range(start_sample, stop, step):
            end = min(stop, begin + step)
            paired = _paired(sources, pending.pop() if pending else cut(begin, end))
            if paired is None:
                z, y = (None if s is None else s.read_samples(begin, end) for s in sources)
                yield end - begin, [(begin, slice(0, info.units), z, y)]
                continue
            measured = ReleasedAsMeasured(paired, sources)
            yield end - begin, measured
            released = measured.released
            del paired, measured
            if released:  # each tile's pages went as it was measured: the same ranges
                continue
            for source in sources:
                if source is not None and hasattr(source, "release"):
                    source.release(begin, end)

    return blocks()
