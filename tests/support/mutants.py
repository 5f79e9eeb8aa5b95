"""Seed dumps and byte-level mutations of them, for the reader fuzz tests (tests/fuzz).

Seeds are real files: the committed demo dumps (HDF5, written by actdoc's own writer) and NPZ
versions of one of them written five ways (``actdoc.io.writer.write_npz`` stored and deflated,
``np.savez``, ``np.savez_compressed``, and zip's bzip2 and LZMA methods through Python's
``zipfile``). A mutation overwrites, flips, inserts or deletes bytes, or truncates the file. Most
mutations are aimed at the bytes that describe the data rather than the data itself: for HDF5
everything outside the datasets' raw storage (superblock, object headers, attributes, B-trees,
heaps); for NPZ the zip local headers, central directory and end record (PKWARE APPNOTE.TXT
sections 4.3.7, 4.3.12, 4.3.16) and the start of each member, where the ``.npy`` header lives
(numpy's "NPY format" description, NEP 1).
"""

from __future__ import annotations

import random
import struct
import zipfile
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
DEMO_DUMPS = ROOT / "demo_models" / "dumps"
#: The HDF5 seeds: three distinct demo scenarios (the relu steps share one layout).
HDF5_SEEDS = ("relu_dying_step2.h5", "logistic_near_binary.h5", "tanh_raw_inputs.h5")
#: Samples kept in the NPZ seeds, so that a case reads a small file quickly.
NPZ_SAMPLES = 64
#: Interesting words written over 4 or 8 bytes: zero, all ones, sign bits, small and odd sizes.
WORDS = (0, 1, 0xFF, 0x7F, 0x80, 0xFFFF, 0x7FFFFFFF, 0x80000000, 0xFFFFFFFF,
         0x7FFFFFFFFFFFFFFF, 0xFFFFFFFFFFFFFFFF, 4096, 1 << 20, 1 << 31, 1 << 40)


def demo_layers(name: str = "logistic_near_binary.h5", samples: int = NPZ_SAMPLES) -> dict:
    """The arrays and attributes of a demo dump, first ``samples`` rows, as write_npz takes."""
    layers = {}
    with h5py.File(DEMO_DUMPS / name, "r") as f:
        for layer, group in f["layers"].items():
            spec = {"activation": group.attrs["activation"]}
            for array in ("preact", "output", "weight", "bias"):
                if array in group:
                    data = group[array][()]
                    spec[array] = data[:samples] if array in ("preact", "output") else data
            layers[layer] = spec
    return layers


def write_seeds(folder: Path) -> dict[str, Path]:
    """Every seed file, written into ``folder``: name -> path."""
    from actdoc.io.writer import write_npz

    folder.mkdir(parents=True, exist_ok=True)
    seeds = {name: DEMO_DUMPS / name for name in HDF5_SEEDS}
    layers = demo_layers()
    seeds["write_npz.npz"] = write_npz(folder / "write_npz.npz", layers, overwrite=True)
    seeds["write_npz_deflate.npz"] = write_npz(folder / "write_npz_deflate.npz", layers,
                                               compress=True, overwrite=True)
    arrays = {f"{layer}/{array}": value for layer, spec in layers.items()
              for array, value in spec.items() if array != "activation"}
    np.savez(folder / "savez.npz", **arrays)
    seeds["savez.npz"] = folder / "savez.npz"
    np.savez_compressed(folder / "savez_compressed.npz", **arrays)
    seeds["savez_compressed.npz"] = folder / "savez_compressed.npz"
    for method, label in ((zipfile.ZIP_BZIP2, "bzip2"), (zipfile.ZIP_LZMA, "lzma")):
        path = folder / f"zip_{label}.npz"
        with zipfile.ZipFile(path, "w", method) as zf:
            for key, value in arrays.items():
                with zf.open(key + ".npy", "w") as member:
                    np.lib.format.write_array(member, np.asarray(value), allow_pickle=False)
        seeds[path.name] = path
    return seeds


def hdf5_data_ranges(path: Path) -> list[tuple[int, int]]:
    """Byte ranges of every dataset's raw values (contiguous storage or chunks)."""
    ranges = []

    def visit(_name: str, obj) -> None:
        if not isinstance(obj, h5py.Dataset):
            return
        offset = obj.id.get_offset()
        if offset is not None:
            ranges.append((offset, offset + obj.id.get_storage_size()))
        elif obj.chunks is not None:
            for index in range(obj.id.get_num_chunks()):
                info = obj.id.get_chunk_info(index)
                ranges.append((info.byte_offset, info.byte_offset + info.size))

    with h5py.File(path, "r") as f:
        f.visititems(visit)
    return sorted(ranges)


