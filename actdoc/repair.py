"""Recycling dead and dormant units of a dense chain, as ReDo does (Sokar et al. 2023, ICML).

Sokar, Agarwal, Castro & Evci, "The Dormant Neuron Phenomenon in Deep Reinforcement Learning"
(ICML 2023, Algorithm 1) recycle a dormant unit by re-initialising its incoming weights from the
network's initial distribution and setting its outgoing weights to zero. The zeroed outgoing
weights mean the next layer receives exactly what it received before, so the network computes
the same outputs, while the unit, with fresh weights, fires again and gets gradients.

``recycle`` does this for the dead and dormant units actdoc finds (docs/checks.md) on a probe,
in every ReLU layer that has a next layer: fresh incoming weights drawn from the layer's
reference initialisation (normal with He et al. 2015's std for rectified kinds, Glorot & Bengio
2010's otherwise: ``analysis.summary.reference_std``), seeded; bias zero (common practice for a
fresh unit); the next layer's column for the unit zeroed. It then checks the claim on the
probe, block by block: on every sample where no recycled unit fired (a dead unit never does)
the old and new network must agree at the output to float tolerance, or nothing is written; it
reports how much the outputs move on the samples where a recycled dormant unit did fire, and
counts how many recycled units are active again.

Leaky ReLU layers are left alone: their silent units still pass a*z forward, so zeroing their
outgoing weights would change the outputs on every sample.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from actdoc.analysis import analyze
from actdoc.analysis.defaults import Settings
from actdoc.analysis.summary import reference_std
from actdoc.errors import ActdocError, InvalidDump, describe
from actdoc.forward import ForwardPass, dense_chain, forward_dump, forward_pass_of
from actdoc.model import ActivationKind, Dump
from actdoc.probefile import features_of

#: Output agreement required, in machine epsilons of the weights' float type, per unit of the
#: output's magnitude: zeroed columns add exact zeros, so only summation order could differ.
TOLERANCE_EPSILONS = 64
RECYCLED_CHECKS = ("dead", "dormant")


@dataclass(frozen=True)
class LayerRepair:
    """One layer's recycled units and what they do on the probe afterwards."""

    name: str
    kind: str
    units: int
    recycled: tuple[int, ...]
    #: Recycled units active on at least one probe sample after the repair.
    active_again: int
    #: Recycled units active on at least the dormant share of samples after the repair.
    above_dormant: int
    init: str
    std: float


@dataclass(frozen=True)
class RepairReport:
    """What ``repair`` changed and the proof that the outputs did not."""

    samples: int
    seed: int
    layers: tuple[LayerRepair, ...]
    max_output_change: float
    tolerance: float
    #: The repaired network over the probe (its weights, biases and activations).
    forward: ForwardPass
    #: Samples on which a recycled (dormant) unit fired before, where outputs may move.
    dead_only: bool = False
    touched_samples: int = 0
    touched_change: float = 0.0
    argmax_changed: int = 0

    @property
    def recycled(self) -> int:
        return sum(len(layer.recycled) for layer in self.layers)

    def lines(self) -> list[str]:
        """The report the command prints."""
        out = []
        for layer in self.layers:
            if not layer.recycled:
                out.append(f"{layer.name} ({layer.kind}, {layer.units} units): nothing to recycle")
                continue
            out.append(
                f"{layer.name} ({layer.kind}, {layer.units} units): recycled "
                f"{len(layer.recycled)} {'dead' if self.dead_only else 'dead or dormant'} "
                f"unit(s) with fresh {layer.init} weights "
                f"(std {layer.std:.3g}); {layer.active_again} of them active again on the probe, "
                f"{layer.above_dormant} on at least the dormant share")
        untouched = self.samples - self.touched_samples
        out.append(f"outputs unchanged on {untouched} of {self.samples} probe samples: largest "
                   f"change {self.max_output_change:.3g} (tolerance {self.tolerance:.3g})")
        if self.touched_samples:
            out.append(f"on the other {self.touched_samples} samples a recycled dormant unit "
                       f"had fired, so removing it moves the outputs (largest change "
                       f"{self.touched_change:.3g}; the largest output changed place on "
                       f"{self.argmax_changed}); --dead-only recycles only units that never "
                       f"fire, leaving every output unchanged")
        return out


def active_counts(forward: ForwardPass, layer: int, kind: ActivationKind) -> np.ndarray:
    """Samples on which each unit of ``layer`` fires (z > 0), over the whole probe."""
    counts = np.zeros(forward.weights[layer].shape[0], np.int64)
    for blocks in forward.outputs():
        z, _ = blocks[layer]
        counts += np.count_nonzero(z > 0, axis=0)
    return counts


