"""Plotly figures as plain dicts, built from Findings: the pages JSON.parse and draw them.

No plotly Python objects: the figures are small dicts, cheap to build per request, and the same
dicts appear in each page's JSON twin.
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from actdoc.analysis.defaults import ROWS
from actdoc.model import ActivationKind, Findings, LayerInfo
from actdoc.neurons import Neuron
from actdoc.web import looks
from actdoc.web.binning import safe_histogram
from actdoc.web.text import chart_text
from actdoc.web.ticks import log_axis, percent_axis
from actdoc.web.zaxis import AsinhAxis, PlainAxis

INK = "#24303f"
MUTED = "#6b7684"
GRID = "#e6e9ee"
ACCENT = "#1d6f6a"
SATURATED_FILL = "rgba(201, 122, 28, 0.14)"
LINEAR_FILL = "rgba(59, 102, 196, 0.12)"
SILENT_FILL = "rgba(120, 128, 140, 0.12)"

#: Settings that place the zones on the transfer curve (defaults from the analysis table).
ZONE_SETTINGS = ("logistic_saturation_margin", "tanh_saturation_level", "linear_gain_share")


#: Tick labels are not measured one by one to hide those past the chart's edge (plotly.js's
#: ``ticklabeloverflow``); the margins leave them room, and the measuring was about a third of
#: the time a page took to draw its charts (docs/dashboard.md, page load).
QUICK_TICK_LABELS = {"ticklabeloverflow": "allow"}


def base_layout(title: str, **extra: Any) -> dict[str, Any]:
    """The calm shared look: light grid, system font, room for a title (shown as text: names
    in it cannot become plotly markup)."""
    layout = {
        "title": {"text": chart_text(title), "x": 0.01, "font": {"size": 15, "color": INK}},
        "font": {"family": "system-ui, -apple-system, Segoe UI, sans-serif", "size": 12,
                 "color": INK},
        "paper_bgcolor": "rgba(0,0,0,0)", "plot_bgcolor": "#ffffff",
        "margin": {"l": 60, "r": 24, "t": 48, "b": 56},
        "xaxis": {"gridcolor": GRID, "zerolinecolor": GRID, **QUICK_TICK_LABELS},
        "yaxis": {"gridcolor": GRID, "zerolinecolor": GRID, **QUICK_TICK_LABELS},
        "legend": {"orientation": "h", "x": 1, "xanchor": "right", "y": 1.0,
                   "yanchor": "bottom", "bgcolor": "rgba(0,0,0,0)"},
        "hovermode": "closest",
    }
    for key, value in extra.items():
        if isinstance(value, dict) and isinstance(layout.get(key), dict):
            layout[key] = {**layout[key], **value}
        else:
            layout[key] = value
    return layout


def depth_fractions(findings: Findings, checks: Sequence[str]) -> dict[str, Any] | None:
    """Share of each layer's units in each check, across depth; None when no check names a
    unit anywhere (the page says so in a sentence instead of an empty chart)."""
    names = [chart_text(report.name) for report in findings.layers]
    traces = []
    for check in checks:
        shares = [report.fractions.get(check) for report in findings.layers]
        if not any(share for share in shares if share is not None):
            continue
        face = looks.look(check)
        traces.append({"type": "bar", "name": face.label, "x": names, "y": shares,
                       "marker": {"color": face.colour},
                       "hovertemplate": "%{x}: %{y:.1%} " + face.label + "<extra></extra>"})
    if not traces:
        return None
    top = max(share for trace in traces for share in trace["y"] if share is not None)
    title = "Share of units in each check, by depth"
    if len(traces) == 1:
        title = f"Share of units {traces[0]['name']}, by depth"
    return {"data": traces, "layout": base_layout(
        title, barmode="group", showlegend=len(traces) > 1,
        yaxis=percent_axis(top), xaxis={"type": "category", "title": {"text": "layer"}})}


def depth_signal(findings: Findings) -> dict[str, Any] | None:
    """Output scale and gradient gain across depth (log scale: both are ratios of size)."""
    names = [chart_text(report.name) for report in findings.layers]
    traces = []
    for field, label, colour in (("output_scale", "output scale", ACCENT),
                                 ("gradient_gain", "gradient gain", "#b35c2e")):
        values = [getattr(report, field) for report in findings.layers]
        if all(v is None for v in values):
            continue
        traces.append({"type": "scatter", "mode": "lines+markers", "name": label,
                       "x": names, "y": [v if v is not None and v > 0 else None for v in values],
                       "line": {"color": colour, "width": 2},
                       "hovertemplate": "%{x}: %{y:.3g} " + label + "<extra></extra>"})
    if not traces:
        return None
    title = "Output scale and gradient gain, by depth"
    if len(traces) == 1:
        title = f"{traces[0]['name'].capitalize()}, by depth"
    return {"data": traces, "layout": base_layout(
        title, showlegend=len(traces) > 1,
        yaxis=log_axis([v for trace in traces for v in trace["y"]], "size (log scale)"),
        xaxis={"type": "category", "title": {"text": "layer"}})}


#: Inputs reaching past this many times the saturation edge get an asinh z axis: on a plain
#: axis the zones shrink to a sliver around z = 0 and a few wide outer bins fill the chart.
WIDE_INPUT_RATIO = 20.0


def saturation_reach(info: LayerInfo, settings: Mapping[str, float]) -> float | None:
    """The saturation edge |z| of the layer's kind (None for kinds that do not saturate)."""
    values = zone_settings(settings)
    zone = Neuron(info.kind, info.negative_slope, info.threshold).saturation_zone(
        values["logistic_saturation_margin"], values["tanh_saturation_level"])
    return None if zone is None else max(abs(zone.z_low), abs(zone.z_high))