def npz_structure_ranges(path: Path) -> list[tuple[int, int]]:
    """Zip headers, the central directory and end record, and each member's first 160 bytes."""
    data = path.read_bytes()
    ranges = []
    with zipfile.ZipFile(path) as zf:
        for info in zf.infolist():
            name_length, extra_length = struct.unpack_from("<HH", data, info.header_offset + 26)
            start = info.header_offset + 30 + name_length + extra_length
            ranges.append((info.header_offset, start + min(160, info.compress_size)))
    central = data.rfind(b"PK\x01\x02", 0, data.rfind(b"PK\x05\x06"))
    first_central = data.find(b"PK\x01\x02")
    ranges.append((first_central if first_central >= 0 else central, len(data)))
    return ranges


def structure_positions(path: Path) -> list[int]:
    """Offsets of the bytes that describe the data (not the data values themselves)."""
    size = path.stat().st_size
    if path.suffix == ".h5":
        positions, cursor = [], 0
        for start, stop in hdf5_data_ranges(path):
            positions.extend(range(cursor, max(cursor, start)))
            cursor = max(cursor, stop)
        positions.extend(range(cursor, size))
        return positions
    return sorted({p for start, stop in npz_structure_ranges(path) for p in range(start, stop)
                   if p < size})


@dataclass(frozen=True)
class Mutation:
    """One change to a file's bytes; ``describe()`` is how a report names it."""

    op: str            # set, flip, word4, word8, insert, delete, truncate
    position: int
    value: int = 0     # the byte (set, insert), bit (flip), word, or a count (insert, delete)
    count: int = 1

    def apply(self, data: bytes) -> bytes:
        buf = bytearray(data)
        if not buf and self.op != "insert":  # truncated to nothing: only an insert can act
            return data
        pos = min(self.position, max(0, len(buf) - 1))
        if self.op == "set":
            buf[pos] = self.value & 0xFF
        elif self.op == "flip":
            buf[pos] ^= 1 << (self.value % 8)
        elif self.op in ("word4", "word8"):
            width = 4 if self.op == "word4" else 8
            word = (self.value & ((1 << (8 * width)) - 1)).to_bytes(width, "little")
            buf[pos:pos + width] = word[:max(0, len(buf) - pos)]
        elif self.op == "insert":
            buf[pos:pos] = bytes([self.value & 0xFF]) * self.count
        elif self.op == "delete":
            del buf[pos:pos + self.count]
        elif self.op == "truncate":
            del buf[pos:]
        else:
            raise ValueError(f"unknown mutation {self.op}")
        return bytes(buf)

    def describe(self) -> str:
        extra = f" count={self.count}" if self.op in ("insert", "delete") else ""
        return f"{self.op} at {self.position} value={self.value:#x}{extra}"


OPS = ("set", "set", "flip", "flip", "word4", "word8", "insert", "delete", "truncate")


def random_mutation(rng: random.Random, size: int, structure: list[int]) -> Mutation:
    """A mutation aimed, four times in five, at a structural byte."""
    op = rng.choice(OPS)
    if structure and rng.random() < 0.8:
        position = rng.choice(structure)
    else:
        position = rng.randrange(max(1, size))
    if op == "set":
        value = rng.choice((0, 0xFF, 0x7F, 0x80, rng.randrange(256)))
    elif op == "flip":
        value = rng.randrange(8)
    elif op in ("word4", "word8"):
        value = rng.choice(WORDS + (size, rng.randrange(1 << 32)))
    else:
        value = rng.randrange(256)
    count = rng.choice((1, 2, 7, 64)) if op in ("insert", "delete") else 1
    return Mutation(op, position, value, count)


#: One-byte changes to the demo dumps that make the HDF5 library itself loop for ever while
#: actdoc reads the layers' ``activation`` attribute (a variable-length string kept in the global
#: heap collection "GCOL" at offset 2048 of every demo dump): (seed, byte offset, new value).
#: Offsets 2072, 2096 and 2120 are the low bytes of the sizes of heap objects 1-3, 2144 that of
#: the free space. Found by scanning each collection's first 128 bytes with five values;
#: docs/reader-fuzzing.md lists them all and explains the loop. actdoc cannot interrupt it (the
#: library holds the GIL); the dashboard opens uploads in a child process with a time limit,
#: and these files are its test cases.
HDF5_HANGS = (
    ("relu_dying_step2.h5", 2096, 0x52),
    ("relu_dying_step2.h5", 2072, 0x00),
    ("healthy_baseline.h5", 2120, 0xFF),
    ("tanh_raw_inputs.h5", 2144, 0x80),
)
