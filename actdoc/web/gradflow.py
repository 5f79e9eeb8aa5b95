"""The Survey's gradient chart: the RMS of dL/dz layer by layer, where the dump stores it.

The gradient_flow check (docs/checks.md) compares each layer's gradient RMS with the last
layer's; the chart shows the same numbers on a log axis, with the check's limit as a dashed line
and the flagged layers marked in its look, so a fade across depth reads at a glance.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

from actdoc.web import looks
from actdoc.web.figures import MUTED, base_layout
from actdoc.web.text import chart_text
from actdoc.web.ticks import log_axis

LINE = "#24303f"


def depth_gradient(rows: Sequence[Mapping[str, Any]] | None,
                   settings: Mapping[str, float]) -> dict[str, Any] | None:
    """Gradient RMS per layer (``views.gradient_depth`` rows), log scale, input side first;
    None without a stored gradient."""
    if not rows:
        return None
    names = [chart_text(row["name"]) for row in rows]
    values = [row["rms"] if row["rms"] is not None and row["rms"] > 0 else None for row in rows]
    face = looks.look("gradient_flow")
    traces: list[dict[str, Any]] = [{
        "type": "scatter", "mode": "lines+markers", "name": "gradient RMS", "x": names,
        "y": values, "line": {"color": LINE, "width": 2}, "marker": {"size": 7},
        "hovertemplate": "%{x}: RMS of dL/dz %{y:.3g}<extra></extra>"}]
    flagged = [(name, value) for name, value, row in zip(names, values, rows)
               if row["finding"] and value is not None]
    if flagged:
        traces.append({
            "type": "scatter", "mode": "markers", "name": "flagged: " + face.label,
            "x": [name for name, _v in flagged], "y": [value for _n, value in flagged],
            "marker": {"color": face.colour, "symbol": face.symbol, "size": 14,
                       "line": {"width": 2, "color": face.colour}},
            "hovertemplate": "%{x}: " + face.label + "<extra></extra>"})
    reference = next((row["rms"] for row in reversed(rows) if row["rms"]), None)
    limit = float(settings.get("gradient_limit", 100.0))
    shown = [v for v in values if v is not None]
    shapes, notes = [], []
    if reference and limit > 0:
        edge = reference / limit
        shown.append(edge)
        shapes.append({"type": "line", "xref": "paper", "x0": 0, "x1": 1, "yref": "y",
                       "y0": edge, "y1": edge, "line": {"color": MUTED, "dash": "dash",
                                                        "width": 1}})
        # annotations on a log axis take log10 of the value; shapes take the value itself
        notes.append({"xref": "paper", "x": 0, "xanchor": "left", "y": math.log10(edge),
                      "yref": "y",
                      "yanchor": "bottom", "showarrow": False,
                      "text": f"1/{limit:g} of the last layer's", "font": {"color": MUTED,
                                                                          "size": 11}})
    return {"data": traces, "layout": base_layout(
        "Gradient RMS (dL/dz), by depth", showlegend=len(traces) > 1, shapes=shapes,
        # below the axis, so a narrow (phone) chart's legend cannot cover the title
        legend={"x": 0, "xanchor": "left", "y": -0.32, "yanchor": "top"},
        margin={"b": 96},
        annotations=notes, yaxis=log_axis(shown, "RMS of dL/dz (log scale)"),
        xaxis={"type": "category", "automargin": True})}  # the ticks name the layers
