"""Fixtures for the scale tests; the recording and its slices live in tests/support/scale.py."""

from __future__ import annotations

import pytest

from actdoc.io.writer import write_dump
from tests.support.scale import SHARD_BOUNDS, recording, sliced


@pytest.fixture(scope="module")
def sharded(tmp_path_factory):
    """(whole dump path, shard folder, layers): the same recording in one file and in shards."""
    folder = tmp_path_factory.mktemp("sharded")
    layers = recording()
    whole = write_dump(folder / "whole.h5", layers)
    shards = folder / "shards"
    shards.mkdir()
    for index, (start, stop) in enumerate(SHARD_BOUNDS):
        # Names sort differently as text ("part10" < "part2") and naturally; shard order is natural.
        write_dump(shards / f"part{index * 8 + 2}.h5", sliced(layers, start, stop))
    return whole, shards, layers
