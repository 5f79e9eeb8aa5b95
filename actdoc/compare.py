"""Comparing the findings of several dumps of one model, such as checkpoints of a training run.

Layers are matched by name. Dumps can be compared when they hold the same layers with the same
unit counts and activation kinds; anything else is refused with one sentence naming the two
files and the first difference. For each layer the comparison tracks the share of units in each
check across the dumps, and for each pair of consecutive dumps it lists the units whose state
(the unit check that names them, or none) changed.

Reads only ``Findings``: no dump is opened again, and nothing here knows about HTTP.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from actdoc.errors import IncomparableDumps
from actdoc.formatting import clean_number
from actdoc.model import Findings, LayerReport, LayerStatus

#: How a unit that no check names is spelled in a unit state column and in the changes.
NO_STATE = ""
#: Units spelled out in a change's sentence; the rest are counted ("and 12 more").
UNITS_IN_SENTENCE = 12


@dataclass(frozen=True)
class StateChange:
    """Units of one layer that moved from one state to another between two dumps."""

    layer: str
    before: str
    after: str
    units: tuple[int, ...]

    def sentence(self, limit: int = UNITS_IN_SENTENCE) -> str:
        """E.g. "hidden2: 5 units became dead: 3, 9, 12, 40, 51"."""
        count = len(self.units)
        noun = "unit" if count == 1 else "units"
        if self.after == NO_STATE:
            what = f"{count} {noun} no longer {state_words(self.before)}"
        else:
            what = f"{count} {noun} became {state_words(self.after)}"
            if self.before != NO_STATE:
                what += f" (were {state_words(self.before)})"
        listed = ", ".join(str(u) for u in self.units[:limit])
        if count > limit:
            listed += f" and {count - limit} more"
        return f"{self.layer}: {what}: {listed}"


@dataclass(frozen=True)
class Step:
    """What changed between the dump at ``before`` and the next one, at ``after`` (positions)."""

    before: int
    after: int
    changes: tuple[StateChange, ...]


@dataclass(frozen=True)
class LayerTrack:
    """One layer across the dumps: per check, the share and count of units in it per dump."""

    name: str
    kind: str
    units: int
    checks: tuple[str, ...]
    shares: dict[str, tuple[float, ...]]
    counts: dict[str, tuple[int, ...]]
    statuses: tuple[LayerStatus, ...]

    @property
    def ever_flagged(self) -> tuple[str, ...]:
        """The checks that name at least one unit of this layer in at least one dump."""
        return tuple(c for c in self.checks if any(n > 0 for n in self.counts[c]))


@dataclass(frozen=True)
class Comparison:
    """Several dumps of one model side by side, in the order they were given."""

    files: tuple[str, ...]
    layers: tuple[LayerTrack, ...]
    steps: tuple[Step, ...]


def state_words(state: str) -> str:
    """A unit state as prose: "near_binary" -> "near binary"."""
    return state.replace("_", " ")


def unit_states(report: LayerReport) -> np.ndarray:
    """Each unit's state: the unit check that names it, or ``NO_STATE``."""
    states = report.unit_table.get("state")
    if states is None:
        return np.full(report.info.units, NO_STATE)
    return np.asarray(states, dtype=str)


def check_comparable(first: Findings, second: Findings) -> None:
    """Raise ``IncomparableDumps`` unless both hold the same layers, units and kinds."""
    a, b = first.source.file, second.source.file
    names_a = [report.name for report in first.layers]
    names_b = {report.name for report in second.layers}
    only_a = [name for name in names_a if name not in names_b]
    only_b = sorted(names_b.difference(names_a))
    if only_a or only_b:
        where = (f"layer '{only_a[0]}' is in {a} but not in {b}" if only_a
                 else f"layer '{only_b[0]}' is in {b} but not in {a}")
        raise IncomparableDumps(f"{a} and {b} cannot be compared: {where}")
    for report in first.layers:
        other = second.layer(report.name)
        if report.info.units != other.info.units:
            raise IncomparableDumps(
                f"{a} and {b} cannot be compared: layer '{report.name}' has "
                f"{report.info.units} units in {a} and {other.info.units} in {b}")
        if report.info.kind != other.info.kind:
            raise IncomparableDumps(
                f"{a} and {b} cannot be compared: layer '{report.name}' is "
                f"{report.info.kind.value} in {a} and {other.info.kind.value} in {b}")


def compare_pair(before: Findings, after: Findings) -> tuple[StateChange, ...]:
    """The units whose state differs between two comparable Findings, layer by layer.

    Layers come in ``before``'s forward order; within a layer, changes into a state come first
    (by state name, units that had no state before the rest), then changes out of a state.
    """
    check_comparable(before, after)
    changes: list[StateChange] = []
    for report in before.layers:
        old = unit_states(report)
        new = unit_states(after.layer(report.name))
        moved = np.flatnonzero(old != new)
        pairs: dict[tuple[str, str], list[int]] = {}
        for unit in moved.tolist():
            pairs.setdefault((str(old[unit]), str(new[unit])), []).append(unit)
        ordered = sorted(pairs.items(), key=lambda item: (
            item[0][1] == NO_STATE, item[0][1], item[0][0] != NO_STATE, item[0][0]))
        changes += [StateChange(report.name, was, now, tuple(units))
                    for (was, now), units in ordered]
    return tuple(changes)


def track_layer(series: Sequence[Findings], name: str) -> LayerTrack:
    """One layer's check shares and unit counts across the dumps (checks in first-appearance
    order). Counts are the units each check's finding names (zero without a finding)."""
    reports = [findings.layer(name) for findings in series]
    checks: list[str] = []
    for report in reports:
        checks += [check for check in report.fractions if check not in checks]
    counts: dict[str, tuple[int, ...]] = {}
    shares: dict[str, tuple[float, ...]] = {}
    for check in checks:
        shares[check] = tuple(float(report.fractions.get(check, float("nan")))
                              for report in reports)
        counts[check] = tuple(
            sum(len(f.units) for f in findings.for_layer(name) if f.check == check)
            for findings in series)
    first = reports[0].info
    return LayerTrack(first.name, first.kind.value, first.units, tuple(checks), shares, counts,
                      tuple(report.status for report in reports))


def compare_series(series: Sequence[Findings]) -> Comparison:
    """Compare two or more Findings of one model, in the given order."""
    if len(series) < 2:
        raise IncomparableDumps(
            f"a comparison needs at least two dumps; got {len(series)}")
    for later in series[1:]:
        check_comparable(series[0], later)
    layers = tuple(track_layer(series, report.name) for report in series[0].layers)
    steps = tuple(Step(i, i + 1, compare_pair(series[i], series[i + 1]))
                  for i in range(len(series) - 1))
    return Comparison(tuple(f.source.file for f in series), layers, steps)


def comparison_document(comparison: Comparison) -> dict[str, Any]:
    """The comparison as JSON-ready data (the dashboard's JSON twin carries it)."""
    return {
        "files": list(comparison.files),
        "layers": [{
            "name": track.name, "activation": track.kind, "units": track.units,
            "statuses": [status.value for status in track.statuses],
            "checks": {check: {"shares": [clean_number(s) for s in track.shares[check]],
                               "counts": list(track.counts[check])}
                       for check in track.checks},
        } for track in comparison.layers],
        "steps": [{
            "before": step.before, "after": step.after,
            "changes": [{"layer": change.layer, "before": change.before or None,
                         "after": change.after or None, "units": list(change.units),
                         "sentence": change.sentence()} for change in step.changes],
        } for step in comparison.steps],
    }
