"""Blocks of a layer as tiles viewed in place in the dump, where its storage allows it.

A source that can show its stored values without copying them offers ``tiles(start, stop)``
(``actdoc.io.direct`` for uncompressed HDF5 datasets). When every activation array of a dense
layer offers them with the same tiling, the statistics read the stored chunks in place instead
of having each block copied into a buffer first: on a dump in the page cache that copy costs
about as much as the statistics themselves.
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


def paired_tiles(layer: Layer, block_observations: int, start_sample: int = 0,
                 stop_sample: int | None = None
                 ) -> Iterator[tuple[int, list[PairedTile]]] | None:
    """``(rows, tiles)`` per block of samples, or None when the layer's storage has no tiles.

    Only dense layers qualify (a spatial layer's observations are not rows of its arrays), and
    only when preact and output (where both are stored) are cut into the same tiles.
    """
    info = layer.info
    stop = info.samples if stop_sample is None else min(stop_sample, info.samples)
    sources = [layer.sources.get(name) for name in ACTIVATION_ARRAYS]
    if info.positions != 1 or stop <= start_sample or not any(sources):
        return None
    step = max(1, block_observations)
    first = [None if s is None else _tiles(s, start_sample, min(stop, start_sample + step))
             for s in sources]
    if any(s is not None and t is None for s, t in zip(sources, first)):
        return None
    coordinates = {tuple(tile[:4] for tile in tiles) for tiles in first if tiles is not None}
    if len(coordinates) != 1:
        return None

    def blocks() -> Iterator[tuple[int, list[PairedTile]]]:
        pending = first
        for begin in range(start_sample, stop, step):
            end = min(stop, begin + step)
            tiles = pending if begin == start_sample else [
                None if s is None else s.tiles(begin, end) for s in sources]
            pending = None
            if any(s is not None and t is None for s, t in zip(sources, tiles)):
                # No address space for a map any more: read this block the ordinary way.
                z, y = (None if s is None else s.read_samples(begin, end) for s in sources)
                yield end - begin, [(begin, slice(0, info.units), z, y)]
                continue
            shape = next(t for t in tiles if t is not None)
            out = []
            for index, (row0, _, col0, col1, _) in enumerate(shape):
                z, y = (None if t is None else t[index][4] for t in tiles)
                out.append((row0, slice(col0, col1), z, y))
            del tiles, shape
            yield end - begin, out
            del out
            for source in sources:
                if source is not None and hasattr(source, "release"):
                    source.release(begin, end)

    return blocks()