def compare_outputs(old: ForwardPass, new: ForwardPass,
                    recycled: Sequence[np.ndarray]) -> dict[str, float]:
    """Old against new network over the probe, block by block.

    A sample is *touched* when some recycled unit had a non-zero output on it in the old
    network (a dormant unit firing): only there can zeroed outgoing weights change anything.
    Returns the largest change on untouched samples, the largest on touched ones, the largest
    |y_old| (for the tolerance), the touched count and how many touched samples changed their
    largest output (the predicted class of a classifier).
    """
    last = len(old.weights) - 1
    result = {"untouched": 0.0, "touched": 0.0, "scale": 0.0, "touched_samples": 0,
              "argmax_changed": 0}
    for start in range(0, old.samples, 4096):
        stop = min(old.samples, start + 4096)
        before = old.block(start, stop, last)
        after = new.block(start, stop, last)
        touched = np.zeros(stop - start, bool)
        for index, units in enumerate(recycled):
            if units.size:
                touched |= np.any(before[index][1][:, units] != 0, axis=1)
        a, b = before[last][1].astype(np.float64), after[last][1].astype(np.float64)
        with np.errstate(invalid="ignore"):
            diff = np.where((np.isnan(a) & np.isnan(b)) | (a == b), 0.0, np.abs(a - b))
        diff = np.nan_to_num(diff, nan=np.inf).max(axis=1, initial=0.0)
        result["untouched"] = max(result["untouched"], float(diff[~touched].max(initial=0.0)))
        result["touched"] = max(result["touched"], float(diff[touched].max(initial=0.0)))
        result["scale"] = max(result["scale"], float(np.abs(a[np.isfinite(a)]).max(initial=0.0)))
        result["touched_samples"] += int(touched.sum())
        if a.shape[1] > 1:
            result["argmax_changed"] += int(np.count_nonzero(
                a[touched].argmax(axis=1) != b[touched].argmax(axis=1)))
    return result


def recycle(dump: Dump, probe, settings: Settings | None = None, seed: int = 0,
            layers: Sequence[str] | None = None, dead_only: bool = False) -> RepairReport:
    """Recycle the dead and dormant units of ``dump``'s dense chain, found on ``probe``.

    ``layers`` limits the repair to the named layers. Raises InvalidDump (one sentence) for a
    network it cannot repair: no weights, convolution kernels, no probe.
    """
    settings = settings or Settings()
    dense_chain(dump, None, "the probe")
    if probe is None:
        raise InvalidDump(f"{describe(dump.path)}: has no probe to find and check dead units "
                          f"on; give one with --probe FILE (or store /probe/input in the dump)")
    dense_chain(dump, features_of(probe), "the probe")
    if len(dump.layers) < 2:
        raise InvalidDump(f"{describe(dump.path)}: holds one layer; recycling a unit needs a "
                          f"next layer whose weights take its output")
    names = [layer.name for layer in dump.layers]
    unknown = [name for name in (layers or ()) if name not in names]
    if unknown:
        raise InvalidDump(f"{describe(dump.path, unknown[0])}: no such layer; the layers are "
                          f"{', '.join(names)}")
    before = forward_pass_of(dump, probe)
    findings = analyze(forward_dump(dump, before), settings, digest=False)
    rng = np.random.default_rng(seed)
    weights = [np.array(w, copy=True) for w in before.weights]
    biases = [None if b is None else np.array(b, copy=True) for b in before.biases]
    chosen: list[tuple[int, np.ndarray, str, float]] = []
    for index, layer in enumerate(dump.layers[:-1]):
        info = layer.info
        if info.kind is not ActivationKind.RELU or (layers and info.name not in layers):
            chosen.append((index, np.zeros(0, np.int64), "", float("nan")))
            continue
        checks = ("dead",) if dead_only else RECYCLED_CHECKS
        units = sorted({u for f in findings.for_layer(info.name) if f.check in checks
                        for u in f.units})
        fan_in = weights[index].shape[1]
        std, init = reference_std(info.kind, fan_in, info.units, info.negative_slope)
        recycled = np.asarray(units, np.int64)
        if recycled.size:
            fresh = rng.standard_normal((recycled.size, fan_in)) * std
            weights[index][recycled] = fresh.astype(weights[index].dtype)
            if biases[index] is not None:  # a layer without biases keeps none
                biases[index][recycled] = 0
        chosen.append((index, recycled, init, std))
    for index, recycled, _, _ in chosen:  # after every fresh row, so fresh rows get zeroed too
        if recycled.size:
            weights[index + 1][:, recycled] = 0
    after = ForwardPass(probe, weights, biases, before.neurons)
    outcome = compare_outputs(before, after, [recycled for _, recycled, _, _ in chosen])
    tolerance = TOLERANCE_EPSILONS * float(np.finfo(before.dtype).eps) * max(1.0,
                                                                            outcome["scale"])
    if not outcome["untouched"] <= tolerance:
        raise ActdocError(f"{describe(dump.path)}: the repaired network's outputs differ by "
                          f"{outcome['untouched']:.3g} on probe samples where no recycled unit "
                          f"fired (tolerance {tolerance:.3g}); nothing was written")
    report_layers = []
    for (index, recycled, init, std), layer in zip(chosen, dump.layers):
        active_again = above = 0
        if recycled.size:
            counts = active_counts(after, index, layer.info.kind)[recycled]
            active_again = int(np.count_nonzero(counts > 0))
            above = int(np.count_nonzero(counts >= settings.dormant_active_share * after.samples))
        report_layers.append(LayerRepair(layer.name, layer.info.kind.value, layer.info.units,
                                         tuple(int(u) for u in recycled), active_again, above,
                                         init, std))
    return RepairReport(samples=after.samples, seed=seed, layers=tuple(report_layers),
                        max_output_change=outcome["untouched"], tolerance=tolerance,
                        forward=after, dead_only=dead_only,
                        touched_samples=int(outcome["touched_samples"]),
                        touched_change=outcome["touched"],
                        argmax_changed=int(outcome["argmax_changed"]))


def same_file(a: Path, b: Path) -> bool:
    """Whether two paths name one file (also through links)."""
    try:
        return a.resolve() == b.resolve() or (b.exists() and a.samefile(b))
    except OSError:
        return False
