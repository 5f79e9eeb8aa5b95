"""A slow analysis does not hold back the uploads behind it.

The slow dump is a weights-only chain 32 -> 2048 -> 2048 (ReLU) with a ``/probe/input`` of
500,000 zero rows (deflated: the file is about 17 MB, mostly the second weight). It checks in a
moment, while the forward pass it asks for (about 2.1 * 10^12 multiply-adds, then 2 * 10^9
values to measure) keeps an analysis busy far longer than these tests wait. Each test removes
it at the end, which stops its child.
"""

from __future__ import annotations

import time

import h5py
import numpy as np

from actdoc.io.writer import write_dump
from actdoc.workspace import Workspace
from tests.support.web import SAMPLES, planted_layers

SLOW_SAMPLES = 500_000
WIDTH = 2048
#: Generous for a loaded machine: a check of a small file takes well under a second alone.
WAIT_SECONDS = 60.0


def slow_dump(folder) -> str:
    rng = np.random.default_rng(5)
    layers = {"wide1": {"activation": "relu",
                        "weight": rng.normal(0, 0.25, (WIDTH, 32)).astype(np.float32)},
              "wide2": {"activation": "relu",
                        "weight": rng.normal(0, 0.03, (WIDTH, WIDTH)).astype(np.float32)}}
    path = write_dump(folder / "slow.h5", layers)
    with h5py.File(path, "a") as f:
        probe = f.create_dataset("probe/input", shape=(SLOW_SAMPLES, 32), dtype=np.float32,
                                 chunks=(4096, 32), compression="gzip")
        zeros = np.zeros((50_000, 32), np.float32)
        for start in range(0, SLOW_SAMPLES, len(zeros)):
            probe[start:start + len(zeros)] = zeros
    return path


def wait(condition, what: str, timeout: float = WAIT_SECONDS):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"{what} did not happen within {timeout} s")


def analysing(store: Workspace, dump_id: str) -> bool:
    record = store.get(dump_id)
    return record.stage == "analysing" and store.runner.running.get(dump_id) is not None


def test_uploads_are_checked_while_a_slow_dump_is_analysed(tmp_path, planted_dump, broken_dump):
    store = Workspace(tmp_path / "ws")
    store.start()
    slow, _ = store.ingest_path(slow_dump(tmp_path))
    store.submit(slow.id)
    wait(lambda: analysing(store, slow.id), "the slow analysis starting")
    assert store.get(slow.id).layers == 2 and store.get(slow.id).samples == SLOW_SAMPLES

    good, _ = store.ingest_path(planted_dump)
    bad, _ = store.ingest_path(broken_dump)
    for record in (good, bad):
        assert record.to_dict()["stage"] == "waiting to be checked"
        store.submit(record.id)
    failed = wait(lambda: (r := store.get(bad.id)).status == "failed" and r, "the refusal")
    assert failed.error.startswith("broken.h5") and failed.to_dict()["layers"] is None
    checked = wait(lambda: (r := store.get(good.id)).checked and r, "the check")
    assert checked.to_dict()["layers"] == 3 and checked.to_dict()["samples"] == SAMPLES
    # Both answered while the slow one still analyses; the checked one waits for its turn,
    # and its check, which ended with an answer, is no attempt left unfinished.
    assert analysing(store, slow.id)
    assert checked.status == "queued" and checked.stage == "waiting for analysis"
    assert checked.attempts == 0

    store.delete(slow.id)  # stops the slow child; the analysis slot takes the next dump
    done = wait(lambda: (r := store.get(good.id)).status == "ready" and r, "the analysis",
                timeout=120)
    assert done.attempts == 1 and done.layers == 3


def test_a_second_analysis_slot_finishes_a_small_dump_meanwhile(tmp_path, planted_dump):
    store = Workspace(tmp_path / "ws", analysis_slots=2)
    store.start()
    slow, _ = store.ingest_path(slow_dump(tmp_path))
    store.submit(slow.id)
    wait(lambda: analysing(store, slow.id), "the slow analysis starting")
    good, _ = store.ingest_path(planted_dump)
    store.submit(good.id)
    done = wait(lambda: (r := store.get(good.id)).status == "ready" and r, "the analysis",
                timeout=120)
    assert done.layers == 3 and analysing(store, slow.id)
    store.delete(slow.id)


def test_without_a_check_slot_one_child_checks_and_analyses(tmp_path, planted_dump):
    """``check_slot=False``: the analysis slot opens the file itself; the stages still say
    where the dump is, and the layers appear once the child has read them."""
    store = Workspace(tmp_path / "ws", check_slot=False)
    record, _ = store.ingest_path(planted_dump)
    assert record.stage == "waiting to be checked"
    store.start()
    store.submit(record.id)
    done = wait(lambda: (r := store.get(record.id)).status == "ready" and r, "the analysis",
                timeout=120)
    assert done.checked and done.layers == 3 and done.samples == SAMPLES
    assert done.attempts == 1
