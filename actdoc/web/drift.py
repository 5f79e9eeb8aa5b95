"""The Compare page (``actdoc compare`` in the browser): several dumps of one model side by
side, as plain data for HTML and JSON.

The comparison itself lives in the core (``actdoc.compare``); this module picks the dumps,
orders them, gives them short labels and draws one chart per layer. Nothing here knows Flask.
"""

from __future__ import annotations

import re
from typing import Any, Sequence

from actdoc.compare import Comparison, LayerTrack, compare_series, comparison_document
from actdoc.io.base import natural_key
from actdoc.model import CAVEAT, Findings
from actdoc.web import figures, looks
from actdoc.web.text import chart_text
from actdoc.web.ticks import percent_axis
from actdoc.workspace import DumpRecord

#: A comparison draws at most this many dumps (each one's findings are loaded for the page).
MAX_DUMPS = 24


class TooFewDumps(ValueError):
    """Fewer than two distinct dumps were picked, or more than ``MAX_DUMPS``."""


def picked_ids(values: Sequence[str]) -> list[str]:
    """Dump ids from repeated ``dump=`` parameters or comma lists, first mention kept."""
    ids: list[str] = []
    for value in values:
        ids += [part.strip() for part in value.split(",")
                if part.strip() and part.strip() not in ids]
    if len(ids) < 2:
        raise TooFewDumps(f"pick at least two ready dumps to compare; got {len(ids)}")
    if len(ids) > MAX_DUMPS:
        raise TooFewDumps(f"pick at most {MAX_DUMPS} dumps to compare; got {len(ids)}")
    return ids


def series_order(records: Sequence[DumpRecord]) -> list[DumpRecord]:
    """Checkpoints in natural order of their file names ("step2" before "step10"), then by
    the time they were added."""
    return sorted(records, key=lambda record: (natural_key(record.name), record.created))


def short_labels(names: Sequence[str]) -> list[str]:
    """Axis labels: file names without the extension and without the prefix they all share
    up to a separator ("relu_dying_step1.h5", ... -> "step1", ...). Full stems when cutting
    would leave a label empty or make two alike; positions added when even those repeat (two
    uploads named "model.h5")."""
    stems = [re.sub(r"\.(h5|hdf5|npz|safetensors)$", "", name, flags=re.IGNORECASE)
             for name in names]
    prefix = stems[0]
    for stem in stems[1:]:
        while not stem.startswith(prefix):
            prefix = prefix[:-1]
    cut = max(prefix.rfind(sep) for sep in "_-. ") + 1
    labels = [stem[cut:] for stem in stems]
    if any(not label for label in labels) or len(set(labels)) < len(labels):
        labels = stems
    if len(set(labels)) < len(labels):
        labels = [f"{label} ({position})" for position, label in enumerate(labels, start=1)]
    return labels


def shares_figure(track: LayerTrack, labels: Sequence[str]) -> dict[str, Any] | None:
    """Share of the layer's units in each check that ever names one, one line per check."""
    flagged = track.ever_flagged
    if not flagged:
        return None
    traces = [{
        "type": "scatter", "mode": "lines+markers", "name": looks.label(check),
        "x": [chart_text(label) for label in labels], "y": list(track.shares[check]),
        "customdata": list(track.counts[check]),
        "line": {"color": looks.colour(check), "width": 2},
        "marker": {"symbol": looks.look(check).symbol, "size": 8},
        "hovertemplate": "%{x}: %{y:.1%} (%{customdata} units) " + looks.label(check)
                         + "<extra></extra>",
    } for check in flagged]
    top = max((share for check in flagged for share in track.shares[check]
               if share is not None), default=0.0)
    title = f"{track.name} · {track.kind} · {track.units} units"
    if len(traces) == 1:
        title += f" · {traces[0]['name']}"
    return {"data": traces, "layout": figures.base_layout(
        title, showlegend=len(traces) > 1,
        xaxis={"type": "category", "title": {"text": "dump"}},
        yaxis=percent_axis(max(top, 0.01)))}


def step_entries(comparison: Comparison, series: Sequence[Findings],
                 records: Sequence[DumpRecord], labels: Sequence[str]) -> list[dict[str, Any]]:
    """The changes between consecutive dumps, with what a page needs to link each unit."""
    steps = []
    for step in comparison.steps:
        later = series[step.after]
        changes = [{
            "layer": change.layer, "layer_index": later.layer(change.layer).info.index,
            "before": change.before or None, "after": change.after or None,
            "units": list(change.units), "sentence": change.sentence(),
        } for change in step.changes]
        steps.append({"before": labels[step.before], "after": labels[step.after],
                      "before_id": records[step.before].id, "after_id": records[step.after].id,
                      "changes": changes})
    return steps


def drift(records: Sequence[DumpRecord], series: Sequence[Findings]) -> dict[str, Any]:
    """The page's data for ``records`` (in series order) and their Findings."""
    comparison = compare_series(series)
    labels = short_labels([record.name for record in records])
    layers = []
    for track in comparison.layers:
        quiet = [check for check in track.checks if check not in track.ever_flagged]
        layers.append({
            "name": track.name, "index": series[-1].layer(track.name).info.index,
            "activation": track.kind, "units": track.units,
            "statuses": [status.value for status in track.statuses],
            "rows": [{"check": check, "shares": list(track.shares[check]),
                      "counts": list(track.counts[check])} for check in track.ever_flagged],
            "quiet_checks": quiet,
            "quiet_labels": [looks.label(check) for check in quiet],
            "figure": shares_figure(track, labels),
        })
    return {
        "labels": labels,
        "layers": layers,
        "steps": step_entries(comparison, series, records, labels),
        "comparison": comparison_document(comparison),
        "caveat": series[0].caveat or CAVEAT,
    }
