"""Tick marks that read sensibly: percentages with as many decimals as their step needs, and
logarithmic axes labelled at round values only (no crowd of 2s and 5s between decades)."""

from __future__ import annotations

import math
from typing import Any, Iterable

#: Mantissas of "nice" steps (common practice for chart axes: 1-2-5 sequences).
NICE = (1.0, 2.0, 2.5, 5.0, 10.0)


def nice_step(span: float, most: int = 6) -> float:
    """The smallest 1-2-2.5-5 step that covers ``span`` in at most ``most`` steps."""
    if not span > 0 or not math.isfinite(span):
        return 1.0
    raw = span / most
    power = 10.0 ** math.floor(math.log10(raw))
    for mantissa in NICE:
        if mantissa * power >= raw * (1 - 1e-9):
            return mantissa * power
    return 10.0 * power


def percent_axis(top: float, title: str = "share of units") -> dict[str, Any]:
    """A share axis from 0 to a little above ``top`` (a fraction), ticked at a nice step and
    printed with the decimals that step needs: 0%, 0.5%, 1.0% rather than 0%, 1%, 1%."""
    top = top if math.isfinite(top) and top > 0 else 0.01
    upper = min(1.0, top * 1.15) if top < 0.87 else 1.0
    step = nice_step(upper)
    # Decimals of the step in percent: 0.5% needs one, 0.25% two, 20% none.
    percent_step = step * 100
    decimals = 0
    while decimals < 4 and abs(round(percent_step, decimals) - percent_step) > 1e-9:
        decimals += 1
    return {"range": [0, upper], "tick0": 0, "dtick": step, "tickformat": f".{decimals}%",
            "title": {"text": title}}


def log_axis(values: Iterable[float | None], title: str) -> dict[str, Any]:
    """A log axis over the positive ``values``, ticked only at powers of ten (every second or
    third one over many decades); within one decade, at 1-2-5 values, never more than seven."""
    positive = [v for v in values if v is not None and math.isfinite(v) and v > 0]
    axis: dict[str, Any] = {"type": "log", "title": {"text": title}}
    if not positive:
        return axis
    low, high = min(positive), max(positive)
    first, last = math.floor(math.log10(low)), math.ceil(math.log10(high))
    if last - first <= 1:
        ticks = [m * 10.0 ** e for e in range(first - 1, last + 1) for m in (1, 2, 5)]
        ticks = [t for t in ticks if low / 1.5 <= t <= high * 1.5] or [10.0 ** first]
    else:
        stride = max(1, math.ceil((last - first + 1) / 7))
        ticks = [10.0 ** e for e in range(first, last + 1, stride)]
    axis.update(tickmode="array", tickvals=ticks, ticktext=[tick_text(t) for t in ticks],
                range=[math.log10(min(low, ticks[0])) - 0.1,
                       math.log10(max(high, ticks[-1])) + 0.1])
    return axis


def tick_text(value: float) -> str:
    """A round tick value as a short label: 0.001, 0.2, 5, 100, 1e+06."""
    if 1e-3 <= value < 1e5:
        return f"{value:g}"
    return f"{value:.0e}".replace("e-0", "e-").replace("e+0", "e+")
