"""Speed work changes nothing but speed: today's findings equal those recorded before it.

The reference (tests/scale/data/findings_reference.json.gz) was written once by
``python -m benchmarks.reference`` with the engine as it stood before the byte budgets of
docs/scale.md, on small versions of every benchmark cell and on the committed demo dumps. Counts,
unit lists, states, severities, summaries and histograms must match exactly; float figures
(moments, scales, measures) to 1e-9 relative, since slicing a block differently may change the
last bits of a float sum (numpy's reductions are not associative in the last place).
"""

from __future__ import annotations

import gzip
import json
import math
from pathlib import Path

import pytest

from benchmarks.cells import CELLS, cell_named, write_cell
from benchmarks.reference import DEFAULT_OUT, DEMO_DUMPS, analyse, small_samples

from actdoc.analysis import Settings

RTOL = 1e-9


@pytest.fixture(scope="module")
def reference() -> dict:
    with gzip.open(DEFAULT_OUT, "rt", encoding="utf-8") as handle:
        return json.load(handle)


def same(mine, theirs, where: str) -> None:
    """Equal records: numbers to RTOL (exact for integers), everything else exactly."""
    if isinstance(theirs, dict):
        assert sorted(mine) == sorted(theirs), where
        for key in theirs:
            same(mine[key], theirs[key], f"{where}.{key}")
    elif isinstance(theirs, list):
        assert len(mine) == len(theirs), where
        for index, (a, b) in enumerate(zip(mine, theirs)):
            same(a, b, f"{where}[{index}]")
    elif isinstance(theirs, float) and not isinstance(mine, str):
        assert mine is not None and math.isclose(mine, theirs, rel_tol=RTOL, abs_tol=1e-300), \
            f"{where}: {mine!r} != {theirs!r}"
    else:
        assert mine == theirs, f"{where}: {mine!r} != {theirs!r}"


@pytest.mark.parametrize("name", [cell.name for cell in CELLS])
def test_every_benchmark_cell_gives_the_recorded_findings(name, reference, tmp_path):
    cell = cell_named(name)
    recorded = reference["cells"][name]
    assert recorded["samples"] == small_samples(cell)
    path = write_cell(cell, tmp_path / f"{name}{cell.suffix}", small_samples(cell))
    same(analyse(path, Settings()), recorded["default"], f"{name}/default")
    same(analyse(path, Settings(**reference["small_settings"])), recorded["small"],
         f"{name}/small")


def test_the_demo_dumps_give_the_recorded_findings(reference):
    demos = sorted(DEMO_DUMPS.glob("*.h5"))
    assert [p.name for p in demos] == sorted(reference["demos"])
    for path in demos:
        same(analyse(path, Settings()), reference["demos"][path.name], path.name)


def test_the_comparison_would_see_a_changed_count(reference):
    """Control: one unit more in a finding is a difference."""
    record = json.loads(json.dumps(reference["demos"]["relu_dying_step5.h5"]))
    finding = next(f for f in record["findings"] if f["units"])
    changed = json.loads(json.dumps(record))
    changed["findings"][record["findings"].index(finding)]["units"].append(10**6)
    with pytest.raises(AssertionError):
        same(changed, record, "control")
