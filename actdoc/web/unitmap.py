"""The unit map: every unit of a layer as a point, its state shown by colour and by shape.

Units in one state often share one exact position (every dead unit sits at active share 0 and
spread 0): those points are spread over a small disc with a fixed seed so each stays visible
and clickable; the hover gives the exact values. A wide layer is drawn in bounded size: a grey
density of all units under at most ``MAX_POINTS`` points (the flagged units first, then a fixed
sample of the rest).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from actdoc.model import ActivationKind, LayerReport
from actdoc.web import looks
from actdoc.web.figures import base_layout

#: Points drawn on one map at most; past it the map is a density with a sample of points.
MAX_POINTS = 4000
#: Bins of the density under a wide layer's points (x by y).
DENSITY_BINS = (48, 32)
#: Coinciding points are spread over a disc of this share of the axis spans times the square
#: root of how many share the place (so the disc's area grows with them), at most SPREAD_MAX.
SPREAD = 0.012
SPREAD_MAX = 0.08
SEED = 20240611

#: Unit map axes per kind: (x column, x label, y column, y label).
AXES = {
    "rectified": ("active_fraction", "share of inputs where the unit is active",
                  "std", "spread of the output (std)"),
    "other": ("mean", "mean output", "std", "spread of the output (std)"),
}


def axes_for(kind: ActivationKind) -> tuple[str, str, str, str]:
    if kind in (ActivationKind.RELU, ActivationKind.LEAKY_RELU, ActivationKind.THRESHOLD,
                ActivationKind.STOCHASTIC_BINARY):
        return AXES["rectified"]
    return AXES["other"]


def spread_coinciding(x: np.ndarray, y: np.ndarray, rng: np.random.Generator
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Positions to draw: points that share their exact (x, y) with others are moved within a
    disc around it (SPREAD times each axis' span times the square root of how many share it),
    inwards only at the edges of the data; the others stay where they are."""
    shown_x, shown_y = x.astype(float).copy(), y.astype(float).copy()
    finite = np.isfinite(x) & np.isfinite(y)
    if finite.sum() < 2:
        return shown_x, shown_y
    pairs = np.stack([x[finite], y[finite]], axis=1)
    _, inverse, counts = np.unique(pairs, axis=0, return_inverse=True, return_counts=True)
    together = counts[inverse.ravel()]
    crowded = np.flatnonzero(finite)[together > 1]
    reach = np.minimum(SPREAD_MAX, SPREAD * np.sqrt(together[together > 1]))
    if crowded.size == 0:
        return shown_x, shown_y
    span_x = float(np.ptp(x[finite])) or max(abs(float(x[finite][0])), 1.0)
    span_y = float(np.ptp(y[finite])) or max(abs(float(y[finite][0])), 1.0)
    angle = rng.uniform(0, 2 * np.pi, crowded.size)
    radius = np.sqrt(rng.uniform(0, 1, crowded.size))
    dx = reach * span_x * radius * np.cos(angle)
    dy = reach * span_y * radius * np.sin(angle)
    # A pile at the edge of the data (every dead unit at active share 0) spreads inwards only,
    # so no drawn point shows a value the measure cannot take.
    for base, step, values in ((x[crowded], dx, x[finite]), (y[crowded], dy, y[finite])):
        step[base <= values.min()] = np.abs(step[base <= values.min()])
        step[base >= values.max()] = -np.abs(step[base >= values.max()])
    shown_x[crowded] += dx
    shown_y[crowded] += dy
    return shown_x, shown_y


