"""Dumps held in memory: numpy arrays behind the reader contract's ArraySource.

Used by the writer's round trips, by tests that plant pathologies, and by anyone who wants to
analyse arrays already in a Python session without writing a file first.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

import numpy as np

from actdoc.model import LAYER_ARRAYS


class MemorySource:
    """An ArraySource over an in-memory numpy array."""

    def __init__(self, array: np.ndarray):
        self._array = np.asarray(array)
        self.shape = tuple(self._array.shape)
        self.dtype = self._array.dtype

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        rows = self._array[start:stop]
        if out is not None and out.shape == rows.shape and out.dtype == rows.dtype:
            out[...] = rows
            return out
        return rows

    def read_unit(self, unit: int) -> np.ndarray:
        return self._array[:, unit]

    def read_all(self) -> np.ndarray:
        return self._array


def dump_from_arrays(
    layers: Mapping[str, Mapping[str, Any]],
    *,
    name: str = "memory",
    probe_input: np.ndarray | None = None,
):
    """Build a Dump from ``{layer: {"activation": kind, "preact": z, "output": y, ...}}``.

    Keys of each layer mapping are the array names of the dump layout (preact, output, weight,
    bias, and the optional grad) and its attributes (activation, negative_slope, threshold).
    Layers keep the mapping's order. The arrays go through the same validation and activation
    inference as a file.
    """
    from actdoc.io.base import RawDump, RawLayer, assemble

    raw_layers = []
    for position, (layer_name, spec) in enumerate(layers.items()):
        arrays = {k: MemorySource(v) for k, v in spec.items()
                  if k in LAYER_ARRAYS and v is not None}
        attrs = {k: v for k, v in spec.items() if k not in arrays and v is not None}
        raw_layers.append(RawLayer(name=layer_name, attrs=attrs, arrays=arrays, position=position))
    raw = RawDump(
        path=Path(name),
        format="memory",
        layers=tuple(raw_layers),
        probe_input=None if probe_input is None else MemorySource(probe_input),
    )
    return assemble(raw)
