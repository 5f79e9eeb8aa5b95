"""Every reader keeps the same contract: what was stored comes back, in forward order.

Files come from actdoc's own writer and from plain h5py / numpy code that follows docs/contract.md
sections 1 and 2 directly; both must read identically. Expected values are numpy's own
reshapes and slices of the stored arrays (numpy as the outside reference).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from actdoc.io import file_sha256, open_dump
from actdoc.model import ActivationKind, ActivationSource


def observations(array: np.ndarray) -> np.ndarray:
    """Reference [observations, channels] for channels-first data: numpy transpose + reshape."""
    if array.ndim == 2:
        return array
    axes = (0,) + tuple(range(2, array.ndim)) + (1,)
    return np.transpose(array, axes).reshape(-1, array.shape[1])


def test_layers_order_kinds_and_shapes(written):
    path, layers, probe = written
    with open_dump(path) as dump:
        assert [layer.name for layer in dump.layers] == list(layers)
        assert dump.samples == 300
        assert dump.format == ("hdf5" if path.suffix == ".h5" else "npz")
        for layer, (name, spec) in zip(dump.layers, layers.items()):
            assert layer.info.kind is ActivationKind.parse(spec["activation"])
            assert layer.info.kind_source is ActivationSource.DECLARED
            assert layer.info.units == spec["preact"].shape[1]
            assert layer.info.spatial_shape == spec["preact"].shape[2:]
            assert layer.info.observations == observations(spec["preact"]).shape[0]
        np.testing.assert_array_equal(dump.probe_input.read_all(), probe)


@pytest.mark.parametrize("block", [7, 64, 4096])
def test_blocks_match_numpy_reshape(written, block):
    path, layers, _ = written
    with open_dump(path) as dump:
        for layer in dump.layers:
            spec = layers[layer.name]
            pre = np.concatenate([b[0].copy() for b in layer.paired_blocks(block)])
            out = np.concatenate([b[1].copy() for b in layer.paired_blocks(block)])
            np.testing.assert_array_equal(pre, observations(spec["preact"]))
            np.testing.assert_array_equal(out, observations(spec["output"]))


def test_unit_columns_weights_and_bias(written):
    path, layers, _ = written
    with open_dump(path) as dump:
        for layer in dump.layers:
            spec = layers[layer.name]
            for unit in (0, spec["preact"].shape[1] - 1):
                np.testing.assert_array_equal(layer.unit_values("output", unit),
                                              spec["output"][:, unit].reshape(-1))
            np.testing.assert_array_equal(
                layer.weight(), spec["weight"].reshape(spec["weight"].shape[0], -1))
            if "bias" in spec:
                np.testing.assert_array_equal(layer.bias(), spec["bias"])


def test_middle_block_after_earlier_reads(written):
    """Reading out of order (a later block, then an earlier one) still gives the right rows."""
    path, layers, _ = written
    with open_dump(path) as dump:
        source = dump.layer("fc2").sources["preact"]
        np.testing.assert_array_equal(source.read_samples(200, 250), layers["fc2"]["preact"][200:250])
        np.testing.assert_array_equal(source.read_samples(10, 20), layers["fc2"]["preact"][10:20])
        buffer = np.empty((20, 12), np.float32)
        assert source.read_samples(30, 50, out=buffer) is buffer
        np.testing.assert_array_equal(buffer, layers["fc2"]["preact"][30:50])


def test_sha256_matches_hashlib_of_whole_file(written):
    import hashlib  # the standard library as the reference

    path, _, _ = written
    assert file_sha256(path) == hashlib.sha256(path.read_bytes()).hexdigest()


def test_hdf5_after_userblock(tmp_path, layers):
    """A file with a 512-byte user block is still recognised as HDF5."""
    path = tmp_path / "block.h5"
    with h5py.File(path, "w", userblock_size=512) as f:
        g = f.create_group("layers/only")
        g.attrs["activation"] = "relu"
        g.create_dataset("preact", data=layers["fc2"]["preact"])
    with open(path, "r+b") as handle:
        handle.write(b"user notes, not HDF5")
    with open_dump(path) as dump:
        assert [layer.name for layer in dump.layers] == ["only"]


def test_extension_does_not_decide_format(tmp_path, layers):
    from tests.support.io import write_plain_npz

    path = tmp_path / "looks_like.h5"
    with open(path, "wb") as handle:
        write_plain_npz(handle, layers)
    with open_dump(path) as dump:
        assert dump.format == "npz"


@pytest.mark.parametrize("container", ["npz", "hdf5"])
def test_state_dict_archive(tmp_path, container):
    """Section 3: dotted names, order of appearance, --activation KIND and LAYER=KIND."""
    rng = np.random.default_rng(3)
    params = {"encoder.0.weight": rng.normal(size=(5, 4)), "encoder.0.bias": rng.normal(size=5),
              "norm.weight": np.ones(5), "norm.bias": np.zeros(5),
              "encoder.2.weight": rng.normal(size=(6, 5, 3)), "head.weight": rng.normal(size=(2, 6))}
    path = tmp_path / ("sd.npz" if container == "npz" else "sd.h5")
    if container == "npz":
        np.savez(path, **params)
    else:
        with h5py.File(path, "w", track_order=True) as f:
            for key, value in params.items():
                f.create_dataset(key, data=value)
    with open_dump(path, activations=["tanh"]) as dump:
        assert [layer.name for layer in dump.layers] == ["encoder.0", "encoder.2", "head"]
        assert [layer.info.kind.value for layer in dump.layers] == ["tanh", "tanh", "linear"]
        assert dump.samples == 0
        np.testing.assert_array_equal(dump.layers[1].weight(),
                                      params["encoder.2.weight"].reshape(6, 15))
        np.testing.assert_array_equal(dump.layers[0].bias(), params["encoder.0.bias"])
    with open_dump(path, activations=["relu", "head=logistic", "encoder.2=gelu"]) as dump:
        assert [layer.info.kind.value for layer in dump.layers] == ["relu", "gelu", "logistic"]
    with open_dump(path) as dump:
        assert all(layer.info.kind is ActivationKind.LINEAR for layer in dump.layers)
        assert "weights only" in dump.layers[0].info.kind_note


def test_activation_override_on_a_layer_dump(written):
    path, _, _ = written
    with open_dump(path, activations=["conv=logistic"]) as dump:
        assert dump.layer("conv").info.kind is ActivationKind.LOGISTIC
        assert dump.layer("fc2").info.kind is ActivationKind.RELU


def test_fortran_ordered_stored_member(tmp_path, layers):
    """A Fortran-ordered stored member reads the same rows as its C-ordered original."""
    z = layers["fc2"]["preact"]
    path = tmp_path / "fortran.npz"
    np.savez(path, **{"a/preact": np.asfortranarray(z), "a/output": np.maximum(z, 0)})
    with open_dump(path) as dump:
        np.testing.assert_array_equal(np.concatenate([b.copy() for b in dump.layers[0].blocks("preact", 50)]), z)
