"""The sharded path: statistics merged over shards and a dask cluster equal the one-file pass."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from actdoc.analysis import Settings, accumulate_layer, analyze
from actdoc.io import open_dump
from actdoc.model import to_observations

from tests.support.scale import DEAD_UNITS, SATURATED_UNITS, SHARD_BOUNDS

distributed = pytest.importorskip("distributed")
from actdoc.cluster import analyze_shards  # noqa: E402


@pytest.fixture(scope="module")
def cluster():
    """Two in-process workers over TCP, so the address path is exercised as on a real cluster."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp", dashboard_address=None) as local:
        yield local


@pytest.fixture(scope="module")
def both(sharded, cluster):
    """Findings of the local engine on the whole file and of the cluster on the shards."""
    whole, shards, _ = sharded
    with open_dump(whole) as dump:
        local = analyze(dump)
    seen = []
    remote = analyze_shards(shards, scheduler=cluster.scheduler_address, progress=seen.append)
    return local, remote, seen


def test_findings_equal_the_one_file_engine(both):
    local, remote, _ = both
    assert remote.findings == local.findings
    # The planted pathologies are found (known by construction of the data).
    by_check = {(f.check, f.layer): f.units for f in remote.findings}
    assert by_check[("dead", "fc1")] == DEAD_UNITS
    assert by_check[("saturated", "head")] == SATURATED_UNITS


def test_layer_reports_equal_the_one_file_engine(both):
    local, remote, _ = both
    for mine, theirs in zip(remote.layers, local.layers):
        assert mine.info == theirs.info
        assert mine.fractions == theirs.fractions and mine.status == theirs.status
        assert mine.output_scale == pytest.approx(theirs.output_scale, rel=1e-12)
        for name, hist in theirs.histograms.items():  # every-k-th-row sampling kept global
            np.testing.assert_array_equal(mine.histograms[name].counts, hist.counts)
        for column, values in theirs.unit_table.items():
            if values.dtype.kind == "f":
                np.testing.assert_allclose(mine.unit_table[column], values, rtol=1e-9,
                                           atol=1e-12, equal_nan=True)
            else:
                np.testing.assert_array_equal(mine.unit_table[column], values)


def test_source_and_progress(both, sharded):
    _, remote, seen = both
    assert remote.source.samples == SHARD_BOUNDS[-1][1]
    assert remote.source.file == "part2.h5 .. part18.h5 (3 shards)"
    assert seen[0] == 0.0 and seen[-1] == 1.0 and seen == sorted(seen)


def test_digest_matches_sha256sum_manifest(both, sharded):
    import hashlib

    _, shards, _ = sharded
    # What `sha256sum part2.h5 part10.h5 part18.h5 | sha256sum` prints (coreutils format:
    # "<hex>  <name>\n" per file), computed here with hashlib alone.
    lines = "".join(f"{hashlib.sha256((shards / n).read_bytes()).hexdigest()}  {n}\n"
                    for n in ("part2.h5", "part10.h5", "part18.h5"))
    assert both[1].source.sha256 == hashlib.sha256(lines.encode()).hexdigest()


def test_merged_shard_statistics_equal_the_one_shot_pass(sharded):
    """accumulate_layer over sample ranges, merged, against one pass and against numpy/scipy."""
    whole, _, layers = sharded
    settings = Settings()
    with open_dump(whole) as dump:
        for layer in dump.layers:
            one_shot = accumulate_layer(layer, settings)
            parts = [accumulate_layer(layer, settings, start, stop) for start, stop in SHARD_BOUNDS]
            merged = parts[0].merge(parts[1]).merge(parts[2])
            np.testing.assert_array_equal(merged.count, one_shot.count)
            np.testing.assert_array_equal(merged.minimum, one_shot.minimum)
            np.testing.assert_array_equal(merged.maximum, one_shot.maximum)
            if layer.info.kind.value == "relu":
                np.testing.assert_array_equal(merged.active, one_shot.active)
            np.testing.assert_allclose(merged.moments.mean, one_shot.moments.mean, rtol=1e-12)
            np.testing.assert_allclose(merged.moments.m2, one_shot.moments.m2, rtol=1e-10, atol=1e-20)

            # Outside references: numpy for mean, variance and the active count; scipy.stats
            # for the bias-corrected skewness (scipy.stats.skew with bias=False).
            y = to_observations(layers[layer.name]["output"]).astype(np.float64)
            np.testing.assert_allclose(merged.moments.mean, y.mean(axis=0), rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(merged.moments.std(), y.std(axis=0), rtol=1e-9, atol=1e-12)
            if layer.info.kind.value == "relu":
                np.testing.assert_array_equal(merged.active, (y > 0).sum(axis=0))
            n = merged.moments.count
            from actdoc.analysis.moments import sample_skewness

            mine = sample_skewness(n, merged.moments.m2, merged.moments.m3)
            varying = y.std(axis=0) > 0
            reference = scipy.stats.skew(y[:, varying], axis=0, bias=False)
            np.testing.assert_allclose(mine[varying], reference, rtol=1e-7)


def test_an_unreachable_scheduler_is_one_sentence(sharded, monkeypatch):
    from actdoc import cluster as module
    from actdoc.errors import ActdocError

    _, shards, _ = sharded
    monkeypatch.setattr(module, "CONNECT_TIMEOUT", "1s")
    with pytest.raises(ActdocError, match=r"^cannot reach the dask scheduler at "
                                          r"tcp://127\.0\.0\.1:9 \("):
        analyze_shards(shards, scheduler="tcp://127.0.0.1:9")


def test_the_command_line_entry_picks_the_local_engine_or_the_cluster(sharded, cluster, both):
    from actdoc.cluster import analyze_target

    whole, shards, _ = sharded
    local, remote, _ = both
    assert analyze_target(whole).findings == local.findings
    on_cluster = analyze_target(str(shards / "part*.h5"), scheduler=cluster.scheduler_address)
    assert on_cluster.findings == remote.findings and on_cluster.source == remote.source
