"""The check registry: each module of this package registers its checks with a decorator.

``all_checks()`` imports every module of the package (pkgutil), so adding a check is adding a
module; nothing else changes. A unit check looks at one layer's per-unit statistics and names
units; a layer check looks at a whole layer (and the dump's reference layer) and names none.

Unit checks with an exclusivity ``rank`` claim units in rank order: a unit named by a lower rank
is not named again by a higher one (dead, dormant, saturated, near_binary, linear_regime,
constant). Checks without a rank (non_finite) name every unit they apply to.
"""

from __future__ import annotations

import importlib
import pkgutil
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from actdoc.analysis.defaults import Settings
from actdoc.analysis.stats import LayerStats
from actdoc.model import ActivationKind, LayerInfo, WeightSummary


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

    def share(self, counts: np.ndarray) -> np.ndarray:
        """counts / finite observations per unit (NaN for a unit with none)."""
        n = self.stats.moments.count
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, counts / np.where(n > 0, n, 1.0), np.nan)


@dataclass(frozen=True)
class UnitVerdict:
    """Which units a check names, each unit's measure, and the limit it was held against.

    ``phrase`` completes "N of M units ...". ``aggregate`` turns the named units' values into
    the finding's single measure ("mean", "max" or "sum").
    """

    mask: np.ndarray
    values: np.ndarray
    threshold: float
    phrase: str
    aggregate: str = "mean"


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


@dataclass(frozen=True)
class LayerVerdict:
    measure: float
    threshold: float
    summary: str


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
    #: Runs on layers without activations, from the weights alone (checks/static.py).
    static: bool = False

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
               static: bool = False):
    """Register ``fn(UnitInput) -> UnitVerdict | None`` (None: not measurable on this layer).
    A ``static`` check also runs on layers without activations (``UnitInput.stats`` None)."""
    def decorate(fn):
        _register(Check(name, "unit", fn, cause, remedy, rank,
                        None if kinds is None else frozenset(kinds), critical_by_share,
                        always_critical, advise, static))
        return fn
    return decorate


def layer_check(name: str, *, cause: str, remedy: str):
    """Register ``fn(LayerInput) -> LayerVerdict | None`` (None: nothing to report)."""
    def decorate(fn):
        _register(Check(name, "layer", fn, cause, remedy))
        return fn
    return decorate


def discover() -> None:
    """Import every module of this package so their decorators run."""
    for module in pkgutil.iter_modules(__path__):
        importlib.import_module(f"{__name__}.{module.name}")


def all_checks() -> list[Check]:
    """Every check: unit checks first (ranked ones in exclusivity order), then layer checks."""
    discover()
    big = 10 ** 6
    return sorted(REGISTRY.values(),
                  key=lambda c: (c.scope != "unit", big if c.rank is None else c.rank, c.name))
