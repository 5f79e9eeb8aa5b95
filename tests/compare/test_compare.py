"""actdoc.compare against references computed straight from the planted arrays with numpy.

Each dump of the series plants its own set of dead rectified units and saturated logistic
units. The references use the definitions, not actdoc: a ReLU unit whose total input is never
positive on any sample never fires (dead; common practice), and a logistic unit whose total
input stays above ln 99 = scipy.special.logit(0.99) has every output above 0.99, saturated at
the high asymptote (docs/contract.md section 4's zone). Unit state changes between two dumps are
then plain set differences, and each share is a count over the layer's units.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.special import expit, logit

from actdoc.analysis import analyze
from actdoc.compare import (
    IncomparableDumps,
    StateChange,
    compare_pair,
    compare_series,
    comparison_document,
)
from actdoc.io.memory import dump_from_arrays

SAMPLES = 400
RELU_UNITS = 32
LOGISTIC_UNITS = 12
#: Dead rectified units and saturated logistic units planted in each checkpoint.
PLANTED = (
    {"dead": (3,), "saturated": ()},
    {"dead": (3, 7, 9, 20), "saturated": (0, 5)},
    {"dead": (7, 9, 20, 21, 30), "saturated": (0, 5, 11)},  # unit 3 recovers
)


def planted_arrays(dead, saturated, seed, relu_units=RELU_UNITS, second_kind="logistic"):
    """Two hidden layers and a read-out with the given units planted."""
    rng = np.random.default_rng(seed)
    z1 = rng.normal(0.5, 1.0, (SAMPLES, relu_units)).astype(np.float32)
    z1[:, list(dead)] -= 14.0  # N(0.5, 1) - 14 stays below 0 on every one of 400 samples
    z2 = rng.normal(0.0, 1.0, (SAMPLES, LOGISTIC_UNITS)).astype(np.float32)
    z2[:, list(saturated)] += 14.0  # stays above ln 99 ~ 4.6 on every sample
    z3 = rng.normal(0.0, 1.0, (SAMPLES, 2)).astype(np.float32)
    return {
        "hidden1": {"activation": "relu", "preact": z1, "output": np.maximum(z1, 0)},
        "hidden2": {"activation": second_kind, "preact": z2,
                   "output": (expit(z2) if second_kind == "logistic" else np.tanh(z2))
                   .astype(np.float32)},
        "readout": {"activation": "linear", "preact": z3, "output": z3},
    }


def findings_of(arrays, file_name):
    return analyze(dump_from_arrays(arrays, name=file_name))


@pytest.fixture(scope="module")
def checkpoints():
    """The planted series: (arrays, Findings) per checkpoint."""
    series = []
    for step, plant in enumerate(PLANTED, start=1):
        arrays = planted_arrays(plant["dead"], plant["saturated"], seed=step)
        series.append((arrays, findings_of(arrays, f"run_step{step}.h5")))
    return series


def reference_dead(arrays) -> set[int]:
    """Units whose total input is never positive (common practice: a dead ReLU unit)."""
    z = arrays["hidden1"]["preact"]
    return set(np.flatnonzero(~(z > 0).any(axis=0)).tolist())


def reference_saturated(arrays) -> set[int]:
    """Units whose total input exceeds logit(0.99) = ln 99 on every sample (scipy)."""
    z = arrays["hidden2"]["preact"]
    return set(np.flatnonzero((z > logit(0.99)).all(axis=0)).tolist())


def units_moved(changes, layer, before, after) -> set[int]:
    return {u for c in changes if (c.layer, c.before, c.after) == (layer, before, after)
            for u in c.units}


def test_changes_between_two_dumps_are_the_set_differences(checkpoints):
    for (old_arrays, old), (new_arrays, new) in zip(checkpoints, checkpoints[1:]):
        changes = compare_pair(old, new)
        dead_before, dead_after = reference_dead(old_arrays), reference_dead(new_arrays)
        assert units_moved(changes, "hidden1", "", "dead") == dead_after - dead_before
        assert units_moved(changes, "hidden1", "dead", "") == dead_before - dead_after
        sat_before, sat_after = reference_saturated(old_arrays), reference_saturated(new_arrays)
        assert units_moved(changes, "hidden2", "", "saturated") == sat_after - sat_before
        # Nothing else moved: every listed unit is in one of those differences.
        listed = sum(len(c.units) for c in changes)
        assert listed == (len(dead_after ^ dead_before) + len(sat_after ^ sat_before))
        for change in changes:
            assert list(change.units) == sorted(change.units)


def test_the_planted_series_reads_as_planted(checkpoints):
    # The references agree with what was planted (a check on the test itself).
    for (arrays, _findings), plant in zip(checkpoints, PLANTED):
        assert reference_dead(arrays) == set(plant["dead"])
        assert reference_saturated(arrays) == set(plant["saturated"])
    last_step = compare_pair(checkpoints[1][1], checkpoints[2][1])
    sentences = [change.sentence() for change in last_step]
    assert "hidden1: 2 units became dead: 21, 30" in sentences
    assert "hidden1: 1 unit no longer dead: 3" in sentences
    assert "hidden2: 1 unit became saturated: 11" in sentences


def test_shares_and_counts_across_the_series(checkpoints):
    comparison = compare_series([findings for _arrays, findings in checkpoints])
    assert comparison.files == ("run_step1.h5", "run_step2.h5", "run_step3.h5")
    assert [track.name for track in comparison.layers] == ["hidden1", "hidden2", "readout"]
    relu, logistic, readout = comparison.layers
    expected_dead = [len(reference_dead(arrays)) for arrays, _ in checkpoints]
    assert list(relu.counts["dead"]) == expected_dead
    for share, count in zip(relu.shares["dead"], expected_dead):
        assert math.isclose(share, count / RELU_UNITS)
    expected_saturated = [len(reference_saturated(arrays)) for arrays, _ in checkpoints]
    assert list(logistic.counts["saturated"]) == expected_saturated
    assert relu.ever_flagged == ("dead",)
    assert logistic.ever_flagged == ("saturated",)
    assert readout.ever_flagged == ()
    assert [len(step.changes) > 0 for step in comparison.steps] == [True, True]
    assert [(step.before, step.after) for step in comparison.steps] == [(0, 1), (1, 2)]


def test_the_document_is_strict_json(checkpoints):
    document = comparison_document(compare_series([f for _a, f in checkpoints]))
    text = json.dumps(document, allow_nan=False)
    back = json.loads(text)
    assert back["files"][0] == "run_step1.h5"
    dead = back["layers"][0]["checks"]["dead"]
    assert dead["counts"] == [1, 4, 5]
    change = back["steps"][0]["changes"][0]
    assert change == {"layer": "hidden1", "before": None, "after": "dead",
                      "units": [7, 9, 20],
                      "sentence": "hidden1: 3 units became dead: 7, 9, 20"}


def test_dumps_whose_layers_differ_are_refused_with_one_sentence(checkpoints):
    base = checkpoints[0][1]
    wider = findings_of(planted_arrays((3,), (), seed=5, relu_units=40), "wider.h5")
    with pytest.raises(IncomparableDumps) as raised:
        compare_pair(base, wider)
    assert str(raised.value) == ("run_step1.h5 and wider.h5 cannot be compared: layer "
                                 "'hidden1' has 32 units in run_step1.h5 and 40 in wider.h5")
    tanh = findings_of(planted_arrays((3,), (), seed=5, second_kind="tanh"), "tanh.h5")
    with pytest.raises(IncomparableDumps, match="layer 'hidden2' is logistic in run_step1.h5 "
                                                "and tanh in tanh.h5"):
        compare_series([base, tanh])
    renamed_arrays = planted_arrays((3,), (), seed=5)
    renamed_arrays["output"] = renamed_arrays.pop("readout")
    renamed = findings_of(renamed_arrays, "renamed.h5")
    with pytest.raises(IncomparableDumps, match="layer 'readout' is in run_step1.h5 but not "
                                                "in renamed.h5"):
        compare_series([base, renamed])
    with pytest.raises(IncomparableDumps, match="at least two dumps; got 1"):
        compare_series([base])


def test_long_unit_lists_are_cut_in_the_sentence():
    change = StateChange("fc2", "", "dead", tuple(range(20)))
    assert change.sentence(limit=5) == "fc2: 20 units became dead: 0, 1, 2, 3, 4 and 15 more"
    moved = StateChange("fc2", "dormant", "dead", (4,))
    assert moved.sentence() == "fc2: 1 unit became dead (were dormant): 4"
    back = StateChange("fc2", "near_binary", "", (1, 2))
    assert back.sentence() == "fc2: 2 units no longer near binary: 1, 2"
