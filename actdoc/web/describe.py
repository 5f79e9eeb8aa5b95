"""A chart in words: the text alternative each chart carries for people who cannot see it
(WCAG 2.1 SC 1.1.1, non-text content).

``describe(figure)`` reads a plotly ``{data, layout}`` dict and names its title, its axes and,
per series, the numbers a reader would take from the picture: every value of a short
categorical series, the range and the peak of a histogram, the extent of a cloud of points, the
ends of a line. A figure may bring its own sentence as ``layout.meta.summary``; it is placed
after the title instead of the generic series description.
"""

from __future__ import annotations

import math
from typing import Any

from actdoc.formatting import number, plain

#: Series beyond this many are counted, not described.
MAX_SERIES = 6
#: A categorical series up to this long is read out value by value.
MAX_READ_OUT = 12


def _text(value: Any) -> str:
    if isinstance(value, dict):
        value = value.get("text")
    return str(value).strip() if value else ""


def _finite_pairs(trace: dict) -> list[tuple[Any, float]]:
    xs, ys = trace.get("x") or [], trace.get("y") or []
    if not xs and ys:
        xs = list(range(len(ys)))
    return [(x, float(y)) for x, y in zip(xs, ys)
            if isinstance(y, (int, float)) and not isinstance(y, bool) and math.isfinite(y)]


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _series(trace: dict) -> str:
    name = _text(trace.get("name")) or "series"
    pairs = _finite_pairs(trace)
    if not pairs:
        return f"{name}: no values"
    numeric_x = all(_is_number(x) for x, _y in pairs)
    if not numeric_x and len(pairs) <= MAX_READ_OUT:
        return f"{name}: " + ", ".join(f"{x} {number(y)}" for x, y in pairs)
    ys = [y for _x, y in pairs]
    if trace.get("type") == "bar" and numeric_x:
        peak_x, peak_y = max(pairs, key=lambda pair: pair[1])
        return (f"{name}: {len(pairs)} bars from {number(float(pairs[0][0]))} to "
                f"{number(float(pairs[-1][0]))}, highest at {number(float(peak_x))} "
                f"({number(peak_y)})")
    if "lines" in str(trace.get("mode", "")) and numeric_x:
        (x0, y0), (x1, y1) = pairs[0], pairs[-1]
        return (f"{name}: a line from {number(y0)} at {number(float(x0))} to {number(y1)} at "
                f"{number(float(x1))}")
    text = f"{name}: {len(pairs)} points, values from {number(min(ys))} to {number(max(ys))}"
    if numeric_x:
        xs = [float(x) for x, _y in pairs]
        text += f" against {number(min(xs))} to {number(max(xs))}"
    return text


def describe(figure: dict | None) -> str:
    """One paragraph saying what ``figure`` shows, for a figcaption or an aria-label."""
    if not figure:
        return ""
    figure = plain(figure)  # numpy arrays and scalars as lists and numbers, NaN as None
    layout = figure.get("layout") or {}
    parts = [_text(layout.get("title")) or "Chart"]
    axes = [f"{axis} axis: {_text((layout.get(key) or {}).get('title'))}"
            for axis, key in (("Horizontal", "xaxis"), ("Vertical", "yaxis"))
            if _text((layout.get(key) or {}).get("title"))]
    if axes:
        parts.append("; ".join(axes))
    meta = layout.get("meta")
    own = meta.get("summary") if isinstance(meta, dict) else None
    traces = [trace for trace in figure.get("data") or [] if trace.get("visible") is not False]
    if own:
        parts.append(str(own))
    else:
        parts.extend(_series(trace) for trace in traces[:MAX_SERIES])
        if len(traces) > MAX_SERIES:
            parts.append(f"and {len(traces) - MAX_SERIES} more series")
    return ". ".join(part.rstrip(".") for part in parts) + "."
