"""Shards measured in this process, without a scheduler and without dask: the same findings as
the one-file engine, and the command line accepts the shard folder or a glob as its DUMP."""

from __future__ import annotations

import json

from actdoc.analysis import analyze
from actdoc.cli import main
from actdoc.cluster import analyze_shards
from actdoc.io import open_dump


def test_shards_here_equal_the_one_file_engine(sharded):
    whole, shards, _ = sharded
    with open_dump(whole) as dump:
        local = analyze(dump)
    here = analyze_shards(shards)
    assert here.findings == local.findings
    assert [r.fractions for r in here.layers] == [r.fractions for r in local.layers]


def test_the_command_line_takes_a_folder_or_a_glob(sharded, capsys):
    whole, shards, _ = sharded
    assert main(["analyze", str(whole), "--format", "json"]) == 0
    one_file = json.loads(capsys.readouterr().out)
    for target in (str(shards), str(shards / "part*.h5")):
        assert main(["analyze", target, "--format", "json"]) == 0
        doc = json.loads(capsys.readouterr().out)
        assert doc["findings"] == one_file["findings"]
        assert doc["source"]["samples"] == one_file["source"]["samples"]
