"""Histograms of one unit's values that survive any finite input: numbers of any size, spreads
lost in rounding, spans that overflow."""

from __future__ import annotations

import numpy as np


def widened(low: float, high: float, bins: int) -> tuple[float, float]:
    """``low`` to ``high`` widened, where needed, so that ``bins`` bins between them are each
    at least eight representable steps wide (a constant gets +-0.5 or those steps)."""
    least = bins * 8 * float(np.spacing(max(abs(low), abs(high))))
    if high - low >= max(least, 1e-12):
        return low, high
    middle = low / 2 + high / 2
    half = max(0.5, least)
    return max(middle - half, -np.finfo(float).max), min(middle + half, np.finfo(float).max)


def safe_histogram(values: np.ndarray, bins: int,
                   edges: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``numpy.histogram`` of finite ``values`` that also works where their spread is lost in
    rounding (a constant 1e16, or values one ulp apart: numpy then refuses to make the bins)
    and where the span itself overflows (-1e308 to 1e308): ranges are widened to a few ulps
    per bin and very large values are binned at a power-of-two scale, which is exact.
    ``edges`` (increasing) replaces the even bins."""
    values = np.asarray(values, dtype=float)
    low, high = float(values.min()), float(values.max())
    top = max(abs(low), abs(high))
    if edges is not None:
        top = max(top, float(np.max(np.abs(edges))))
    scale = 2.0 ** (int(np.floor(np.log2(top))) - 4) if top > 1e300 else 1.0
    if edges is None:
        edges = np.linspace(*widened(low / scale, high / scale, bins), bins + 1)
    else:
        edges = np.asarray(edges, dtype=float) / scale
    counts, _ = np.histogram(values / scale, bins=edges)
    return edges * scale, counts


def unit_histogram(values: np.ndarray, bins: int, axis_for=None
                   ) -> tuple[np.ndarray, np.ndarray, int, object]:
    """Counts of one unit's finite ``values`` in ``bins`` bins over their range, how many were
    not finite, and the axis they are drawn on. ``axis_for(low, high)`` may name that axis; on
    an asinh axis the bins are equally wide there, unless the values are too close together
    for that (a clump far from 0), where the axis stays plain."""
    from actdoc.web.zaxis import PlainAxis

    values = np.asarray(values, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return np.array([0.0, 1.0]), np.array([0]), int(values.size), PlainAxis()
    low, high = widened(float(finite.min()), float(finite.max()), bins)
    axis = axis_for(low, high) if axis_for is not None else PlainAxis()
    edges = None
    if axis.transformed:
        edges = axis.edges(low, high, bins)
        edges[[0, -1]] = low, high  # exact ends: sinh(asinh(x)) may miss x by an ulp
        if not (np.isfinite(edges).all() and (np.diff(edges) > 0).all()
                and np.ptp(axis.place([low, high])) > 1.0):
            axis, edges = PlainAxis(), None
    edges, counts = safe_histogram(finite, bins, edges)
    return edges, counts, int(values.size - finite.size), axis