def input_axis(info: LayerInfo, settings: Mapping[str, float], low: float,
               high: float) -> PlainAxis | AsinhAxis:
    """The z axis for inputs from ``low`` to ``high``: asinh when they reach past
    WIDE_INPUT_RATIO times the saturation edge, plain otherwise."""
    reach = saturation_reach(info, settings)
    if reach is not None and max(abs(low), abs(high)) > WIDE_INPUT_RATIO * reach:
        return AsinhAxis()
    return PlainAxis()


def zone_settings(settings: Mapping[str, float]) -> dict[str, float]:
    return {name: float(settings.get(name, ROWS[name].default)) for name in ZONE_SETTINGS}


def zone_shapes(info: LayerInfo, settings: Mapping[str, float],
                axis: PlainAxis | AsinhAxis) -> list[dict[str, Any]]:
    """Shaded bands for the saturated and near-linear zones of the layer's kind, placed on
    ``axis``. They are named in the legend, not labelled on the chart: on a wide or lopsided
    range labels at the zone edges run into each other."""
    values = zone_settings(settings)
    neuron = Neuron(info.kind, info.negative_slope, info.threshold)
    band = {"type": "rect", "xref": "x", "yref": "paper", "y0": 0, "y1": 1,
            "line": {"width": 0}, "layer": "below"}
    shapes = []
    saturation = neuron.saturation_zone(values["logistic_saturation_margin"],
                                        values["tanh_saturation_level"])
    if saturation is not None:
        low, high, far = axis.place([saturation.z_low, saturation.z_high, 1e6])
        legend = {**band, "fillcolor": SATURATED_FILL, "legendgroup": "saturated",
                  "name": "saturated"}
        shapes.append({**legend, "x0": -far, "x1": low, "showlegend": True})
        shapes.append({**legend, "x0": high, "x1": far, "showlegend": False})
    linear = neuron.linear_zone(values["linear_gain_share"])
    if linear is not None:
        low, high = axis.place([linear.z_low, linear.z_high])
        shapes.append({**band, "x0": low, "x1": high, "fillcolor": LINEAR_FILL,
                       "showlegend": True, "name": "near-linear"})
    edge = silent_edge(info)
    if edge is not None:
        at, far = axis.place([edge, 1e6])
        shapes.append({**band, "x0": -far, "x1": at, "fillcolor": SILENT_FILL,
                       "showlegend": True, "name": "silent (no output)"})
    return shapes


