"""The reader contract and the shared step that turns what a reader found into a Dump.

A reader only lists what is stored: layers with their attributes, a position for ordering, and an
ArraySource per array. Everything that must be the same for every format (ordering, shape checks,
activation kinds, declared or inferred) happens once, here, in ``assemble``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Protocol

from actdoc.errors import InvalidDump, describe
from actdoc.model import (
    ActivationKind,
    ActivationSource,
    ArrayInfo,
    ArraySource,
    Dump,
    Layer,
    LayerInfo,
)


@dataclass(frozen=True)
class RawLayer:
    """One layer as stored: attributes, arrays, and its position in the file."""

    name: str
    attrs: Mapping[str, Any]
    arrays: Mapping[str, ArraySource]
    position: int


@dataclass(frozen=True)
class RawDump:
    """What a reader found, before validation and kind resolution."""

    path: Path
    format: str
    layers: tuple[RawLayer, ...]
    probe_input: ArraySource | None = None
    closer: Callable[[], None] | None = field(default=None, compare=False)
    #: "order" (every layer has the attribute), "position" (creation or first appearance) or
    #: "natural" (names in natural sort order): how ``assemble`` orders the layers.
    ordering: str = "position"


class Reader(Protocol):
    """One stored layout: recognised by its leading bytes, read into a RawDump."""

    name: str

    def sniff(self, head: bytes) -> bool: ...

    def read(self, path: Path, options: Mapping[str, Any]) -> RawDump: ...


def natural_key(name: str) -> list[Any]:
    """Sort key that puts "fc2" before "fc10"."""
    return [int(part) if part.isdigit() else part.lower() for part in re.split(r"(\d+)", name)]


def order_layers(raw: RawDump) -> list[RawLayer]:
    """Forward order: the ``order`` attribute where every layer has one, else the reader's."""
    layers = list(raw.layers)
    if layers and all("order" in layer.attrs for layer in layers):
        return sorted(layers, key=lambda layer: (int(layer.attrs["order"]), layer.position))
    if raw.ordering == "natural":
        return sorted(layers, key=lambda layer: natural_key(layer.name))
    return sorted(layers, key=lambda layer: layer.position)


def resolve_kind(raw: RawDump, layer: RawLayer) -> tuple[ActivationKind, ActivationSource, dict]:
    """The layer's kind: declared in its attributes, else inferred from its arrays.

    Returns the kind, its source, and extra attributes the inference found (negative_slope,
    note).
    """
    declared = layer.attrs.get("activation")
    if declared is not None and str(declared).strip():
        where = describe(raw.path, layer.name)
        return ActivationKind.parse(str(declared), where), ActivationSource.DECLARED, {}
    try:
        from actdoc.io.infer import infer_kind
    except ImportError:  # inference not available: treat as linear and say so
        return ActivationKind.LINEAR, ActivationSource.INFERRED, {
            "note": "no activation declared; treated as linear"}
    guess = infer_kind(layer.arrays.get("preact"), layer.arrays.get("output"))
    return guess.kind, ActivationSource.INFERRED, {
        "negative_slope": guess.negative_slope, "note": guess.note}


def layer_geometry(raw: RawDump, layer: RawLayer) -> tuple[int, int, tuple[int, ...]]:
    """Units, samples and spatial shape, from the activations or else the parameters."""
    where = describe(raw.path, layer.name)
    for name in ("preact", "output"):
        source = layer.arrays.get(name)
        if source is not None:
            shape = tuple(source.shape)
            if len(shape) < 2:
                raise InvalidDump(
                    f"{describe(raw.path, layer.name, name)}: expected shape [samples, units] "
                    f"or [samples, units, *spatial], found {list(shape)}")
            return shape[1], shape[0], shape[2:]
    for name in ("weight", "bias"):
        source = layer.arrays.get(name)
        if source is not None and len(source.shape) >= 1:
            return int(source.shape[0]), 0, ()
    raise InvalidDump(f"{where}: the layer holds none of preact, output, weight, bias")


def assemble(raw: RawDump) -> Dump:
    """Validate a RawDump and build the frozen Dump in forward order."""
    if not raw.layers:
        raise InvalidDump(f"{describe(raw.path)}: the dump holds no layers")
    layers = []
    for index, stored in enumerate(order_layers(raw)):
        kind, source, found = resolve_kind(raw, stored)
        units, samples, spatial = layer_geometry(raw, stored)
        slope = stored.attrs.get("negative_slope", found.get("negative_slope"))
        info = LayerInfo(
            name=stored.name,
            index=index,
            kind=kind,
            kind_source=source,
            units=units,
            samples=samples,
            spatial_shape=tuple(spatial),
            arrays={k: ArrayInfo(tuple(v.shape), str(v.dtype)) for k, v in stored.arrays.items()},
            negative_slope=0.01 if slope is None else float(slope),
            threshold=float(stored.attrs.get("threshold", 0.0)),
            kind_note=str(found.get("note", "")),
        )
        layers.append(Layer(info=info, sources=dict(stored.arrays)))
    samples = max((layer.info.samples for layer in layers), default=0)
    return Dump(path=raw.path, format=raw.format, layers=tuple(layers), samples=samples,
                probe_input=raw.probe_input, closer=raw.closer)
