"""Writing a repaired network (``actdoc.repair``) in the form its input had.

- A safetensors state dict becomes a safetensors state dict: every tensor of the input is
  copied, the repaired layers' ``.weight`` and ``.bias`` replaced (same names, shapes and float
  types; BF16 tensors are written as F32, numpy having no bfloat16), the metadata kept.
- A state-dict archive (docs/contract.md section 3) becomes the same: NPZ members or HDF5 root
  datasets copied in their order, the repaired parameters replaced.
- A dump in the layout of sections 1-2 becomes an HDF5 dump (``DumpWriter``): each layer's kind,
  repaired weights and bias, the activations of the repaired network over the probe (streamed
  block by block), and the probe as ``/probe/input``.

Every output goes to a temporary file beside the target and is moved into place when complete
(``actdoc.io.writer``): the input is never touched, an existing output only with ``overwrite``.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import h5py
import numpy as np

from actdoc.forward import ForwardPass
from actdoc.io.writer import DumpWriter, publish, temporary_beside
from actdoc.model import Dump


def replaced(dump: Dump, weights, biases) -> dict[str, np.ndarray]:
    """``{"<layer>.weight": array, "<layer>.bias": array}`` in each layer's stored shape and type."""
    out = {}
    for layer, w, b in zip(dump.layers, weights, biases):
        stored = layer.info.arrays["weight"]
        out[f"{layer.name}.weight"] = np.asarray(w).reshape(stored.shape).astype(stored.dtype)
        if b is not None and "bias" in layer.info.arrays:
            out[f"{layer.name}.bias"] = np.asarray(b).astype(layer.info.arrays["bias"].dtype)
    return out


def is_state_dict(dump: Dump) -> bool:
    """Whether the dump's file stores parameters under dotted state-dict names."""
    if dump.format == "safetensors":
        return True
    key = f"{dump.layers[0].name}.weight"
    path = Path(dump.path)
    if dump.format == "npz":
        with zipfile.ZipFile(path) as archive:
            return f"{key}.npy" in archive.namelist()
    with h5py.File(path, "r") as handle:
        return "layers" not in handle and key in handle


def _safetensors(dump: Dump, arrays: dict[str, np.ndarray], temporary: Path) -> None:
    from safetensors import safe_open
    from safetensors.numpy import save_file

    from actdoc.io.safetensors_file import TensorSource, read_header

    header, data_start = read_header(Path(dump.path))
    with safe_open(str(dump.path), framework="np") as handle:
        metadata = handle.metadata()
    tensors = {key: arrays.get(key, None) for key in header}
    for key, value in tensors.items():
        if value is None:
            tensors[key] = TensorSource(Path(dump.path), key, header[key], data_start).read_all()
    save_file(tensors, str(temporary), metadata=metadata)


def _npz(dump: Dump, arrays: dict[str, np.ndarray], temporary: Path) -> None:
    with zipfile.ZipFile(dump.path) as archive:
        compressed = any(i.compress_type != zipfile.ZIP_STORED for i in archive.infolist())
    with np.load(dump.path, allow_pickle=False) as archive:
        members = {key: arrays[key] if key in arrays else archive[key] for key in archive.files}
    with open(temporary, "wb") as handle:
        (np.savez_compressed if compressed else np.savez)(handle, **members)


def _hdf5(dump: Dump, arrays: dict[str, np.ndarray], temporary: Path) -> None:
    with h5py.File(dump.path, "r") as source, \
            h5py.File(temporary, "w", track_order=True) as target:
        for key in source:
            item = source.get(key)
            if isinstance(item, h5py.Dataset):
                target.create_dataset(key, data=arrays[key] if key in arrays else item[()])


def write_state_dict(dump: Dump, weights, biases, output: Path, overwrite: bool) -> None:
    """The input's state dict with the repaired parameters, in the input's format."""
    arrays = replaced(dump, weights, biases)
    temporary = temporary_beside(output, overwrite)
    try:
        {"safetensors": _safetensors, "npz": _npz, "hdf5": _hdf5}[dump.format](
            dump, arrays, temporary)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    publish(temporary, output, overwrite)


def write_dump(dump: Dump, forward: ForwardPass, output: Path, overwrite: bool) -> None:
    """An HDF5 dump of the repaired network: kinds, parameters, activations, probe."""
    with DumpWriter(output, overwrite=overwrite) as out:
        for index, layer in enumerate(dump.layers):
            info = layer.info
            extra = {"negative_slope": info.negative_slope} if info.kind.value == "leaky_relu" \
                else {"threshold": info.threshold} if info.kind.value == "threshold" else {}
            out.add_layer(info.name, info.kind, units=info.units,
                          weight=forward.weights[index], bias=forward.biases[index],
                          dtype=forward.dtype, **extra)
        for start in range(0, forward.samples, 4096):
            stop = min(forward.samples, start + 4096)
            blocks = forward.block(start, stop, len(dump.layers) - 1)
            for layer, (z, y) in zip(dump.layers, blocks):
                out.append(layer.name, preact=z, output=y)
            out.append_probe_input(np.asarray(forward.probe.read_samples(start, stop)))


def write_repaired(dump: Dump, forward: ForwardPass, output: Path, overwrite: bool) -> str:
    """Write the repaired network to ``output``; returns what was written, in words."""
    if is_state_dict(dump):
        write_state_dict(dump, forward.weights, forward.biases, output, overwrite)
        return f"a {dump.format} state dict"
    write_dump(dump, forward, output, overwrite)
    return "an HDF5 dump with the probe's activations"