def silent_edge(info: LayerInfo) -> float | None:
    """Where a relu or threshold unit falls silent: output 0 (and no gradient) at or below
    this z. None for kinds without a silent side (leaky relu keeps a small slope)."""
    if info.kind is ActivationKind.RELU:
        return 0.0
    if info.kind is ActivationKind.THRESHOLD:
        return float(info.threshold or 0.0)
    return None


def zone_note(info: LayerInfo, settings: Mapping[str, float]) -> str:
    """What the shading on a total-input chart of this kind means, in words."""
    values = zone_settings(settings)
    neuron = Neuron(info.kind, info.negative_slope, info.threshold)
    parts = []
    saturation = neuron.saturation_zone(values["logistic_saturation_margin"],
                                        values["tanh_saturation_level"])
    if saturation is not None:
        parts.append(f"saturated zone (z below {saturation.z_low:.3g} or above "
                     f"{saturation.z_high:.3g}: the output hardly moves and passes almost no "
                     "gradient)")
    linear = neuron.linear_zone(values["linear_gain_share"])
    if linear is not None:
        parts.append(f"near-linear zone (z from {linear.z_low:.3g} to {linear.z_high:.3g}: "
                     f"the slope is at least {values['linear_gain_share']:.0%} of its "
                     "largest, so the unit acts almost like a linear one)")
    edge = silent_edge(info)
    if edge is not None:
        parts.append(f"silent side (z at or below {edge:.3g}: output 0 and no gradient)")
    line = "The line is the transfer function f(z) on the right axis."
    if not parts:
        return f"No zone is shaded: a {info.kind.value} unit neither saturates nor falls " \
               f"silent. {line}"
    return "Shaded: " + "; ".join(parts) + ". " + line


def curve_trace(info: LayerInfo, low: float, high: float,
                axis: PlainAxis | AsinhAxis = PlainAxis()) -> dict[str, Any] | None:
    """The layer's transfer function f(z) between ``low`` and ``high``, on the right axis,
    sampled evenly along ``axis``."""
    if not np.isfinite([low, high]).all() or high <= low:
        return None
    z = axis.edges(low, high, 240) if axis.transformed else np.linspace(low, high, 241)
    y = Neuron(info.kind, info.negative_slope, info.threshold).output(z)
    return {"type": "scatter", "mode": "lines", "name": f"f(z) = {info.kind.value}",
            "x": axis.place(z), "y": y, "customdata": z, "yaxis": "y2",
            "line": {"color": INK, "width": 2},
            "hovertemplate": "z %{customdata:.3g} → f %{y:.3g}<extra></extra>"}


def occupied_range(edges: np.ndarray, counts: np.ndarray) -> tuple[float, float]:
    """From the first to the last bin holding anything (fixed grids reach far past the data)."""
    filled = np.flatnonzero(np.asarray(counts) > 0)
    if filled.size == 0:
        return float(edges[0]), float(edges[-1])
    low, high = float(edges[filled[0]]), float(edges[filled[-1] + 1])
    if filled[-1] - filled[0] < 2:  # one value or nearly: give the bar some room
        pad = 4 * (high - low) or 1.0
        low, high = low - pad, high + pad
    return low, high


def bin_labels(edges: np.ndarray, open_ends: bool) -> list[str]:
    """Each bin's z range for the hover; with ``open_ends`` the outer bins also hold every
    value beyond the grid (the engine's fixed grids count overflow there)."""
    labels = [f"z {low:.3g} to {high:.3g}" for low, high in zip(edges[:-1], edges[1:])]
    if open_ends and len(labels) > 1:
        labels[0], labels[-1] = f"z below {edges[1]:.3g}", f"z above {edges[-2]:.3g}"
    return labels


