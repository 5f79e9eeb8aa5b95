"""The check registry: each module of this package registers its checks with a decorator.

``all_checks()`` imports every module of the package (pkgutil), so adding a check is adding a
module; nothing else changes. A unit check looks at one layer's per-unit statistics and names
units; a layer check looks at a whole layer (and the dump's reference layer) and names none.

Unit checks with an exclusivity ``rank`` claim units in rank order: a unit named by a lower rank
is not named again by a higher one (dead, dormant, saturated, near_binary, linear_regime,
constant). Checks without a rank (non_finite) name every unit they apply to. A probe check
looks at the probe batch itself (its size, its input features) and names no layer.

Everything the engine needs to know about a check is registered with it (its kinds, rank,
severity rule, whether it runs on layers without activations (``static``), the unit-table
column its labels go to), so the engine never names a check: a new check is a new module and
nothing else.
"""

from __future__ import annotations

import importlib
import pkgutil
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from actdoc.analysis.defaults import Settings
from actdoc.analysis.stats import LayerStats
from actdoc.model import ActivationKind, Finding, LayerInfo, ProbeReport, Severity, WeightSummary


@dataclass(frozen=True)
class NonFiniteOrigin:
    """The first layer, in forward order, that holds NaN or infinity, and where it holds them."""

    layer: str
    index: int
    in_parameters: bool
    in_activations: bool
    #: probe samples on which some activation of the layer is not finite, of ``samples``
    bad_samples: int
    samples: int


@dataclass(frozen=True)
class DumpContext:
    """What every check may know about the whole dump: the probe batch, where NaN starts, and
    the layer whose gradient RMS the gradient-flow check compares against."""

    probe: ProbeReport | None = None
    nonfinite_origin: NonFiniteOrigin | None = None
    gradient_reference: tuple[str, float] | None = None
    #: each layer's incoming weight std over the reference for its kind (None: no weights)
    weight_ratios: tuple[float | None, ...] = ()
    #: index of the first measured layer, the one output scales are compared against
    reference_index: int | None = None


@dataclass(frozen=True)
class UnitInput:
    """What a unit check may look at."""

    info: LayerInfo
    #: None for a layer without activations (only ``static`` checks run there).
    stats: LayerStats | None
    settings: Settings
    #: Non-finite entries per unit in the weight row and bias (None: no parameters stored).
    parameter_nonfinite: np.ndarray | None = None
    #: The layer's incoming weights [units, ...] and bias, given to ``static`` checks.
    weight: np.ndarray | None = None
    bias: np.ndarray | None = None
    context: DumpContext = DumpContext()

    def share(self, counts: np.ndarray) -> np.ndarray:
        """counts / finite observations per unit (NaN for a unit with none)."""
        n = self.stats.moments.count
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, counts / np.where(n > 0, n, 1.0), np.nan)


@dataclass(frozen=True)
class UnitVerdict:
    """Which units a check names, each unit's measure, and the limit it was held against.

    ``phrase`` completes "N of M units ...". ``aggregate`` turns the named units' values into
    the finding's single measure ("mean", "max" or "sum"). ``labels`` (one string per unit) go
    to the unit-table column the check registered as ``label_column``. ``severity``, ``cause``
    and ``remedy``, when given, replace the registered rule and text: the check knows better
    from the data (a NaN that only propagated from a layer below, say).
    """

    mask: np.ndarray
    values: np.ndarray
    threshold: float
    phrase: str
    aggregate: str = "mean"
    labels: np.ndarray | None = None
    severity: Severity | None = None
    cause: str | None = None
    remedy: str | None = None


@dataclass(frozen=True)
class LayerInput:
    """What a layer check may look at."""

    info: LayerInfo
    stats: LayerStats | None
    settings: Settings
    weights: WeightSummary | None
    output_scale: float | None
    reference_name: str | None
    reference_scale: float | None
    #: the unit checks' findings on this layer, so a layer check's cause can follow them
    unit_findings: tuple[Finding, ...] = ()
    gradient_gain: float | None = None
    context: DumpContext = DumpContext()

    def named_share(self, check: str) -> float:
        """Share of the layer's units a unit check named (0 when it named none)."""
        units = sum(len(f.units) for f in self.unit_findings if f.check == check)
        return units / self.info.units if self.info.units else 0.0