def sample_units(states: np.ndarray, limit: int, rng: np.random.Generator) -> np.ndarray:
    """At most ``limit`` unit indices: flagged units first (shared fairly among the states, at
    most three quarters of ``limit``), then a fixed sample of the units no check names."""
    names, sizes = np.unique(states[states != ""], return_counts=True)
    flagged_states = [str(name) for _size, name in sorted(zip(sizes, names))]  # small first
    picked: list[np.ndarray] = []
    calm = np.flatnonzero(states == "")
    # A quarter of the points stay for the units no check names, where there are any.
    room = limit - min(calm.size, limit // 4) if flagged_states else limit
    for position, state in enumerate(flagged_states):
        members = np.flatnonzero(states == state)
        share = room // (len(flagged_states) - position)
        take = members if members.size <= share else np.sort(
            rng.choice(members, share, replace=False))
        picked.append(take)
        room -= take.size
    room = limit - sum(part.size for part in picked)
    if room > 0 and calm.size:
        picked.append(calm if calm.size <= room else np.sort(rng.choice(calm, room,
                                                                          replace=False)))
    return np.sort(np.concatenate(picked)) if picked else np.arange(0)


def density_trace(x: np.ndarray, y: np.ndarray) -> dict[str, Any] | None:
    """Grey counts of every unit over a DENSITY_BINS grid (zero cells left blank)."""
    finite = np.isfinite(x) & np.isfinite(y)
    if not finite.any():
        return None
    counts, x_edges, y_edges = np.histogram2d(x[finite], y[finite], bins=DENSITY_BINS)
    z = np.where(counts > 0, counts, np.nan).T
    return {"type": "heatmap", "x": (x_edges[:-1] + x_edges[1:]) / 2,
            "y": (y_edges[:-1] + y_edges[1:]) / 2, "z": z, "showscale": False,
            "colorscale": [[0, "#eceef1"], [1, "#8a929c"]], "hoverongaps": False,
            "name": "all units", "showlegend": False,
            "hovertemplate": "%{z} units here<extra></extra>"}


def unit_map(report: LayerReport) -> dict[str, Any] | None:
    """The layer's units as points; a click opens the unit's card (``customdata[0]``)."""
    x_col, x_label, y_col, y_label = axes_for(report.info.kind)
    table = report.unit_table
    if x_col not in table or y_col not in table:
        return None
    units = report.info.units
    states = np.asarray(table.get("state", np.full(units, "")), dtype=object).astype(str)
    x_all = np.asarray(table[x_col], dtype=float)
    y_all = np.asarray(table[y_col], dtype=float)
    rng = np.random.default_rng(SEED)
    shown = np.arange(units) if units <= MAX_POINTS else sample_units(states, MAX_POINTS, rng)
    x_shown, y_shown = spread_coinciding(x_all[shown], y_all[shown], rng)
    traces = []
    if shown.size < units:
        density = density_trace(x_all, y_all)
        if density is not None:
            traces.append(density)
    present = sorted(set(states[shown].tolist()), key=lambda s: (s != "", s))
    for state in present:
        mine = np.flatnonzero(states[shown] == state)
        face = looks.look(state)
        units_here = shown[mine]
        traces.append({
            "type": "scatter", "mode": "markers", "name": face.label,
            "x": np.round(x_shown[mine], 6), "y": np.round(y_shown[mine], 6),
            "customdata": [[int(u), float(x_all[u]), float(y_all[u])] for u in units_here],
            "marker": {"color": face.colour, "symbol": face.symbol, "size": 8, "opacity": 0.85,
                       "line": {"color": face.colour, "width": 1.5}},
            "hovertemplate": ("unit %{customdata[0]}<br>" + x_col + " %{customdata[1]:.3g}<br>"
                              + y_col + " %{customdata[2]:.3g}<extra>" + face.label
                              + "</extra>")})
    title = "Unit map (click a unit to open it)"
    if shown.size < units:
        title = (f"Unit map: {shown.size:,} of {units:,} units as points, grey: all units "
                 "(click a point to open it)")
    layout = base_layout(title, xaxis={"title": {"text": x_label}},
                         yaxis={"title": {"text": y_label}})
    layout["showlegend"] = len(present) > 1
    return {"data": traces, "layout": layout,
            "points": int(shown.size), "units": int(units)}
