"""What a LayerReport shows besides findings: weight scale, per-unit table, histograms, scales.

Reference weight scales: He et al. 2015 (ICCV, eq. 10 and, for a leaky slope a, eq. 15):
std = sqrt(2 / ((1 + a^2) fan_in)) for rectified kinds and their smooth relatives (softplus,
GELU, SiLU: common practice); Glorot & Bengio 2010 (AISTATS, eq. 16, written as a variance):
std = sqrt(2 / (fan_in + fan_out)) for tanh, linear and threshold kinds, and 4 times that for
the logistic and stochastic binary units, whose slope at 0 is 1/4 instead of 1.
"""

from __future__ import annotations

import math

import numpy as np

from actdoc.analysis.histograms import grids_for
from actdoc.analysis.stats import LayerStats
from actdoc.model import ActivationKind, Histogram, Layer, WeightSummary

Kind = ActivationKind
HE_KINDS = frozenset({Kind.RELU, Kind.LEAKY_RELU, Kind.SOFTPLUS, Kind.GELU, Kind.SILU})


#: Kinds whose slope at 0 is 1/4 (the logistic, and the firing probability of stochastic binary
#: units): Glorot & Bengio 2010's derivation assumes a slope of 1, so these need 4 times its
#: scale to keep the same gain (the standard choice for logistic layers).
QUARTER_SLOPE_KINDS = frozenset({Kind.LOGISTIC, Kind.STOCHASTIC_BINARY})


def reference_std(kind: Kind, fan_in: int, fan_out: int,
                  negative_slope: float = 0.0) -> tuple[float, str]:
    """The initial weight std recommended for ``kind``, and the name of its source."""
    if kind in HE_KINDS:
        slope = negative_slope if kind is Kind.LEAKY_RELU else 0.0
        return math.sqrt(2.0 / ((1.0 + slope * slope) * fan_in)), "He et al. 2015"
    glorot = math.sqrt(2.0 / (fan_in + fan_out))
    if kind in QUARTER_SLOPE_KINDS:
        return 4.0 * glorot, "Glorot & Bengio 2010 x4 (logistic slope 1/4 at 0)"
    return glorot, "Glorot & Bengio 2010"


def weight_summary(layer: Layer) -> tuple[WeightSummary | None, np.ndarray | None]:
    """The layer's WeightSummary and its non-finite parameter count per unit (None: no weights).

    The std is over all finite entries of the weight array, about their mean.
    """
    weight = layer.weight()
    bias = layer.bias()
    if weight is None:
        if bias is None:
            return None, None
        return None, (~np.isfinite(bias)).astype(np.float64)
    bad = np.sum(~np.isfinite(weight), axis=1).astype(np.float64)
    if bias is not None and bias.shape[0] == bad.shape[0]:
        bad += ~np.isfinite(bias)
    finite = weight[np.isfinite(weight)].astype(np.float64)
    std = float(finite.std()) if finite.size else math.nan
    fan_in, fan_out = layer.fan_in or 0, layer.fan_out or 0
    ref, name = (reference_std(layer.info.kind, fan_in, fan_out, layer.info.negative_slope)
                 if fan_in > 0 else (math.nan, ""))
    with np.errstate(invalid="ignore", over="ignore"):
        norms = np.sqrt(np.sum(np.square(weight, dtype=np.float64), axis=1))
    summary = WeightSummary(fan_in=fan_in, fan_out=fan_out, std=std, reference_std=ref,
                            reference=name, row_norms=norms,
                            bias=None if bias is None else bias.astype(np.float64))
    return summary, bad


def output_scale(stats: LayerStats | None) -> float | None:
    """RMS of the layer's finite outputs over all units and observations (None: none)."""
    if stats is None:
        return None
    m = stats.moments
    n = float(m.count.sum())
    if n == 0:
        return None
    squares = float(m.total_squares.sum())
    if not math.isfinite(squares):  # finite outputs whose squares overflow (inf - inf: NaN)
        return math.inf
    return math.sqrt(max(0.0, squares / n))


