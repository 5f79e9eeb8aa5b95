"""State dicts saved as safetensors: weights only, read with the ``safetensors`` package (no pickle).

A safetensors file is an 8-byte little-endian header length, a JSON header naming each tensor's
dtype, shape and byte range, then the raw bytes. The reader recognises it by that shape of its
first bytes (never by its name), checks the whole header against the file before any tensor is
read (sizes, ranges inside the file, dtypes), and hands the tensors named ``<layer>.weight`` and
``<layer>.bias`` to the state-dict rules of docs/contract.md section 3 (``actdoc.io.statedict``).
A tensor named ``probe/input`` (else ``probe.input``) is the file's probe, which the forward pass
runs over (docs/dump-layout.md, "Forward pass over a probe").

The format stores tensors sorted by dtype and name, so the file does not keep the forward order.
The layers are put in the one order in which every layer's fan-in equals the previous layer's
units, where the shapes allow exactly one such chain; otherwise in natural name order ("fc2"
before "fc10"), as for HDF5 files that do not track creation order (docs/dump-layout.md).
"""

from __future__ import annotations

import json
import math
import struct
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from actdoc.errors import DumpTooLarge, InvalidDump, UnreadableDump, describe
from actdoc.io import statedict
from actdoc.io.base import RawDump, RawLayer

#: Largest header accepted (the safetensors package's own limit is 100 MB).
MAX_HEADER_BYTES = 100 * 1000 * 1000
#: Stored dtype names and their numpy types; BF16 is widened to float32 on read.
DTYPES = {"F16": np.float16, "F32": np.float32, "F64": np.float64, "BF16": np.uint16,
          "I8": np.int8, "I16": np.int16, "I32": np.int32, "I64": np.int64, "U8": np.uint8,
          "U16": np.uint16, "U32": np.uint32, "U64": np.uint64, "BOOL": np.bool_}
#: Steps of the search for a unique chain order before falling back to name order.
CHAIN_SEARCH_STEPS = 100_000


class TensorSource:
    """One tensor of the file behind the ArraySource contract, loaded whole on first use
    (parameters are small next to activations)."""

    def __init__(self, path: Path, key: str, entry: Mapping[str, Any], data_start: int):
        self.path, self.key = path, key
        self.stored = str(entry["dtype"])
        self.shape = tuple(int(n) for n in entry["shape"])
        self.dtype = np.dtype(np.float32 if self.stored == "BF16" else DTYPES[self.stored])
        self._offset = data_start + int(entry["data_offsets"][0])
        self._array: np.ndarray | None = None

    def read_all(self) -> np.ndarray:
        if self._array is None:
            self._array = self._load()
        return self._array

    def _load(self) -> np.ndarray:
        try:
            if self.stored == "BF16":  # numpy has no bfloat16: its bits are float32's top half
                count = math.prod(self.shape)
                raw = np.fromfile(self.path, np.dtype("<u2"), count, offset=self._offset)
                return (raw.astype(np.uint32) << 16).view(np.float32).reshape(self.shape)
            try:
                from safetensors import safe_open
            except ImportError:
                raise UnreadableDump(f"{describe(self.path)}: reading safetensors files needs "
                                     f"the 'safetensors' package (pip install "
                                     f"'actdoc[safetensors]')") from None
            with safe_open(str(self.path), framework="np") as handle:
                return np.asarray(handle.get_tensor(self.key))
        except (OSError, ValueError, RuntimeError) as exc:
            raise UnreadableDump(f"{describe(self.path, None, self.key)}: cannot be read "
                                 f"({exc})") from None

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        rows = self.read_all()[start:stop]
        if out is not None and out.shape == rows.shape and out.dtype == rows.dtype:
            out[...] = rows
            return out
        return rows

    def read_unit(self, unit: int) -> np.ndarray:
        return self.read_all()[:, unit]


def header_length(head: bytes) -> int | None:
    """The declared header length when ``head`` starts like a safetensors file, else None."""
    if len(head) < 9 or head[8:9] != b"{":
        return None
    length = struct.unpack("<Q", head[:8])[0]
    return length if 2 <= length <= MAX_HEADER_BYTES else None


