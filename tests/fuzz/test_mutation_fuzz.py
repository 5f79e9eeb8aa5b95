"""Property: whatever bytes a dump is made of, reading it ends in data or one sentence.

Hypothesis (property-based testing, hypothesis.readthedocs.io) draws one to three mutations of a
seed dump (tests/support/mutants.py: the demo HDF5 dumps, and NPZ files written by actdoc's writer,
``np.savez``, ``np.savez_compressed`` and zipfile's bzip2 and LZMA methods), aimed mostly at the
bytes that describe the data. Each case runs in a forked child with a wall-clock alarm and an
address-space limit (tests/support/fuzzing.py), so a hang or a runaway allocation fails the test
instead of freezing or swapping the suite.

Accepted outcomes: the dump reads through, or an ``actdoc.errors`` exception whose message is one
line naming the file. A hang inside the HDF5 library itself (its global heap decoder can loop on
a damaged collection, see docs/reader-fuzzing.md) is tolerated here and recorded with ``event``; the
dashboard opens uploads in a child process with a time limit for that reason. The draws are
derandomised so the normal run is repeatable; ``python -m tests.fuzz.long_run`` explores further.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from tests.support.fuzzing import CaseRunner
from tests.support.mutants import OPS, WORDS, Mutation, structure_positions, write_seeds

EXAMPLES = 200
CASE_TIMEOUT = 6.0
CASE_MEMORY = 1024 * 2**20


class Corpus(tuple):
    """(folder, {seed name: (bytes, structural positions)}), shown briefly in failure reports."""

    def __repr__(self) -> str:
        return f"Corpus({self[0]}, {sorted(self[1])})"


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz")
    seeds = write_seeds(folder / "seeds")
    return Corpus((folder, {name: (path.read_bytes(), structure_positions(path))
                            for name, path in seeds.items()}))


@pytest.fixture(scope="module")
def runner():
    with CaseRunner() as case_runner:
        yield case_runner


@st.composite
def mutations(draw, size: int, structure: list[int]):
    op = draw(st.sampled_from(OPS))
    if structure and draw(st.integers(0, 4)):
        position = structure[draw(st.integers(0, len(structure) - 1))]
    else:
        position = draw(st.integers(0, size - 1))
    if op in ("word4", "word8"):
        value = draw(st.sampled_from(WORDS + (size,)))
    else:
        value = draw(st.integers(0, 255))
    count = draw(st.sampled_from((1, 2, 7, 64)))
    return Mutation(op, position, value, count)


def check_case(folder: Path, runner: CaseRunner, name: str, data: bytes, limits: str) -> None:
    target = folder / f"case{Path(name).suffix}"
    target.write_bytes(data)
    result = runner.run(target, limits=limits, timeout=CASE_TIMEOUT, memory=CASE_MEMORY)
    outcome = result["outcome"]
    if outcome == "hang" and result["where"] == "hdf5":
        event("hang inside the HDF5 library")
        return
    assert outcome in ("ok", "refused"), result
    if outcome == "refused":
        message = result["message"]
        assert "\n" not in message and message.startswith(target.name), message


def fuzz(kind: str):
    """A test over the seeds whose name ends with ``kind``."""

    @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
              suppress_health_check=[HealthCheck.function_scoped_fixture,
                                     HealthCheck.too_slow])
    @given(data=st.data())
    def test(corpus, runner, data):
        folder, seeds = corpus
        name = data.draw(st.sampled_from(sorted(n for n in seeds if n.endswith(kind))))
        content, structure = seeds[name]
        for mutation in data.draw(st.lists(mutations(len(content), structure), min_size=1,
                                           max_size=3)):
            content = mutation.apply(content)
        limits = data.draw(st.sampled_from(("default", "uploads")))
        check_case(folder, runner, name, content, limits)

    return test


test_mutated_hdf5_dumps_read_or_refuse_in_one_sentence = fuzz(".h5")
test_mutated_npz_dumps_read_or_refuse_in_one_sentence = fuzz(".npz")