def histogram_bars(edges: np.ndarray, counts: np.ndarray, name: str,
                   colour: str = "#7fb2a8", axis: PlainAxis | AsinhAxis = PlainAxis(),
                   open_ends: bool = False) -> tuple[dict[str, Any], str]:
    """Bars over the bins, placed on ``axis``, and the y label. Bins of unequal width on the
    axis (the engine's asinh grid on a plain axis) are drawn as observations per unit of the
    axis, so a wide outer bin does not look like a wall and each bar's area is its count."""
    edges = np.asarray(edges, dtype=float)
    counts = np.asarray(counts)
    placed = axis.place(edges)
    widths = np.diff(placed)
    uneven = widths.size > 1 and widths.max() > 1.01 * widths.min()
    heights = counts / widths if uneven else counts
    # Halves first: the sum of two edges near the largest float would overflow.
    trace = {"type": "bar", "name": name, "x": placed[:-1] / 2 + placed[1:] / 2, "y": heights,
             "width": widths, "customdata": counts, "hovertext": bin_labels(edges, open_ends),
             "marker": {"color": colour},
             "hovertemplate": "%{hovertext}: %{customdata} observations<extra></extra>"}
    # Not "per unit": on these pages a unit is a neuron.
    return trace, ("observations ÷ bin width" if uneven else "observations")


#: A bar this many times the next tallest makes a histogram's count axis logarithmic.
SPIKE_RATIO = 20.0


def count_axis(heights: np.ndarray, label: str, broad: bool = False) -> dict[str, Any]:
    """The y axis of a histogram: logarithmic when one spike (rectified outputs at exactly 0)
    would flatten every other bar on a linear axis, or, with ``broad`` (an asinh x axis), when
    the tallest bar is SPIKE_RATIO times the median one: there bars span decades too."""
    filled = np.asarray(heights, dtype=float)
    filled = filled[np.isfinite(filled) & (filled > 0)]
    tallest = np.sort(filled)[-2:]
    spike = filled.size > 2 and tallest[1] > SPIKE_RATIO * tallest[0]
    if spike or (broad and filled.size > 2 and tallest[1] > SPIKE_RATIO * np.median(filled)):
        return log_axis(filled, f"{label} (log scale)")
    return {"title": {"text": label}}


def histogram_figure(edges: np.ndarray, counts: np.ndarray, title: str, x_label: str,
                     y_label: str | None = None, open_ends: bool = False) -> dict[str, Any]:
    """A plain histogram (outputs, biases, weights) over the range that holds data."""
    trace, bars_label = histogram_bars(edges, counts, x_label, open_ends=open_ends)
    return {"data": [trace], "layout": base_layout(
        title, bargap=0, showlegend=False,
        xaxis={"title": {"text": x_label}, "range": list(occupied_range(edges, counts))},
        yaxis=count_axis(trace["y"], y_label or bars_label))}


#: On a unit card the view keeps both saturation edges only while the unit's own inputs fill at
#: least this share of it; otherwise it follows the inputs (the curve is drawn over them).
DATA_SHARE_OF_VIEW = 0.25


