"""The total-input (z) axis of the dashboard's charts: plain, or asinh for inputs that span
many decades, with tick labels in z either way."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from actdoc.analysis.histograms import ASINH_SCALE


@dataclass(frozen=True)
class PlainAxis:
    """The z axis as it is: positions are z."""

    transformed = False

    def place(self, z: Any) -> np.ndarray:
        return np.asarray(z, dtype=float)

    def layout(self, low: float, high: float) -> dict[str, Any]:
        return {"title": {"text": "total input z"}, "range": [low, high]}


@dataclass(frozen=True)
class AsinhAxis:
    """A z axis drawn at asinh(z / scale): even steps within about +-scale, decades beyond, the
    sign kept. Ticks are labelled in z. The default scale is the engine's histogram scale, whose
    bins are even steps of asinh(z / ASINH_SCALE): on this axis they are all equally wide."""

    scale: float = ASINH_SCALE
    transformed = True

    def place(self, z: Any) -> np.ndarray:
        return np.arcsinh(np.asarray(z, dtype=float) / self.scale)

    def edges(self, low: float, high: float, bins: int) -> np.ndarray:
        """``bins`` bins from ``low`` to ``high``, equally wide on this axis."""
        return self.scale * np.sinh(np.linspace(*self.place([low, high]), bins + 1))

    def view(self, low: float, high: float) -> list[float]:
        """The axis range for z from ``low`` to ``high``, with a little room so that a tick at
        either end (often a grid edge such as 10k) is drawn."""
        placed = self.place([low, high])
        return [float(placed[0]) - 0.1, float(placed[1]) + 0.1]

    def ticks(self, low: float, high: float, most: int = 11) -> tuple[list[float], list[str]]:
        """0 and powers of ten in z, thinned to every second or third decade if needed so that
        at most ``most`` ticks share the axis."""
        top = max(abs(low), abs(high), self.scale)
        decades = list(range(math.ceil(math.log10(top)), math.floor(math.log10(self.scale)), -1))
        ends = self.view(low, high)
        gap = (ends[1] - ends[0]) / most
        for stride in range(1, len(decades) + 1):
            kept = [k for k in decades[::stride] if self.place(10.0 ** k) >= gap]
            values = [0.0] + [sign * 10.0 ** k for k in kept for sign in (1, -1)]
            values = sorted(v for v in values if ends[0] <= self.place(v) <= ends[1])
            steps = np.diff(self.place(values))
            if len(values) <= most and (steps.size == 0 or steps.min() >= 0.9 * gap):
                break
        text = [("−" if v < 0 else "") + decade_text(abs(v)) for v in values]
        return [float(p) for p in self.place(values)], text

    def layout(self, low: float, high: float) -> dict[str, Any]:
        values, text = self.ticks(low, high)
        return {"title": {"text": "total input z (asinh scale: linear near 0, "
                                  "logarithmic beyond)"},
                "range": self.view(low, high),
                "tickmode": "array", "tickvals": values, "ticktext": text}


def decade_text(value: float) -> str:
    """0.01, 1, 100, 10k, 1M: a power of ten as a short tick label."""
    if value == 0:
        return "0"
    power = round(math.log10(value))
    for step, suffix in ((9, "G"), (6, "M"), (3, "k")):
        if power >= step:
            return f"{10 ** (power - step)}{suffix}" if power - step < 3 else f"1e{power}"
    return f"{10.0 ** power:g}"
