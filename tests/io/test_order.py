"""Forward order of layers, by the rules of docs/contract.md sections 1 and 2."""

from __future__ import annotations

import json

import h5py
import numpy as np

from actdoc.io import open_dump

Z = np.linspace(-1, 1, 12, dtype=np.float32).reshape(4, 3)


def hdf5_layers(path, names, *, track_order, orders=None):
    with h5py.File(path, "w") as f:
        group = f.create_group("layers", track_order=track_order)
        for i, name in enumerate(names):
            g = group.create_group(name)
            g.create_dataset("preact", data=Z)
            g.attrs["activation"] = "linear"
            if orders is not None and orders[i] is not None:
                g.attrs["order"] = orders[i]


def names_of(path) -> list[str]:
    with open_dump(path) as dump:
        return [layer.name for layer in dump.layers]


def test_order_attribute_wins(tmp_path):
    path = tmp_path / "o.h5"
    hdf5_layers(path, ["fc1", "fc2", "out"], track_order=True, orders=[2, 0, 1])
    assert names_of(path) == ["fc2", "out", "fc1"]


def test_creation_order_when_tracked(tmp_path):
    path = tmp_path / "c.h5"
    hdf5_layers(path, ["zeta", "alpha", "fc10", "fc2"], track_order=True)
    assert names_of(path) == ["zeta", "alpha", "fc10", "fc2"]


def test_natural_sort_without_tracking(tmp_path):
    path = tmp_path / "n.h5"
    hdf5_layers(path, ["fc10", "fc2", "fc1", "Fc3"], track_order=False)
    assert names_of(path) == ["fc1", "fc2", "Fc3", "fc10"]


def test_partial_order_attribute_is_ignored(tmp_path):
    path = tmp_path / "p.h5"
    hdf5_layers(path, ["b", "a"], track_order=True, orders=[5, None])
    assert names_of(path) == ["b", "a"]


def test_npz_meta_order_then_unlisted_layers(tmp_path):
    path = tmp_path / "m.npz"
    meta = {"layers": [{"name": "second"}, {"name": "first", "activation": "relu"}]}
    np.savez(path, **{"first/preact": Z, "second/preact": Z, "extra/preact": Z,
                      "actdoc_meta": np.array(json.dumps(meta))})
    assert names_of(path) == ["second", "first", "extra"]


def test_npz_first_appearance_without_meta(tmp_path):
    path = tmp_path / "a.npz"
    np.savez(path, **{"fc10/preact": Z, "fc2/preact": Z, "fc10/output": Z, "fc1/output": Z})
    assert names_of(path) == ["fc10", "fc2", "fc1"]


def test_npz_order_attribute_in_meta_wins(tmp_path):
    path = tmp_path / "om.npz"
    meta = {"layers": [{"name": "a", "order": 1}, {"name": "b", "order": 0}]}
    np.savez(path, **{"a/preact": Z, "b/preact": Z, "actdoc_meta": np.array(json.dumps(meta))})
    assert names_of(path) == ["b", "a"]


def test_hdf5_state_dict_keeps_tracked_creation_order(tmp_path):
    # docs/contract.md section 3: weight archives are read "in forward order of appearance"; an
    # HDF5 file whose root group tracks creation order keeps it even where names sort otherwise.
    path = tmp_path / "weights.h5"
    with h5py.File(path, "w", track_order=True) as f:
        for name, (units, fan_in) in [("zeta", (4, 3)), ("alpha", (2, 4))]:
            f[f"{name}.weight"] = np.ones((units, fan_in), np.float32)
            f[f"{name}.bias"] = np.zeros(units, np.float32)
    with open_dump(path, activations=["relu"]) as dump:
        assert [layer.name for layer in dump.layers] == ["zeta", "alpha"]
        assert [layer.info.kind.value for layer in dump.layers] == ["relu", "linear"]
