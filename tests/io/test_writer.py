"""The writer produces the layout of docs/contract.md sections 1 and 2, checked with plain h5py
and numpy (the outside readers), and never clobbers an existing file."""

from __future__ import annotations

import json
import zipfile

import h5py
import numpy as np
import pytest

from actdoc.io import open_dump
from actdoc.io.writer import DumpWriter, write_dump, write_npz

RNG = np.random.default_rng(21)


def test_streamed_appends_round_trip(tmp_path):
    path = tmp_path / "stream.h5"
    blocks = [RNG.normal(size=(n, 300)).astype(np.float32) for n in (100, 1, 700)]
    with DumpWriter(path) as out:
        out.add_layer("hidden", "sigmoid", units=300, weight=RNG.normal(size=(300, 8)))
        out.add_layer("maps", "leaky_relu", units=6, spatial=(5, 7), negative_slope=0.1)
        for block in blocks:
            out.append("hidden", preact=block, output=1 / (1 + np.exp(-block)))
            maps = RNG.normal(size=(len(block), 6, 5, 7))
            out.append("maps", preact=maps, output=np.where(maps > 0, maps, 0.1 * maps))
        out.set_probe_input(np.arange(801 * 2).reshape(801, 2))
    with h5py.File(path, "r") as f:
        assert f.attrs["actdoc_layout"] == 1
        assert list(f["layers"]) == ["hidden", "maps"]
        hidden = f["layers/hidden"]
        assert hidden.attrs["activation"] == "logistic" and hidden.attrs["order"] == 0
        assert hidden["preact"].chunks == (1024, 256)
        assert hidden["preact"].maxshape == (None, 300)
        assert hidden["preact"].compression is None
        assert f["layers/maps"]["preact"].chunks[1:] == (6, 5, 7)
        assert f["layers/maps"].attrs["negative_slope"] == 0.1
        np.testing.assert_array_equal(hidden["preact"][()], np.concatenate(blocks))
        assert f["probe/input"].shape == (801, 2)
    with open_dump(path) as dump:
        assert dump.layer("maps").info.negative_slope == 0.1
        assert dump.layer("maps").info.observations == 801 * 35


def test_whole_arrays_get_clipped_chunks(tmp_path):
    path = write_dump(tmp_path / "small.h5", {"a": {"preact": np.ones((10, 3), np.float64)}})
    with h5py.File(path, "r") as f:
        assert f["layers/a/preact"].chunks == (10, 3)
        assert f["layers/a/preact"].dtype == np.float64  # write_dump keeps float dtypes


def test_existing_file_is_never_clobbered(tmp_path):
    path = tmp_path / "keep.h5"
    path.write_bytes(b"precious")
    layers = {"a": {"preact": np.ones((2, 2))}}
    with pytest.raises(FileExistsError):
        write_dump(path, layers)
    with pytest.raises(FileExistsError):
        write_npz(path, layers)
    assert path.read_bytes() == b"precious"
    write_dump(path, layers, overwrite=True)
    assert h5py.is_hdf5(path)
    assert [p.name for p in tmp_path.iterdir()] == ["keep.h5"]  # no temporary left behind


def test_failure_inside_the_block_leaves_nothing(tmp_path):
    path = tmp_path / "never.h5"
    with pytest.raises(RuntimeError):
        with DumpWriter(path) as out:
            out.add_layer("a", "relu", units=2)
            out.append("a", preact=np.ones((3, 2)))
            raise RuntimeError("model crashed")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("action, message", [
    (lambda w: w.add_layer("empty", "relu", units=4), "holds no arrays"),
    (lambda w: (w.add_layer("a", units=2), w.append("a", preact=np.ones((3, 2)),
                                                   output=np.ones((2, 2)))), "3 samples"),
    (lambda w: (w.add_layer("a", units=2), w.append("a", preact=np.ones((3, 5)))), "continue"),
    (lambda w: w.add_layer("x/y", units=2), "without '/'"),
])
def test_writer_refuses_broken_layers(tmp_path, action, message):
    path = tmp_path / "broken.h5"
    with pytest.raises(ValueError, match=message):
        with DumpWriter(path) as out:
            action(out)
    assert not path.exists()


@pytest.mark.parametrize("compress, method", [(False, zipfile.ZIP_STORED),
                                              (True, zipfile.ZIP_DEFLATED)])
def test_npz_layout_with_meta(tmp_path, compress, method):
    z = RNG.normal(size=(5, 3))
    path = write_npz(tmp_path / "d.npz", {"b": {"activation": "step", "threshold": 0.5,
                                                "preact": z, "output": z > 0.5},
                                          "a": {"weight": np.ones((3, 3))}}, compress=compress)
    with zipfile.ZipFile(path) as zf:
        assert {i.compress_type for i in zf.infolist()} == {method}
    with np.load(path, allow_pickle=False) as archive:  # numpy as the outside reader
        meta = json.loads(str(archive["actdoc_meta"]))
        assert meta == {"layers": [{"name": "b", "activation": "threshold", "threshold": 0.5},
                                   {"name": "a"}]}
        np.testing.assert_array_equal(archive["b/preact"], z)
    with open_dump(path) as dump:
        assert [layer.name for layer in dump.layers] == ["b", "a"]
        assert dump.layer("b").info.threshold == 0.5
