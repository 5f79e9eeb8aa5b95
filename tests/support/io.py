"""Helpers for the io tests: one small model's recordings, written several ways.

The arrays are synthetic (random pre-activations passed through numpy's own functions); they only
carry data through the readers, which must hand back exactly what was stored.
"""

from __future__ import annotations

import json

import h5py
import numpy as np

from actdoc.io.writer import write_dump, write_npz


def reference_layers(seed: int = 7) -> dict[str, dict]:
    """Three layers in forward order: a dense relu, a spatial tanh conv, a dense linear head."""
    rng = np.random.default_rng(seed)
    z1 = rng.normal(size=(300, 12)).astype(np.float32)
    z2 = rng.normal(size=(300, 4, 3, 5)).astype(np.float32)
    z3 = rng.normal(size=(300, 3)).astype(np.float64)
    return {
        "fc2": {"activation": "relu", "preact": z1, "output": np.maximum(z1, 0),
                "weight": rng.normal(size=(12, 6)).astype(np.float32),
                "bias": rng.normal(size=12).astype(np.float32)},
        "conv": {"activation": "tanh", "preact": z2, "output": np.tanh(z2),
                 "weight": rng.normal(size=(4, 12, 3, 3)).astype(np.float32)},
        "fc10": {"activation": "linear", "preact": z3, "output": z3.copy(),
                 "weight": rng.normal(size=(3, 60)), "bias": np.zeros(3)},
    }


def write_plain_hdf5(path, layers, probe=None, *, track_order=True, order=True) -> None:
    """Section 1 of docs/contract.md written with h5py alone (no actdoc code)."""
    with h5py.File(path, "w") as f:
        group = f.create_group("layers", track_order=track_order)
        for position, (name, spec) in enumerate(layers.items()):
            g = group.create_group(name)
            if order:
                g.attrs["order"] = position
            for key, value in spec.items():
                if isinstance(value, np.ndarray):
                    g.create_dataset(key, data=value)
                else:
                    g.attrs[key] = value
        if probe is not None:
            f.create_dataset("probe/input", data=probe)


def write_plain_npz(path, layers, probe=None, *, meta=True, compress=False) -> None:
    """Section 2 of docs/contract.md written with numpy alone (no actdoc code)."""
    arrays = {}
    entries = []
    for name, spec in layers.items():
        entries.append({"name": name, **{k: v for k, v in spec.items()
                                         if not isinstance(v, np.ndarray)}})
        arrays.update({f"{name}/{k}": v for k, v in spec.items() if isinstance(v, np.ndarray)})
    if meta:
        arrays["actdoc_meta"] = np.array(json.dumps({"layers": entries}))
    if probe is not None:
        arrays["probe/input"] = probe
    (np.savez_compressed if compress else np.savez)(path, **arrays)


#: How each reader-contract case produces its file: (name, function(path, layers, probe)).
WRITERS = {
    "writer-hdf5": lambda p, lay, probe: write_dump(p, lay, probe),
    "writer-npz-stored": lambda p, lay, probe: write_npz(p, lay, probe),
    "writer-npz-deflated": lambda p, lay, probe: write_npz(p, lay, probe, compress=True),
    "plain-hdf5": write_plain_hdf5,
    "plain-npz-stored": write_plain_npz,
    "plain-npz-deflated": lambda p, lay, probe: write_plain_npz(p, lay, probe, compress=True),
}
