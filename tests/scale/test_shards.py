"""Finding and validating the shards of a sharded dump."""

from __future__ import annotations

import numpy as np
import pytest

from actdoc.errors import InvalidDump, UnreadableDump
from actdoc.io.shards import is_sharded, open_shards, shard_layout
from actdoc.io.writer import write_dump

from tests.support.scale import SHARD_BOUNDS, recording, sliced


def test_folder_gives_shards_in_natural_order(sharded):
    _, shards, _ = sharded
    assert [p.name for p in open_shards(shards)] == ["part2.h5", "part10.h5", "part18.h5"]
    assert is_sharded(shards) and is_sharded(str(shards / "part*.h5"))


def test_glob_and_layout(sharded):
    whole, shards, _ = sharded
    layout = shard_layout(str(shards / "part1*.h5"))
    assert [p.name for p in layout.paths] == ["part10.h5", "part18.h5"]
    sizes = [stop - start for start, stop in SHARD_BOUNDS[1:]]
    assert layout.shard_samples == tuple(sizes) and layout.samples == sum(sizes)
    assert all(info.samples == sum(sizes) for info in layout.layers)
    assert not is_sharded(whole)


def write_shard_pair(folder, change):
    """Two shards of the recording; ``change`` edits the second one's layers mapping."""
    layers = recording()
    write_dump(folder / "a.h5", sliced(layers, 0, 100))
    second = sliced(layers, 100, 200)
    change(second)
    write_dump(folder / "b.h5", second)
    return folder


def test_a_shard_with_other_units_is_named(tmp_path):
    def fewer_units(layers):
        spec = layers["head"]
        for key in ("preact", "output", "weight"):
            spec[key] = spec[key][:, :9] if key != "weight" else spec[key][:9]

    folder = write_shard_pair(tmp_path, fewer_units)
    with pytest.raises(InvalidDump) as caught:
        open_shards(folder)
    assert str(caught.value) == (
        "b.h5, layer 'head': the unit count is 9 where the first shard a.h5 has 10; every "
        "shard must hold the same layers and parameters")


def test_a_shard_from_another_model_is_named(tmp_path):
    def other_weights(layers):
        layers["fc1"]["weight"] = layers["fc1"]["weight"] + np.float32(0.5)

    folder = write_shard_pair(tmp_path, other_weights)
    with pytest.raises(InvalidDump, match=r"^b\.h5, layer 'fc1': its weights or biases differ "
                                          r"from those in the first shard a\.h5"):
        open_shards(folder)


def test_a_shard_with_another_kind_or_missing_layer_is_named(tmp_path):
    folder = write_shard_pair(tmp_path, lambda layers: layers["conv"].update(activation="tanh"))
    with pytest.raises(InvalidDump, match=r"b\.h5, layer 'conv': the activation kind is tanh "
                                          r"where the first shard a\.h5 has relu"):
        open_shards(folder)
    (tmp_path / "b.h5").unlink()
    short = sliced(recording(), 100, 200)
    short.pop("conv")
    write_dump(tmp_path / "b.h5", short)
    with pytest.raises(InvalidDump, match=r"^b\.h5: the layer list is \['fc1', 'head'\]"):
        open_shards(tmp_path)


def test_nothing_to_read(tmp_path):
    with pytest.raises(UnreadableDump, match="the folder holds no dump files"):
        open_shards(tmp_path)
    with pytest.raises(UnreadableDump, match=r"no shard files match the pattern '.*nope\*\.h5'"):
        open_shards(str(tmp_path / "nope*.h5"))


def test_an_explicit_list_keeps_its_order_and_hidden_files_are_skipped(sharded, tmp_path):
    _, shards, _ = sharded
    listed = [shards / "part18.h5", shards / "part2.h5"]
    assert open_shards(listed) == listed
    (tmp_path / "._part1.h5").write_bytes(b"resource fork")  # as some file copiers leave
    with pytest.raises(UnreadableDump, match="the folder holds no dump files"):
        open_shards(tmp_path)
    with pytest.raises(UnreadableDump, match=r"nope\.h5: no such shard file"):
        open_shards([tmp_path / "nope.h5"])