@dataclass(frozen=True)
class LayerVerdict:
    """A layer check's result; ``severity`` (default warning), ``cause`` and ``remedy`` (default
    the registered text) follow the data where the check says so."""

    measure: float
    threshold: float
    summary: str
    severity: Severity = Severity.WARNING
    cause: str | None = None
    remedy: str | None = None


@dataclass(frozen=True)
class ProbeInput:
    """What a probe check may look at: the probe batch's report and the dump's layers."""

    probe: ProbeReport
    settings: Settings
    layers: tuple[LayerInfo, ...]


#: A probe check's result has the shape of a layer check's.
ProbeVerdict = LayerVerdict


@dataclass(frozen=True)
class Check:
    """A registered check: what it applies to, how it ranks, how severe, what to do."""

    name: str
    scope: str
    evaluate: Callable
    cause: str
    remedy: str
    rank: int | None = None
    kinds: frozenset[ActivationKind] | None = None
    critical_by_share: bool = False
    always_critical: bool = False
    advise: Callable[[ActivationKind], tuple[str, str]] | None = None
    #: Runs on layers without activations, from the weights alone (checks/static.py);
    #: UnitInput.stats is None there.
    static: bool = False
    #: the unit-table column that receives the verdict's labels ("" for none)
    label_column: str = ""

    def applies_to(self, kind: ActivationKind) -> bool:
        return self.kinds is None or kind in self.kinds

    def advice(self, kind: ActivationKind) -> tuple[str, str]:
        """Cause and remedy, tailored to the kind where the check knows better."""
        if self.advise is not None:
            tailored = self.advise(kind)
            if tailored is not None:
                return tailored
        return self.cause, self.remedy


REGISTRY: dict[str, Check] = {}


def _register(check: Check) -> None:
    if check.name in REGISTRY and REGISTRY[check.name].evaluate is not check.evaluate:
        raise ValueError(f"check '{check.name}' is registered twice")
    REGISTRY[check.name] = check


def unit_check(name: str, *, cause: str, remedy: str, rank: int | None = None,
               kinds: Iterable[ActivationKind] | None = None, critical_by_share: bool = False,
               always_critical: bool = False,
               advise: Callable[[ActivationKind], tuple[str, str] | None] | None = None,
               static: bool = False, label_column: str = ""):
    """Register ``fn(UnitInput) -> UnitVerdict | None`` (None: not measurable on this layer).
    A ``static`` check also runs on layers without activations (``UnitInput.stats`` None)."""
    def decorate(fn):
        _register(Check(name, "unit", fn, cause, remedy, rank,
                        None if kinds is None else frozenset(kinds), critical_by_share,
                        always_critical, advise, static, label_column))
        return fn
    return decorate


def layer_check(name: str, *, cause: str, remedy: str,
                kinds: Iterable[ActivationKind] | None = None):
    """Register ``fn(LayerInput) -> LayerVerdict | None`` (None: nothing to report)."""
    def decorate(fn):
        _register(Check(name, "layer", fn, cause, remedy,
                        kinds=None if kinds is None else frozenset(kinds)))
        return fn
    return decorate


def probe_check(name: str, *, cause: str, remedy: str):
    """Register ``fn(ProbeInput) -> ProbeVerdict | None`` (None: nothing to report)."""
    def decorate(fn):
        _register(Check(name, "probe", fn, cause, remedy))
        return fn
    return decorate


def discover() -> None:
    """Import every module of this package so their decorators run."""
    for module in pkgutil.iter_modules(__path__):
        importlib.import_module(f"{__name__}.{module.name}")


SCOPES = ("unit", "layer", "probe")


def all_checks() -> list[Check]:
    """Every check: unit checks first (ranked ones in exclusivity order), then layer checks,
    then probe checks."""
    discover()
    big = 10 ** 6
    return sorted(REGISTRY.values(),
                  key=lambda c: (SCOPES.index(c.scope), big if c.rank is None else c.rank,
                                 c.name))


def state_width() -> int:
    """Characters a unit's state needs: the longest name among the exclusive unit checks (a
    fixed width would silently cut a longer name)."""
    discover()
    return max([len(c.name) for c in REGISTRY.values() if c.rank is not None] + [1])
