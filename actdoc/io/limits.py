"""Size limits applied while a dump is opened and read: one frozen object handed to the readers.

A dump is untrusted until checked: a tiny file can declare arrays of many gigabytes. The command
line reads the user's own files and defaults to generous limits (``ReadLimits()``); the dashboard
reads files from anyone who can reach it and uses ``ReadLimits.for_uploads()``. Every limit is
documented in docs/dump-layout.md and can be changed (command-line options, create_app arguments).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Largest single NPZ member, uncompressed, in bytes (8 GiB) unless a limit says otherwise.
DEFAULT_MEMBER_BYTES = 8 * 1024**3


@dataclass(frozen=True)
class ReadLimits:
    """How much a dump may declare before it is refused with one sentence.

    ``None`` means no limit of that kind. ``member_bytes`` bounds one NPZ member (uncompressed,
    from the zip directory and the ``.npy`` header); ``total_bytes`` the declared size of all
    arrays of the dump together (layers and probe); ``units_per_layer`` the units (or channels)
    any array of a layer declares; ``weight_bytes`` one layer's weight array. docs/dump-layout.md
    gives each default and why.
    """

    member_bytes: int = DEFAULT_MEMBER_BYTES
    total_bytes: int | None = None
    units_per_layer: int | None = None
    weight_bytes: int | None = None

    @classmethod
    def for_uploads(cls) -> "ReadLimits":
        """The stricter limits for files uploaded to the dashboard."""
        return cls(member_bytes=2 * 1024**3, total_bytes=8 * 1024**3,
                   units_per_layer=262_144, weight_bytes=256 * 1024**2)


def size_text(nbytes: int) -> str:
    """``1073741824 bytes (1.0 GiB)``: exact for the record, readable for the eye."""
    for unit, scale in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if nbytes >= scale:
            return f"{nbytes} bytes ({nbytes / scale:.1f} {unit})"
    return f"{nbytes} bytes"


def check_declared(raw, limits: ReadLimits) -> None:
    """Refuse a dump whose declared shapes pass a limit, before any of its data is read.

    ``raw`` is what a reader listed (``actdoc.io.base.RawDump``): shapes and dtypes come from
    the file's own descriptions (HDF5 dataspaces, ``.npy`` headers), so nothing is decompressed
    or allocated. The sentence names the file, layer and array and the limit with its option.
    """
    from actdoc.errors import DumpTooLarge, describe

    arrays = [(layer.name, name, source) for layer in raw.layers
              for name, source in layer.arrays.items()]
    if raw.probe_input is not None:
        arrays.append((None, "probe/input", raw.probe_input))
    total = 0
    for layer, name, source in arrays:
        shape = tuple(int(n) for n in source.shape)
        nbytes = math.prod(shape) * np.dtype(source.dtype).itemsize
        where = describe(raw.path, layer, name)
        units = shape[1] if name in ("preact", "output") and len(shape) > 1 else \
            shape[0] if name in ("weight", "bias") and shape else None
        if limits.units_per_layer is not None and units is not None \
                and units > limits.units_per_layer:
            raise DumpTooLarge(f"{where}: declares {units} units, more than the limit of "
                               f"{limits.units_per_layer} units per layer "
                               f"(ReadLimits.units_per_layer, --max-units)")
        if limits.weight_bytes is not None and name == "weight" and nbytes > limits.weight_bytes:
            raise DumpTooLarge(f"{where}: declares {size_text(nbytes)} of weights, more than "
                               f"the limit of {size_text(limits.weight_bytes)} "
                               f"(ReadLimits.weight_bytes, --max-weight-bytes)")
        total += nbytes
        if limits.total_bytes is not None and total > limits.total_bytes:
            raise DumpTooLarge(f"{where}: brings the arrays' declared size to "
                               f"{size_text(total)}, more than the limit of "
                               f"{size_text(limits.total_bytes)} for a whole dump "
                               f"(ReadLimits.total_bytes, --max-total-bytes)")
