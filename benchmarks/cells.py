"""The benchmark matrix: dumps of the same activation bytes, stored the ways users store them.

A cell is one way of storing the same kind of recording: a container and layout (actdoc's own
writer, a plain h5py dataset stored contiguously, in h5py's own chunks or gzip-compressed chunks,
or an ``np.savez`` archive), a layer width, which activation arrays are stored (outputs only,
total inputs only, or both) and a float type. Every cell of one size holds the same activation
bytes, so their timings compare directly.

The values are synthetic (demo data): four layers, relu, logistic, tanh, relu, whose total inputs
are affine transforms of one pool of normal noise, with a few planted silent relu units and
saturated logistic units so the analysis has something to find. Writing streams block by block,
so memory stays flat however large the cell.
"""

from __future__ import annotations

import json
import zipfile
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from actdoc.io.writer import DumpWriter
from benchmarks.dumps import output_of, unit_offsets

LAYER_KINDS = ("relu", "logistic", "tanh", "relu")
#: Bytes of one array's block while writing (the pool of noise holds three of them).
WRITE_BLOCK_BYTES = 16 << 20
POOL_BLOCKS = 3
ARRAYS = {"out": ("output",), "pre": ("preact",), "both": ("preact", "output")}


@dataclass(frozen=True)
class Cell:
    """One way of storing a recording: layout, width, stored arrays, float type."""

    layout: str  # "writer" | "contiguous" | "chunked" | "gzip" | "npz"
    units: int
    arrays: str  # "out" | "pre" | "both"
    dtype: str  # "float32" | "float64"

    @property
    def name(self) -> str:
        return f"{self.layout}-{self.units}-{self.arrays}-{self.dtype[-2:]}"

    @property
    def stored(self) -> tuple[str, ...]:
        return ARRAYS[self.arrays]

    @property
    def suffix(self) -> str:
        return ".npz" if self.layout == "npz" else ".h5"

    def samples_for(self, size_gb: float) -> int:
        """Samples per layer so the stored activations total about ``size_gb`` (1 GB = 1e9)."""
        per_row = len(LAYER_KINDS) * len(self.stored) * self.units * np.dtype(self.dtype).itemsize
        return max(8, int(round(size_gb * 1e9 / per_row)))

    def activation_bytes(self, samples: int) -> int:
        return samples * len(LAYER_KINDS) * len(self.stored) * self.units \
            * np.dtype(self.dtype).itemsize


def _cells() -> tuple[Cell, ...]:
    cells = [Cell(layout, units, "both", "float32") for units in (256, 1024, 8192)
             for layout in ("writer", "contiguous", "chunked")]
    for layout, units in (("contiguous", 8192), ("writer", 1024)):
        cells += [Cell(layout, units, "out", "float32"), Cell(layout, units, "pre", "float32")]
    cells += [Cell("contiguous", 8192, "out", "float64"), Cell("writer", 1024, "both", "float64"),
              Cell("npz", 8192, "out", "float32"), Cell("npz", 1024, "both", "float32"),
              Cell("gzip", 1024, "both", "float32"), Cell("gzip", 8192, "out", "float32")]
    return tuple(cells)


#: Every cell of the matrix: each layout and width with both arrays in float32, then outputs
#: only and total inputs only, float64, NPZ and gzip on a wide and a middle-width dump.
CELLS: tuple[Cell, ...] = _cells()
#: The cells the test suite's smoke run covers: the writer's own layout, the wide contiguous
#: output-only dump and the wide NPZ archive.
SMOKE = ("writer-1024-both-32", "contiguous-8192-out-32", "npz-8192-out-32")


def cell_named(name: str) -> Cell:
    for cell in CELLS:
        if cell.name == name:
            return cell
    raise KeyError(f"no benchmark cell named '{name}' (known: {', '.join(c.name for c in CELLS)})")


def layer_blocks(cell: Cell, samples: int, seed: int = 0):
    """``(layer name, kind, [(array name, block), ...] per block)`` for every layer, in order."""
    rng = np.random.default_rng(seed)
    dtype = np.dtype(cell.dtype)
    rows = max(1, min(samples, WRITE_BLOCK_BYTES // (cell.units * dtype.itemsize)))
    pool = rng.standard_normal((POOL_BLOCKS, rows, cell.units), dtype=np.float32)
    for index, kind in enumerate(LAYER_KINDS):
        scale, shift = unit_offsets(kind, cell.units, rng)

        def blocks(kind=kind, scale=scale, shift=shift):
            for block, first in enumerate(range(0, samples, rows)):
                count = min(rows, samples - first)
                z = (pool[block % POOL_BLOCKS, :count] * scale + (shift + 0.01 * block))
                z = z.astype(dtype, copy=False)
                values = {"preact": z, "output": output_of(kind, z)}
                yield [(name, values[name]) for name in cell.stored]

        yield f"layer{index + 1}", kind, blocks()


def write_cell(cell: Cell, path: Path, samples: int, seed: int = 0) -> Path:
    """Write ``cell``'s dump of ``samples`` samples per layer to ``path`` (block by block)."""
    path = Path(path)
    if cell.layout == "writer":
        with DumpWriter(path, overwrite=True) as out:
            for name, kind, blocks in layer_blocks(cell, samples, seed):
                out.add_layer(name, kind, units=cell.units, dtype=cell.dtype)
                for block in blocks:
                    out.append(name, **dict(block))
    elif cell.layout == "npz":
        _write_npz(cell, path, samples, seed)
    else:
        options = {"contiguous": {}, "chunked": {"chunks": True},
                   "gzip": {"chunks": True, "compression": "gzip"}}[cell.layout]
        with h5py.File(path, "w") as handle:
            for name, kind, blocks in layer_blocks(cell, samples, seed):
                group = handle.create_group(f"layers/{name}")
                group.attrs["activation"] = kind
                sets = {array: group.create_dataset(array, (samples, cell.units), cell.dtype,
                                                    **options) for array in cell.stored}
                first = 0
                for block in blocks:
                    for array, values in block:
                        sets[array][first:first + values.shape[0]] = values
                    first += block[0][1].shape[0]
    return path


def _write_npz(cell: Cell, path: Path, samples: int, seed: int) -> None:
    """An uncompressed archive exactly as ``np.savez`` lays it out (one ``.npy`` member per
    array), streamed member by member so the writer never holds an array whole."""
    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(cell.dtype)),
              "fortran_order": False, "shape": (samples, cell.units)}
    layers = [{"name": f"layer{i + 1}", "activation": k} for i, k in enumerate(LAYER_KINDS)]
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED, allowZip64=True) as archive:
        for array in cell.stored:  # a zip is written one member at a time
            for name, _, blocks in layer_blocks(cell, samples, seed):
                with archive.open(f"{name}/{array}.npy", "w", force_zip64=True) as member:
                    np.lib.format.write_array_header_1_0(member, header)
                    for block in blocks:
                        member.write(dict(block)[array].tobytes())
        with archive.open("actdoc_meta.npy", "w") as member:
            np.lib.format.write_array(member, np.array(json.dumps({"layers": layers})))