def gradient_gain(stats: LayerStats | None) -> float | None:
    """mean f'(z) over units and observations, divided by max f' (None: not measurable)."""
    if stats is None:
        return None
    total = stats.gain_total()
    peak = stats.neuron.max_gain
    n = float(stats.moments.count.sum())
    if total is None or not peak or n == 0:
        return None
    return float(total.sum()) / n / peak


def dormant_scores(stats: LayerStats) -> np.ndarray:
    """Sokar et al. 2023 (ICML): s_i = E|h_i| / mean_j E|h_j| (NaN where undefined)."""
    mean_abs = stats.mean_abs()
    layer_mean = np.nanmean(mean_abs) if np.isfinite(mean_abs).any() else np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        return mean_abs / layer_mean if layer_mean > 0 else np.full(stats.units, np.nan)


def sample_firing(stats: LayerStats) -> np.ndarray | None:
    """Per channel of a spatial layer: the share of samples on which it is active anywhere."""
    side = stats.side
    if side is None or side.sample_active is None:
        return None
    samples = stats.rows // max(1, side.positions)
    with np.errstate(invalid="ignore", divide="ignore"):
        return side.sample_active / samples if samples else np.full(stats.units, np.nan)


def gradient_rms(stats: LayerStats | None) -> float | None:
    """RMS of dL/dz over the layer (None where the dump stores no gradient)."""
    return None if stats is None or stats.side is None else stats.side.gradient_rms()


def unit_table(stats: LayerStats | None, units: int, states: np.ndarray,
               labels: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The per-unit columns the dashboard and the CSV show (NaN where not measured); ``labels``
    are the checks' label columns (saturation_side), written after the measures."""
    table: dict[str, np.ndarray] = {}
    if stats is not None:
        m = stats.moments
        n = m.count
        missing = np.full(units, np.nan)

        def share(counts):
            if counts is None:
                return missing.copy()
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(n > 0, counts / np.where(n > 0, n, 1.0), np.nan)

        # a unit whose finite values are all equal has no spread, whatever rounding the
        # moment merges left behind
        flat = stats.maximum == stats.minimum
        table["mean"] = np.where(n > 0, m.mean, np.nan)
        table["std"] = np.where(flat & (n > 0), 0.0, m.std())
        table["min"] = np.where(n > 0, stats.minimum, np.nan)
        table["max"] = np.where(n > 0, stats.maximum, np.nan)
        table["active_fraction"] = share(stats.active)
        table["low_fraction"] = share(stats.low)
        table["high_fraction"] = share(stats.high)
        table["linear_fraction"] = share(stats.linear)
        table["bimodality"] = np.where(flat, np.nan, m.bimodality())
        table["dormant_score"] = dormant_scores(stats)
        gain = stats.gain_total()
        peak = stats.neuron.max_gain
        table["gradient_gain"] = (share(gain) / peak if gain is not None and peak
                                  else missing.copy())
        samples = sample_firing(stats)
        if samples is not None:
            table["sample_active_fraction"] = samples
        if stats.side is not None and stats.side.grad_squares is not None:
            grad_n = stats.side.grad_count
            with np.errstate(invalid="ignore", divide="ignore"):
                table["gradient_rms"] = np.where(
                    grad_n > 0, np.sqrt(stats.side.grad_squares / np.maximum(grad_n, 1)), np.nan)
        table["nonfinite"] = stats.nonfinite.astype(np.int64)
        table["observations"] = n.astype(np.int64)
    table["state"] = states
    table.update(labels)
    return table


def histograms(stats: LayerStats | None) -> dict[str, Histogram]:
    """The layer's fixed-edge histograms of preact and output."""
    if stats is None:
        return {}
    grids = grids_for(stats.kind)
    return {name: Histogram(name, grids[name].edges, counts.copy())
            for name, counts in stats.histograms.items()}