def inputs_under_curve(info: LayerInfo, edges: np.ndarray, counts: np.ndarray,
                       settings: Mapping[str, float], title: str,
                       band: Sequence[float] | None = None,
                       open_ends: bool = False, follow_data: bool = False,
                       axis: PlainAxis | AsinhAxis | None = None) -> dict[str, Any]:
    """Histogram of total inputs with f(z) drawn over it and the zones shaded.

    The view spans the inputs and, for saturating kinds, both saturation edges, so a reader
    sees where the inputs sit against them; inputs far past the edges get an asinh z axis
    (``input_axis``). With ``follow_data`` (one unit's inputs, often a narrow clump deep in
    one zone) the edges join the view only while the inputs keep DATA_SHARE_OF_VIEW of it.
    ``band`` (low, high) marks a range of z, e.g. the middle 90% of one unit's inputs.
    ``axis``: the axis the bins were made for, where the caller chose it.
    """
    edges = np.asarray(edges, dtype=float)
    low, high = occupied_range(edges, counts)
    axis = axis or input_axis(info, settings, low, high)
    bars, y_label = histogram_bars(edges, counts, "total inputs", axis=axis,
                                   open_ends=open_ends)
    bars["showlegend"] = False  # the y axis title says what the bars are
    traces = [bars]
    shapes = zone_shapes(info, settings, axis)
    reach = saturation_reach(info, settings)
    edge = silent_edge(info)
    if reach is not None or edge is not None:
        marks = [-1.5 * reach, 1.5 * reach] if reach is not None else [edge]
        wide_low, wide_high = min(low, *marks), max(high, *marks)
        placed = axis.place([low, high, wide_low, wide_high])
        data_share = (placed[1] / 2 - placed[0] / 2) / max(placed[3] / 2 - placed[2] / 2, 1e-300)
        if not follow_data or data_share >= DATA_SHARE_OF_VIEW:
            low, high = wide_low, wide_high  # both edges in view
    curve = curve_trace(info, low, high, axis)
    # tickmode "auto": plotly.js would otherwise sync these ticks to the left axis' grid,
    # which lands them on values like 1.67 and 3.87.
    curve_axis = {"overlaying": "y", "side": "right", "showgrid": False, "zeroline": False,
                  "title": {"text": "output f(z)"}, "nticks": 6, "tickmode": "auto",
                  **QUICK_TICK_LABELS}
    if curve is not None:
        traces.append(curve)
        y_low, y_high = float(np.min(curve["y"])), float(np.max(curve["y"]))
        pad = 0.05 * ((y_high - y_low) or max(abs(y_low), 1.0))
        curve_axis["range"] = [y_low - pad, y_high + pad]
    if band is not None and np.isfinite(band).all():
        x0, x1 = axis.place(band)
        shapes.append({"type": "rect", "xref": "x", "yref": "paper", "y0": 0, "y1": 0.04,
                       "x0": x0, "x1": x1, "fillcolor": ACCENT, "line": {"width": 0}})
    return {"data": traces, "layout": base_layout(
        title, shapes=shapes, bargap=0, margin={"r": 60, "b": 84},
        # The curve and two zones do not fit beside the title: the legend goes below the axis.
        legend={"x": 0, "xanchor": "left", "y": -0.3, "yanchor": "top"},
        xaxis=axis.layout(low, high),
        yaxis=count_axis(bars["y"], y_label, broad=axis.transformed),
        yaxis2=curve_axis)}


#: One bar per unit up to this many units; past it the norms are drawn as a histogram.
MAX_UNIT_BARS = 2000


def per_unit_bars(values: np.ndarray, title: str, y_label: str,
                  reference: float | None = None) -> dict[str, Any] | None:
    """One bar per unit (incoming weight norms), with an optional reference line; for a wide
    layer a histogram of the values with the reference as a vertical line instead."""
    values = np.asarray(values, dtype=float)
    if values.size > MAX_UNIT_BARS:
        figure = value_histogram(values, f"{title} ({values.size:,} units)", y_label,
                                 bins=60, y_label="units")
        if figure is not None and reference is not None and np.isfinite(reference):
            figure["layout"]["shapes"] = [{
                "type": "line", "yref": "paper", "y0": 0, "y1": 1, "x0": reference,
                "x1": reference, "line": {"color": "#b35c2e", "dash": "dash"}}]
        return figure
    shapes = []
    if reference is not None and np.isfinite(reference):
        shapes.append({"type": "line", "xref": "paper", "x0": 0, "x1": 1, "y0": reference,
                       "y1": reference, "line": {"color": "#b35c2e", "dash": "dash"}})
    return {"data": [{"type": "bar", "x": np.arange(values.size), "y": values,
                      "customdata": np.arange(values.size), "marker": {"color": "#7fb2a8"},
                      "hovertemplate": "unit %{x}: %{y:.3g}<extra></extra>"}],
            "layout": base_layout(title, shapes=shapes, bargap=0.05, showlegend=False,
                                  xaxis={"title": {"text": "unit"}},
                                  yaxis={"title": {"text": y_label}})}


def value_histogram(values: np.ndarray, title: str, x_label: str,
                    bins: int = 40, y_label: str = "count") -> dict[str, Any] | None:
    """Histogram of a small array (biases, one unit's incoming weights)."""
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return None
    edges, counts = safe_histogram(values, bins)
    return histogram_figure(edges, counts, title, x_label, y_label=y_label)
