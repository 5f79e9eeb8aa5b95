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

import numpy as np

from actdoc.errors import InvalidDump, UnreadableDump, UnsafeDump, describe
from actdoc.model import (
    ACTIVATION_ARRAYS,
    GRADIENT_ARRAY,
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
        return sorted(layers, key=lambda layer: (float(np.asarray(layer.attrs["order"]).reshape(())),
                                                 layer.position))
    if raw.ordering == "natural":
        return sorted(layers, key=lambda layer: natural_key(layer.name))
    return sorted(layers, key=lambda layer: layer.position)


#: Kinds whose outputs may be stored as integers or booleans (docs/contract.md section 1).
BINARY_KINDS = frozenset({ActivationKind.THRESHOLD, ActivationKind.STOCHASTIC_BINARY})

#: Attributes that must be numbers, with what they mean (for the error sentence).
NUMERIC_ATTRIBUTES = {"order": "an integer", "negative_slope": "a number", "threshold": "a number"}


def resolve_kind(raw: RawDump, layer: RawLayer) -> tuple[ActivationKind, ActivationSource, dict]:
    """The layer's kind: declared in its attributes, else inferred from its arrays.

    Returns the kind, its source, and extra attributes the inference found (negative_slope,
    threshold, note).
    """
    declared = layer.attrs.get("activation")
    if isinstance(declared, bytes):
        declared = declared.decode("utf-8", "replace")
    from actdoc.io.infer import in_place_note, infer_kind

    preact, output = layer.arrays.get("preact"), layer.arrays.get("output")
    try:
        if declared is not None and str(declared).strip():
            where = describe(raw.path, layer.name)
            kind = ActivationKind.parse(str(declared), where)
            found: dict[str, Any] = {}
            if kind is not ActivationKind.LINEAR and preact is not None and output is not None:
                found["note"] = in_place_note(preact, output)
                found["in_place"] = bool(found["note"])
            return kind, ActivationSource.DECLARED, found
        guess = infer_kind(preact, output)
        note, suspect = guess.note, ""
        if preact is not None and output is not None:
            suspect = in_place_note(preact, output)
            note = "; ".join(part for part in (note, suspect) if part)
    except (OSError, ValueError, EOFError) as exc:
        raise UnreadableDump(
            f"{describe(raw.path, layer.name)}: reading the activations to infer the layer's "
            f"kind failed ({exc})") from None
    found = {"negative_slope": guess.negative_slope, "note": note, "in_place": bool(suspect)}
    if guess.threshold is not None:
        found["threshold"] = guess.threshold
    return guess.kind, ActivationSource.INFERRED, found


def check_numeric_dtype(raw: RawDump, layer: str, array: str, dtype: Any) -> np.dtype:
    """Refuse object and non-numeric arrays, and floats other than float16/32/64."""
    where = describe(raw.path, layer, array)
    dt = np.dtype(dtype)
    if dt.hasobject:
        raise UnsafeDump(f"{where}: holds Python objects (dtype {dt}); dumps hold numbers only")
    if dt.kind not in "fiub":
        raise InvalidDump(
            f"{where}: dtype {dt} is not a real number type; expected float16, float32 or float64")
    if dt.kind == "f" and dt.itemsize not in (2, 4, 8):
        raise InvalidDump(
            f"{where}: dtype {dt} is not accepted; expected float16, float32 or float64")
    return dt


def check_kind_dtype(raw: RawDump, layer: RawLayer, kind: ActivationKind) -> None:
    """Integer and boolean arrays are accepted only as outputs of binary kinds."""
    for name, source in layer.arrays.items():
        dt = np.dtype(source.dtype)
        if dt.kind == "f" or (name == "output" and kind in BINARY_KINDS):
            continue
        raise InvalidDump(
            f"{describe(raw.path, layer.name, name)}: dtype {dt} is accepted only for the output "
            f"of threshold and stochastic_binary layers, and this layer is {kind.value}; "
            f"store it as float16, float32 or float64")


def check_attributes(raw: RawDump, layer: RawLayer) -> dict[str, float]:
    """Numeric attributes as Python numbers, or one sentence saying which one is unusable."""
    values = {}
    for name, meaning in NUMERIC_ATTRIBUTES.items():
        if name not in layer.attrs or layer.attrs[name] is None:
            continue
        value = layer.attrs[name]
        try:
            flag = np.asarray(value).dtype == bool
            number = float("nan") if flag else float(np.asarray(value).reshape(()))
        except (TypeError, ValueError, OverflowError):
            number = float("nan")
        if not np.isfinite(number) or (name == "order" and number != int(number)):
            raise InvalidDump(
                f"{describe(raw.path, layer.name)}: attribute '{name}' must be {meaning}, "
                f"found {value!r}")
        values[name] = number
    return values


def _shape_text(shape: tuple[int, ...]) -> str:
    return "[" + ", ".join(str(n) for n in shape) + "]"


def layer_geometry(raw: RawDump, layer: RawLayer) -> tuple[int, int, tuple[int, ...]]:
    """Units, samples and spatial shape, after checking every array's rank and extent.

    Activations give the geometry; a weights-only layer takes its units from the weight (or
    bias) and has zero samples.
    """
    arrays = layer.arrays
    if not arrays:
        raise InvalidDump(
            f"{describe(raw.path, layer.name)}: the layer holds none of preact, output, weight, bias")
    for name, source in arrays.items():
        check_numeric_dtype(raw, layer.name, name, source.dtype)
    activation_shape = None
    for name in ACTIVATION_ARRAYS:
        source = arrays.get(name)
        if source is None:
            continue
        shape = tuple(int(n) for n in source.shape)
        where = describe(raw.path, layer.name, name)
        if len(shape) < 2:
            raise InvalidDump(f"{where}: expected shape [samples, units] or "
                              f"[samples, units, *spatial], found {_shape_text(shape)}")
        if 0 in shape:
            raise InvalidDump(f"{where}: the array is empty (shape {_shape_text(shape)}); "
                              f"it needs at least one sample and one unit")
        if activation_shape is not None and shape != activation_shape:
            raise InvalidDump(f"{where}: shape {_shape_text(shape)} differs from the preact's "
                              f"{_shape_text(activation_shape)}; the two must match")
        activation_shape = shape
    gradient = arrays.get(GRADIENT_ARRAY)
    if gradient is not None:
        shape = tuple(int(n) for n in gradient.shape)
        where = describe(raw.path, layer.name, GRADIENT_ARRAY)
        if activation_shape is None:
            raise InvalidDump(f"{where}: a gradient needs the layer's preact or output beside it "
                              f"(it is dL/dz on the same probe samples)")
        if shape != activation_shape:
            raise InvalidDump(f"{where}: shape {_shape_text(shape)} differs from the "
                              f"activations' {_shape_text(activation_shape)}; dL/dz must have "
                              f"the shape of preact")
    units = None if activation_shape is None else activation_shape[1]
    weight = arrays.get("weight")
    if weight is not None:
        shape = tuple(int(n) for n in weight.shape)
        where = describe(raw.path, layer.name, "weight")
        if len(shape) < 2:
            raise InvalidDump(f"{where}: expected shape [units, fan_in] or "
                              f"[units, in_channels, *kernel], found {_shape_text(shape)}")
        if 0 in shape:
            raise InvalidDump(f"{where}: the array is empty (shape {_shape_text(shape)})")
        if units is not None and shape[0] != units:
            raise InvalidDump(f"{where}: has {shape[0]} rows but the layer has {units} units; "
                              f"expected one row of incoming weights per unit")
        units = shape[0] if units is None else units
    bias = arrays.get("bias")
    if bias is not None:
        shape = tuple(int(n) for n in bias.shape)
        where = describe(raw.path, layer.name, "bias")
        if len(shape) != 1:
            raise InvalidDump(f"{where}: expected shape [units], found {_shape_text(shape)}")
        if units is not None and shape[0] != units:
            raise InvalidDump(f"{where}: has {shape[0]} entries but the layer has {units} units")
        if shape[0] == 0:
            raise InvalidDump(f"{where}: the array is empty")
        units = shape[0] if units is None else units
    if activation_shape is None:
        return int(units), 0, ()
    return activation_shape[1], activation_shape[0], activation_shape[2:]


def check_probe_input(raw: RawDump) -> None:
    """The probe input is optional; when present it must be a numeric array of samples."""
    source = raw.probe_input
    if source is None:
        return
    where = describe(raw.path, None, "probe/input")
    dt = np.dtype(source.dtype)
    if dt.hasobject or dt.kind not in "fiub":
        raise (UnsafeDump if dt.hasobject else InvalidDump)(
            f"{where}: dtype {dt} is not a real number type")
    if len(source.shape) < 1:
        raise InvalidDump(f"{where}: expected shape [samples, features], found a scalar")


def assemble(raw: RawDump) -> Dump:
    """Validate a RawDump and build the frozen Dump in forward order.

    Layers may hold different numbers of samples (a probe batch recorded in pieces); within a
    layer, preact and output must agree. The dump's ``samples`` is the largest layer's.
    """
    if not raw.layers:
        raise InvalidDump(f"{describe(raw.path)}: the dump holds no layers")
    check_probe_input(raw)
    for stored in raw.layers:
        if not stored.name.strip():
            arrays = ", ".join(sorted(stored.arrays)) or "no arrays"
            raise InvalidDump(f"{describe(raw.path)}: a layer has an empty name (it holds "
                              f"{arrays}); name every layer")
        check_attributes(raw, stored)
    layers = []
    for index, stored in enumerate(order_layers(raw)):
        units, samples, spatial = layer_geometry(raw, stored)
        attrs = check_attributes(raw, stored)
        kind, source, found = resolve_kind(raw, stored)
        check_kind_dtype(raw, stored, kind)
        slope = attrs.get("negative_slope", found.get("negative_slope"))
        threshold = attrs.get("threshold", found.get("threshold"))
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
            threshold=0.0 if threshold is None else float(threshold),
            kind_note=str(found.get("note", "")),
            in_place_suspect=bool(found.get("in_place", False)),
        )
        layers.append(Layer(info=info, sources=dict(stored.arrays)))
    samples = max((layer.info.samples for layer in layers), default=0)
    return Dump(path=raw.path, format=raw.format, layers=tuple(layers), samples=samples,
                probe_input=raw.probe_input, closer=raw.closer)
