"""Writing dumps: the public API for producing files actdoc reads (docs/dump-layout.md).

``DumpWriter`` writes the HDF5 layout of docs/contract.md section 1 incrementally: declare a layer
with ``add_layer`` and ``append`` blocks of observations as a model runs over the probe batch.
Activation datasets are resizable and chunked ``(1024 samples, 256 units)`` (whole spatial maps
per chunk, fewer samples for spatial layers), which suits both forward passes in blocks of samples
and reading one unit's column. They are not compressed: in this project's measurements gzip made
a full pass about ten times slower, and the files are scratch data, not archives.

``write_dump`` and ``write_npz`` write a whole mapping at once, in the shape ``dump_from_arrays``
takes. No writer clobbers an existing file unless ``overwrite=True``: data goes to a temporary
file in the same folder and is renamed into place only when complete.
"""

from __future__ import annotations

import json
import os
import tempfile
import warnings
from pathlib import Path
from typing import Any, Mapping

import h5py
import numpy as np

from actdoc.io.base import BINARY_KINDS
from actdoc.io.hdf5 import chunk_shape
from actdoc.model import LAYER_ARRAYS, ActivationKind

LAYOUT_VERSION = 1
LAYER_ATTRIBUTES = ("activation", "threshold", "negative_slope")
DEFAULT_CHUNK_ROWS = 1024


class InPlaceWarning(UserWarning):
    """A layer's stored pre-activations look like a copy of its outputs (docs/dump-layout.md)."""


def temporary_beside(path: Path, overwrite: bool) -> Path:
    """A fresh temporary file in ``path``'s folder, after refusing to clobber ``path``."""
    if path.exists() and not overwrite:
        raise FileExistsError(f"{path}: already exists; pass overwrite=True to replace it")
    fd, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(name, 0o666 & ~umask)
    return Path(name)


def publish(temporary: Path, path: Path, overwrite: bool) -> None:
    """Move a finished temporary file to ``path``; without overwrite, never replace a file that
    appeared meanwhile (a hard link fails if the name is taken)."""
    try:
        if overwrite:
            os.replace(temporary, path)
            return
        try:
            os.link(temporary, path)
        except FileExistsError:
            raise FileExistsError(f"{path}: already exists; pass overwrite=True to replace it")
        except OSError:  # no hard links on this file system
            if path.exists():
                raise FileExistsError(f"{path}: already exists; pass overwrite=True to replace it")
            os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)


