"""Units that do not fire: dead (never active) and dormant (active on a tiny share).

A rectified unit whose total input is negative on every observation passes no gradient to its
incoming weights on those inputs (He et al. 2015 discuss the role of the initial scale; Maas et
al. 2013 introduced the leaky variant to keep a gradient flowing). A first-layer unit sees fixed
data and stays dead; a deeper one can come back when the layers below change what it sees.

Spatial layers: a channel is one unit observed at every position, and a sparse detector fires
on few positions of many samples. It is dormant only when it also fires (anywhere) on fewer
than ``dormant_active_share`` of the samples.
"""

from __future__ import annotations

import numpy as np

from actdoc.analysis.checks import UnitInput, UnitVerdict, unit_check
from actdoc.analysis.summary import sample_firing
from actdoc.model import RECTIFIED_KINDS, SILENCEABLE_KINDS, ActivationKind

Kind = ActivationKind

RECTIFIED_CAUSE = (
    "the unit's total input is negative for every probe sample, so its incoming weights get no "
    "gradient from them: a large negative bias drift, a too high learning rate that pushed the "
    "weights into a region where z < 0 everywhere, an initialisation scale far from He's, or "
    "unstandardised inputs. A first-layer unit sees fixed inputs and stays dead; a deeper unit "
    "can come back as the layers below it change, but it often does not")
RECTIFIED_REMEDY = (
    "lower the learning rate; initialise with He et al. 2015 (std sqrt(2/fan_in)); standardise "
    "the inputs; add a normalisation layer before the activation (Ioffe & Szegedy 2015); or use "
    "a leaky variant (Maas et al. 2013) so a silent unit still gets a gradient")


def _binary_advice(kind: Kind) -> tuple[str, str] | None:
    if kind is Kind.THRESHOLD:
        return ("the unit's total input never exceeds its threshold: the bias (minus the "
                "threshold) or the incoming weights are too small for the inputs it sees",
                "lower the threshold (raise the bias) or rescale the inputs; threshold units get "
                "no gradient, so re-initialise the unit or train it with a smooth surrogate "
                "such as the logistic")
    if kind is Kind.STOCHASTIC_BINARY:
        return ("the unit's firing probability is near zero for every sample: a strongly "
                "negative bias or weights that shrank under weight decay",
                "re-initialise the unit with small random weights and a bias near zero, "
                "lower the learning rate, and check the weight decay strength")
    return None


def _active_share(unit: UnitInput) -> np.ndarray | None:
    active = unit.stats.active
    return None if active is None else unit.share(active)


@unit_check("dead", rank=0, kinds=SILENCEABLE_KINDS, critical_by_share=True,
            cause=RECTIFIED_CAUSE, remedy=RECTIFIED_REMEDY, advise=_binary_advice)
def dead(unit: UnitInput) -> UnitVerdict | None:
    share = _active_share(unit)
    if share is None:
        return None
    n = unit.stats.moments.count
    return UnitVerdict(
        mask=(n > 0) & (unit.stats.active == 0), values=share, threshold=0.0,
        phrase=f"are never active on any of the {unit.info.observations} observations")


@unit_check("dormant", rank=1, kinds=RECTIFIED_KINDS,
            cause="the unit is active on only a handful of samples: its input is negative "
                  "almost everywhere, the usual step before the unit dies (bias drift, a high "
                  "learning rate, weight growth)",
            remedy=RECTIFIED_REMEDY)
def dormant(unit: UnitInput) -> UnitVerdict | None:
    share = _active_share(unit)
    if share is None:
        return None
    limit = unit.settings.dormant_active_share
    mask = (unit.stats.active > 0) & (share < limit)
    phrase = f"are active on fewer than {limit:.1%} of observations"
    samples = sample_firing(unit.stats)
    if samples is not None:
        mask &= samples < limit
        phrase = (f"are active on fewer than {limit:.1%} of observations and fire anywhere "
                  f"on fewer than {limit:.1%} of samples")
    return UnitVerdict(mask=mask, values=share, threshold=limit, phrase=phrase)
