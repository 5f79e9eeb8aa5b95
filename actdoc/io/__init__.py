"""Opening dumps: pick the reader by the file's leading bytes, validate, assemble.

``open_dump(path)`` is the one entry point the rest of actdoc uses. The reader is chosen from the
file's content, never its name: HDF5 by its signature (at offset 0 or after a user block of 512,
1024, ... bytes), NPZ by the zip signature. ``activations`` carries the command line's
``--activation`` values; they name kinds for state-dict weight archives (which store none) and
override the declared or inferred kind of any dump.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any, Sequence

from actdoc.digest import file_sha256
from actdoc.errors import InvalidDump, UnreadableDump, UnsupportedFormat, describe
from actdoc.io.base import RawDump, assemble, check_attributes, order_layers
from actdoc.io.hdf5 import READER as HDF5_READER, find_signature
from actdoc.io.limits import ReadLimits, check_declared
from actdoc.io.memory import MemorySource, dump_from_arrays
from actdoc.io.npz import DEFAULT_MEMBER_LIMIT, READER as NPZ_READER
from actdoc.io.safetensors_file import READER as SAFETENSORS_READER
from actdoc.model import ActivationKind, Dump

#: Every reader, tried in order on the file's first bytes.
READERS = (HDF5_READER, NPZ_READER, SAFETENSORS_READER)
HEAD_BYTES = 16

__all__ = ["open_dump", "file_sha256", "parse_activations", "READERS", "DEFAULT_MEMBER_LIMIT",
           "MemorySource", "dump_from_arrays", "ReadLimits"]


def pick_reader(path: Path) -> Any:
    """The reader whose signature the file carries, or UnreadableDump / UnsupportedFormat."""
    where = describe(path)
    if not path.exists():
        raise UnreadableDump(f"{where}: no such file")
    if path.is_dir():
        raise UnreadableDump(f"{where}: is a folder, not a dump file")
    if not path.is_file():  # a FIFO or device would block or stream forever on read
        raise UnreadableDump(f"{where}: is not a regular file; a dump must be a file on disk")
    try:
        with open(path, "rb") as handle:
            head = handle.read(HEAD_BYTES)
        for reader in READERS:
            if reader.sniff(head):
                return reader
        if find_signature(path):
            return HDF5_READER
    except OSError as exc:
        raise UnreadableDump(f"{where}: cannot be read ({exc.strerror or exc})") from None
    if not head:
        raise UnsupportedFormat(f"{where}: the file is empty; expected an HDF5, NPZ or safetensors dump")
    hint = " (a single .npy array: save the arrays with np.savez)" \
        if head.startswith(b"\x93NUMPY") else ""
    raise UnsupportedFormat(f"{where}: neither HDF5, NPZ nor safetensors (it starts with {head[:8]!r}){hint}")


def parse_activations(specs: Sequence[str], path: Path, option: str = "--activation"
                      ) -> tuple[ActivationKind | None, dict[str, ActivationKind]]:
    """``--activation`` values: one bare ``KIND`` and/or repeated ``LAYER=KIND``; ``option``
    names where they came from in the error sentences."""
    default: ActivationKind | None = None
    per_layer: dict[str, ActivationKind] = {}
    for spec in specs:
        layer, sep, kind = str(spec).rpartition("=")
        if sep:
            where = describe(path, layer.strip())
            per_layer[layer.strip()] = ActivationKind.parse(kind, where)
        elif default is not None:
            raise InvalidDump(f"{describe(path)}: {option} gives more than one kind for "
                              f"every layer ('{default.value}' and '{kind}'); use LAYER=KIND "
                              f"for the exceptions")
        else:
            default = ActivationKind.parse(kind, f"{describe(path)}, {option}")
    return default, per_layer


def apply_activations(raw: RawDump, specs: Sequence[str]) -> RawDump:
    """Declared kinds from ``--activation``: a bare KIND for every layer but the last (in
    forward order), LAYER=KIND for one layer; both replace what the file says."""
    default, per_layer = parse_activations(specs, raw.path)
    if not raw.layers:
        return raw
    names = [layer.name for layer in raw.layers]
    unknown = [name for name in per_layer if name not in names]
    if unknown:
        # Said without naming the option: the kinds come from --activation or from an
        # upload's 'activation' field.
        raise InvalidDump(f"{describe(raw.path, unknown[0])}: an activation kind was declared "
                          f"for a layer the dump does not hold; its layers are "
                          f"{', '.join(names)}")
    for layer in raw.layers:  # ordering reads the 'order' attributes: refuse bad ones first
        check_attributes(raw, layer)
    ordered = [layer.name for layer in order_layers(raw)]
    chosen = {name: default for name in ordered[:-1]} if default is not None else {}
    chosen.update(per_layer)
    layers = tuple(
        dataclasses.replace(layer, attrs={**layer.attrs, "activation": chosen[layer.name].value})
        if layer.name in chosen else layer
        for layer in raw.layers)
    return dataclasses.replace(raw, layers=layers)


def open_dump(path: str | Path, *, activations: Sequence[str] = (),
              limits: ReadLimits | None = None,
              member_limit_bytes: int | None = None) -> Dump:
    """Open and validate a dump file; the returned Dump reads its arrays lazily (close it).

    ``limits`` bounds what the file may declare (``ReadLimits()`` when None), checked from the
    declared shapes before any data is read;
    ``member_limit_bytes`` is the older spelling of ``limits.member_bytes`` and wins when given.
    """
    path = Path(path)
    limits = limits or ReadLimits()
    if member_limit_bytes is not None:
        limits = dataclasses.replace(limits, member_bytes=member_limit_bytes)
    reader = pick_reader(path)
    raw = reader.read(path, {"member_limit_bytes": limits.member_bytes, "limits": limits})
    try:
        check_declared(raw, limits)  # before assembly, whose kind inference reads data
        if activations:
            raw = apply_activations(raw, activations)
        return assemble(raw)
    except BaseException:
        if raw.closer is not None:
            raw.closer()
        raise