def read_header(path: Path) -> tuple[dict[str, Any], int]:
    """The checked header (tensor entries only) and the offset where tensor bytes start."""
    where = describe(path)
    try:
        size = path.stat().st_size
        with open(path, "rb") as handle:
            length = header_length(handle.read(16))
            if length is None:
                raise UnreadableDump(f"{where}: not a safetensors file (bad header length)")
            handle.seek(8)
            text = handle.read(length)
    except OSError as exc:
        raise UnreadableDump(f"{where}: cannot be read ({exc.strerror or exc})") from None
    if 8 + length > size or len(text) != length:
        raise UnreadableDump(f"{where}: the safetensors header declares {length} bytes but the "
                             f"file holds {size} in all (truncated)")
    try:
        header = json.loads(text.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        raise UnreadableDump(f"{where}: the safetensors header is not valid JSON") from None
    if not isinstance(header, dict):
        raise UnreadableDump(f"{where}: the safetensors header is not a JSON object")
    header.pop("__metadata__", None)
    data_bytes = size - 8 - length
    for key, entry in header.items():
        check_entry(path, key, entry, data_bytes)
    return header, 8 + length


def check_entry(path: Path, key: str, entry: Any, data_bytes: int) -> None:
    """One tensor's header entry: a known dtype, a shape, and a byte range that fits both."""
    where = describe(path, None, key)
    if not isinstance(entry, dict) or not {"dtype", "shape", "data_offsets"} <= set(entry):
        raise UnreadableDump(f"{where}: the header entry lacks dtype, shape or data_offsets")
    shape, offsets = entry["shape"], entry["data_offsets"]
    if not isinstance(shape, list) or not all(isinstance(n, int) and n >= 0 for n in shape):
        raise UnreadableDump(f"{where}: the header gives an invalid shape {shape!r}")
    if (not isinstance(offsets, list) or len(offsets) != 2
            or not all(isinstance(n, int) for n in offsets)
            or not 0 <= offsets[0] <= offsets[1] <= data_bytes):
        raise UnreadableDump(f"{where}: data_offsets {offsets!r} fall outside the file's "
                             f"{data_bytes} data bytes (truncated or corrupt)")
    dtype = entry["dtype"]
    if dtype not in DTYPES:
        if statedict.parameter_of(key) is None and key not in PROBE_NAMES:
            return  # a tensor actdoc never reads (e.g. float8 buffers) may be any type
        raise InvalidDump(f"{where}: dtype {dtype} is not accepted; expected F16, BF16, F32 or "
                          f"F64")
    itemsize = 2 if dtype == "BF16" else np.dtype(DTYPES[dtype]).itemsize
    if offsets[1] - offsets[0] != math.prod(shape) * itemsize:
        raise UnreadableDump(f"{where}: shape {shape} of {dtype} needs "
                             f"{math.prod(shape) * itemsize} bytes but data_offsets give "
                             f"{offsets[1] - offsets[0]}")


def chain_order(layers: list[RawLayer]) -> list[RawLayer] | None:
    """The layers in the only order where each dense layer's fan-in is the previous layer's
    units, or None when the shapes allow none or several (or the search is too long)."""
    shapes = []
    for layer in layers:
        weight = layer.arrays.get("weight")
        if weight is None or len(weight.shape) != 2:
            return None
        shapes.append((int(weight.shape[0]), int(weight.shape[1])))
    found: list[list[int]] = []
    steps = 0

    def extend(path: list[int], left: set[int]) -> bool:
        nonlocal steps
        steps += 1
        if steps > CHAIN_SEARCH_STEPS:
            return False
        if not left:
            found.append(list(path))
            return len(found) < 2
        for nxt in sorted(left):
            if path and shapes[nxt][1] != shapes[path[-1]][0]:
                continue
            path.append(nxt)
            left.remove(nxt)
            going = extend(path, left)
            left.add(nxt)
            path.pop()
            if not going:
                return False
        return True

    finished = extend([], set(range(len(layers))))
    if not finished or len(found) != 1:
        return None
    return [layers[i] for i in found[0]]


#: Tensor names taken as the probe input (the samples a forward pass runs over), in order of
#: preference: the dump layout's ``probe/input`` first, then the dotted ``probe.input``.
PROBE_NAMES = ("probe/input", "probe.input")


class SafetensorsReader:
    """The reader contract for safetensors state dicts (weights only)."""

    name = "safetensors"

    def sniff(self, head: bytes) -> bool:
        return header_length(head) is not None

    def read(self, path: Path, options: Mapping[str, Any]) -> RawDump:
        header, data_start = read_header(path)
        limits = options.get("limits")
        member_limit = options.get("member_limit_bytes")
        for key, entry in header.items():
            nbytes = entry["data_offsets"][1] - entry["data_offsets"][0]
            if member_limit is not None and nbytes > member_limit:
                raise DumpTooLarge(f"{describe(path, None, key)}: holds {nbytes} bytes, past the "
                                   f"limit of {member_limit}")
        weight_limit = getattr(limits, "weight_bytes", None)
        total = sum(e["data_offsets"][1] - e["data_offsets"][0] for e in header.values())
        if weight_limit is not None and total > weight_limit:
            raise DumpTooLarge(f"{describe(path)}: holds {total} bytes of tensors, past the "
                               f"limit of {weight_limit}")
        keys = [key for key in header if statedict.parameter_of(key) is not None]
        if not keys:
            raise InvalidDump(f"{describe(path)}: the safetensors file holds no tensors named "
                              f"<layer>.weight or <layer>.bias")
        layers = list(statedict.raw_layers(keys, lambda key: TensorSource(path, key, header[key],
                                                                          data_start)))
        chained = chain_order(layers)
        if chained is not None:
            layers = [RawLayer(layer.name, layer.attrs, layer.arrays, position)
                      for position, layer in enumerate(chained)]
        probe_key = next((name for name in PROBE_NAMES if name in header), None)
        probe = (None if probe_key is None
                 else TensorSource(path, probe_key, header[probe_key], data_start))
        return RawDump(path=path, format="safetensors", layers=tuple(layers), probe_input=probe,
                       ordering="position" if chained is not None else "natural")


READER = SafetensorsReader()