def split_spec(name: str, spec: Mapping[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """A layer mapping as (arrays, attributes), refusing keys the layout does not have."""
    check_name(name)
    unknown = sorted(set(spec) - set(LAYER_ARRAYS) - set(LAYER_ATTRIBUTES))
    if unknown:
        raise ValueError(f"layer '{name}': unknown keys {unknown}; expected arrays "
                         f"{list(LAYER_ARRAYS)} and attributes {list(LAYER_ATTRIBUTES)}")
    arrays = {k: np.asarray(spec[k]) for k in LAYER_ARRAYS if spec.get(k) is not None}
    attrs = {k: spec[k] for k in LAYER_ATTRIBUTES if spec.get(k) is not None}
    return arrays, attrs


def check_name(name: str) -> None:
    if not isinstance(name, str) or not name or "/" in name:
        raise ValueError(f"layer name {name!r}: must be a non-empty string without '/'")


def stored_dtype(array: np.ndarray, dtype: Any, kind: ActivationKind | None,
                 is_output: bool) -> np.dtype:
    """The dtype an activation array is written in: ``dtype``, or the array's own float dtype
    when ``dtype`` is None; integer and boolean outputs of binary kinds keep theirs."""
    if is_output and kind in BINARY_KINDS and array.dtype.kind in "iub":
        return array.dtype
    if dtype is not None:
        return np.dtype(dtype)
    return array.dtype if array.dtype.kind == "f" else np.dtype(np.float32)


class DumpWriter:
    """Write an HDF5 dump layer by layer, appending observations in blocks.

    >>> with DumpWriter("run.h5") as out:                      # doctest: +SKIP
    ...     out.add_layer("fc1", "relu", units=256, weight=w1, bias=b1)
    ...     for z, y in batches:
    ...         out.append("fc1", preact=z, output=y)
    """

    def __init__(self, path: str | Path, *, overwrite: bool = False,
                 chunk_rows: int = DEFAULT_CHUNK_ROWS):
        self.path = Path(path)
        self.overwrite = overwrite
        self.chunk_rows = int(chunk_rows)
        self._temporary = temporary_beside(self.path, overwrite)
        self._file = h5py.File(self._temporary, "w", track_order=True)
        self._file.attrs["actdoc_layout"] = LAYOUT_VERSION
        self._layers = self._file.create_group("layers", track_order=True)
        self._specs: dict[str, dict[str, Any]] = {}

    def __enter__(self) -> "DumpWriter":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def add_layer(self, name: str, activation: str | ActivationKind | None = None, *,
                  units: int | None = None, spatial: tuple[int, ...] = (),
                  weight: Any = None, bias: Any = None, preact: Any = None, output: Any = None,
                  grad: Any = None,
                  threshold: float | None = None, negative_slope: float | None = None,
                  dtype: Any = "float32") -> None:
        """Declare a layer (in forward order) with its parameters and, optionally, its whole
        activations (``grad``: dL/dz, optional). ``dtype`` is the stored type of preact, output
        and grad (None keeps the arrays' own float type). Arrays given here get chunks clipped
        to their length; for streaming, give ``units`` (and ``spatial``) and ``append`` the
        blocks instead."""
        check_name(name)
        if name in self._specs:
            raise ValueError(f"layer '{name}': added twice")
        kind = None if activation is None else ActivationKind.parse(str(activation))
        group = self._layers.create_group(name, track_order=True)
        if kind is not None:
            group.attrs["activation"] = kind.value
        group.attrs["order"] = len(self._specs)
        if threshold is not None:
            group.attrs["threshold"] = float(threshold)
        if negative_slope is not None:
            group.attrs["negative_slope"] = float(negative_slope)
        self._specs[name] = {"kind": kind, "dtype": dtype, "units": units,
                             "spatial": tuple(spatial), "clip": preact is not None
                             or output is not None or grad is not None, "same": None}
        for array_name, value in (("weight", weight), ("bias", bias)):
            if value is not None:
                value = np.asarray(value)
                if value.dtype.kind != "f":
                    value = value.astype(np.float32 if dtype is None else dtype)
                group.create_dataset(array_name, data=value)
        self._check_parameters(name)
        if preact is not None or output is not None or grad is not None:
            self.append(name, preact=preact, output=output, grad=grad)

    def _check_parameters(self, name: str) -> None:
        """Weight rows and bias length against the layer's units, once the units are known
        (given, or from the first block): a parameter of another layer is refused here."""
        group, units = self._layers[name], self._specs[name]["units"]
        weight, bias = group.get("weight"), group.get("bias")
        problem = None
        if weight is not None and weight.ndim < 2:
            problem = (f"weight: expected [units, fan_in] or [units, in_channels, *kernel], got "
                       f"shape {list(weight.shape)}")
        elif bias is not None and bias.ndim != 1:
            problem = f"bias: expected shape [units], got {list(bias.shape)}"
        elif weight is not None and bias is not None and weight.shape[0] != bias.shape[0]:
            problem = (f"weight has {weight.shape[0]} rows but bias has {bias.shape[0]} entries; "
                       f"both hold one entry per unit")
        elif units is not None and weight is not None and weight.shape[0] != units:
            problem = (f"weight has {weight.shape[0]} rows but the layer has {units} units; "
                       f"expected this layer's own incoming weights, one row per unit")
        elif units is not None and bias is not None and bias.shape[0] != units:
            problem = f"bias has {bias.shape[0]} entries but the layer has {units} units"
        if problem is not None:
            self.abort()
            raise ValueError(f"layer '{name}', {problem}")

    def append(self, name: str, *, preact: Any = None, output: Any = None,
               grad: Any = None) -> None:
        """Append a block of samples (``[block, units, *spatial]``) to a layer's arrays
        (``grad``: dL/dz on the same samples, optional)."""
        spec = self._specs.get(name)
        if spec is None:
            raise KeyError(f"layer '{name}': add_layer it first")
        for array_name, value in (("preact", preact), ("output", output), ("grad", grad)):
            if value is None:
                continue
            block = np.asarray(value)
            if block.ndim < 2:
                raise ValueError(f"layer '{name}', {array_name}: expected [samples, units, "
                                 f"*spatial], got shape {list(block.shape)}")
            if spec["units"] is None:
                spec["units"], spec["spatial"] = block.shape[1], tuple(block.shape[2:])
                self._check_parameters(name)
            expected = (spec["units"],) + spec["spatial"]
            if tuple(block.shape[1:]) != expected:
                raise ValueError(f"layer '{name}', {array_name}: block shape "
                                 f"{list(block.shape)} does not continue [samples, "
                                 f"{', '.join(map(str, expected))}]")
            dataset = self._dataset(name, array_name, block)
            start = dataset.shape[0]
            dataset.resize(start + block.shape[0], axis=0)
            dataset[start:] = block.astype(dataset.dtype, copy=False)
        if preact is not None and output is not None:
            self._watch_in_place(name, np.asarray(preact), np.asarray(output))

    def _watch_in_place(self, name: str, z: np.ndarray, y: np.ndarray) -> None:
        """Track whether every block so far had z == y exactly with z never negative (on a
        layer not declared linear): the mark of z recorded after an in-place activation."""
        spec = self._specs[name]
        if spec["kind"] is ActivationKind.LINEAR or spec["same"] is False:
            return
        with np.errstate(invalid="ignore"):
            same = z.shape == y.shape and bool(np.array_equal(z, y)) and bool((z >= 0).all())
        spec["same"] = same and (spec["same"] is not None or bool((z > 0).any()))

    def _dataset(self, name: str, array_name: str, block: np.ndarray) -> h5py.Dataset:
        group = self._layers[name]
        if array_name in group:
            return group[array_name]
        spec = self._specs[name]
        rows = min(self.chunk_rows, max(1, block.shape[0])) if spec["clip"] else self.chunk_rows
        dtype = stored_dtype(block, spec["dtype"], spec["kind"], array_name == "output")
        shape = (spec["units"],) + spec["spatial"]
        return group.create_dataset(array_name, shape=(0,) + shape, maxshape=(None,) + shape,
                                    dtype=dtype, chunks=chunk_shape(shape[0], shape[1:], rows))

    def set_probe_input(self, inputs: Any) -> None:
        """Store the inputs the activations were recorded on, as /probe/input."""
        probe = self._file.require_group("probe")
        if "input" in probe:
            del probe["input"]
        probe.create_dataset("input", data=np.asarray(inputs))

    def append_probe_input(self, block: Any) -> None:
        """Append a block of probe inputs ``[block, ...]`` to /probe/input (streamed)."""
        block = np.asarray(block)
        if block.ndim < 1:
            raise ValueError("probe input: expected [samples, ...], got a scalar")
        probe = self._file.require_group("probe")
        if "input" not in probe:
            per_row = max(1, int(np.prod(block.shape[1:])))
            rows = max(1, min(self.chunk_rows, (1 << 16) // per_row))  # about 64 Ki values
            probe.create_dataset("input", shape=(0,) + block.shape[1:], dtype=block.dtype,
                                 maxshape=(None,) + block.shape[1:],
                                 chunks=(rows,) + block.shape[1:])
        dataset = probe["input"]
        if tuple(dataset.shape[1:]) != tuple(block.shape[1:]):
            raise ValueError(f"probe input: block shape {list(block.shape)} does not continue "
                             f"{[None, *dataset.shape[1:]]}")
        start = dataset.shape[0]
        dataset.resize(start + block.shape[0], axis=0)
        dataset[start:] = block.astype(dataset.dtype, copy=False)

    def close(self) -> None:
        """Check every layer holds data, finish the file and move it into place."""
        if self._file is None:
            return
        try:
            for name in self._specs:
                group = self._layers[name]
                if not len(group):
                    raise ValueError(f"layer '{name}': holds no arrays; give weight or bias, or "
                                     f"append preact or output")
                if "preact" in group and "output" in group and \
                        group["preact"].shape != group["output"].shape:
                    raise ValueError(f"layer '{name}': preact has {group['preact'].shape[0]} "
                                     f"samples but output has {group['output'].shape[0]}")
                if "grad" in group:
                    beside = group["preact"] if "preact" in group else group.get("output")
                    if beside is None or beside.shape != group["grad"].shape:
                        raise ValueError(f"layer '{name}': grad must have the shape of preact "
                                         f"(dL/dz on the same samples)")
        except ValueError:
            self.abort()
            raise
        self._file.close()
        self._file = None
        publish(self._temporary, self.path, self.overwrite)
        suspects = [name for name, spec in self._specs.items() if spec["same"]]
        if suspects:
            warnings.warn(f"{self.path.name}: in layer(s) {', '.join(suspects)} preact equals "
                          f"output exactly and is never negative: z was probably recorded after "
                          f"an in-place activation overwrote it; copy it first (.clone() in "
                          f"PyTorch) or use actdoc.capture", InPlaceWarning, stacklevel=2)

    def abort(self) -> None:
        """Discard everything written; the target path is left untouched."""
        if self._file is not None:
            self._file.close()
            self._file = None
        self._temporary.unlink(missing_ok=True)


def write_dump(path: str | Path, layers: Mapping[str, Mapping[str, Any]],
               probe_input: Any = None, *, overwrite: bool = False) -> Path:
    """Write ``{layer: {"activation": ..., "preact": z, "output": y, "weight": w, ...}}`` as an
    HDF5 dump, in the mapping's order, keeping the arrays' float dtypes."""
    with DumpWriter(path, overwrite=overwrite) as out:
        for name, spec in layers.items():
            arrays, attrs = split_spec(name, spec)
            out.add_layer(name, attrs.pop("activation", None), dtype=None, **attrs, **arrays)
        if probe_input is not None:
            out.set_probe_input(probe_input)
    return Path(path)


def write_npz(path: str | Path, layers: Mapping[str, Mapping[str, Any]],
              probe_input: Any = None, *, compress: bool = False,
              overwrite: bool = False) -> Path:
    """Write the same mapping as an NPZ dump (docs/contract.md section 2) with ``actdoc_meta``
    recording the order and attributes; ``compress`` deflates the members."""
    path = Path(path)
    arrays: dict[str, np.ndarray] = {}
    meta = []
    for name, spec in layers.items():
        layer_arrays, attrs = split_spec(name, spec)
        if "activation" in attrs:
            attrs["activation"] = ActivationKind.parse(str(attrs["activation"])).value
        meta.append({"name": name, **{k: (v if k == "activation" else float(v))
                                      for k, v in attrs.items()}})
        arrays.update({f"{name}/{k}": v for k, v in layer_arrays.items()})
    if probe_input is not None:
        arrays["probe/input"] = np.asarray(probe_input)
    arrays["actdoc_meta"] = np.array(json.dumps({"layers": meta}))
    temporary = temporary_beside(path, overwrite)
    try:
        with open(temporary, "wb") as handle:
            (np.savez_compressed if compress else np.savez)(handle, **arrays)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    publish(temporary, path, overwrite)
    return path
