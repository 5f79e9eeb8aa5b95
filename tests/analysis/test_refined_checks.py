"""Saturation on both sides, layer-level saturation, advice that follows the data, and the
check registry's metadata.

Outputs come from reference formulas (scipy.special.expit, numpy tanh); the rules are those of
docs/checks.md. Each advice case is one the checks used to get wrong (they are listed in
docs/checks.md under Reasons).
"""

from __future__ import annotations

import inspect
import math

import numpy as np
import pytest
from scipy import special

from actdoc.analysis import analyze, engine, verdicts
from actdoc.analysis.checks import REGISTRY, UnitVerdict, unit_check
from actdoc.io.memory import dump_from_arrays
from actdoc.model import ActivationKind

LOGISTIC_EDGE = math.log(99.0)   # docs/contract.md section 4
TANH_EDGE = math.atanh(0.99)     # docs/contract.md section 4


def pinned(rng, rows: int, low: float, high: float, edge: float) -> np.ndarray:
    """Total inputs with the given shares beyond -2 edge and +2 edge, the rest near 0."""
    z = rng.normal(0.0, 0.3, rows)
    kind = rng.random(rows)
    z[kind < low] = -2 * edge - np.abs(rng.normal(0, 0.5, int(np.sum(kind < low))))
    upper = kind >= 1 - high
    z[upper] = 2 * edge + np.abs(rng.normal(0, 0.5, int(upper.sum())))
    return z


def test_saturation_split_across_sides_is_saturated_and_sides_are_reported():
    # issue 12: a logistic unit 94.5% at the low asymptote and 3.3% at the high one (97.8% in
    # all) was named by nothing; shares measured with numpy on the planted z
    rng = np.random.default_rng(0)
    rows = 4000
    z = np.stack([pinned(rng, rows, 0.945, 0.033, LOGISTIC_EDGE),    # split: saturated, both
                  pinned(rng, rows, 0.97, 0.0, LOGISTIC_EDGE),       # one side: saturated, low
                  pinned(rng, rows, 0.60, 0.38, LOGISTIC_EDGE),      # near-binary
                  pinned(rng, rows, 0.50, 0.0, LOGISTIC_EDGE)], 1)   # half: none
    findings = analyze(dump_from_arrays({"l": {"activation": "logistic", "preact": z,
                                               "output": special.expit(z)}}))
    named = {f.check: set(f.units) for f in findings.for_layer("l") if f.units}
    assert named == {"saturated": {0, 1}, "near_binary": {2}}
    table = findings.layer("l").unit_table
    np.testing.assert_allclose(table["low_fraction"], (z < -LOGISTIC_EDGE).mean(0), atol=1e-12)
    np.testing.assert_allclose(table["high_fraction"], (z > LOGISTIC_EDGE).mean(0), atol=1e-12)
    assert list(table["saturation_side"]) == ["both", "low", "", ""]
    (saturated,) = [f for f in findings.for_layer("l") if f.check == "saturated"]
    assert "1 at the low asymptote, 0 at the high one, 1 split across both sides" in \
        saturated.summary


def test_layer_saturation_from_the_pooled_share_and_the_gain():
    # issue 12: 92% of a tanh layer's observations saturated at a gradient gain of 0.028 was
    # only a warning; every unit sits under the 95% unit limit, so only the layer check sees it
    rng = np.random.default_rng(1)
    z = np.stack([pinned(rng, 3000, 0.46, 0.46, 3 * TANH_EDGE) for _ in range(16)], 1)
    y = np.tanh(z)
    findings = analyze(dump_from_arrays({"t": {"activation": "tanh", "preact": z, "output": y}}))
    assert not [f for f in findings.for_layer("t") if f.check in ("saturated", "near_binary")]
    (layer,) = [f for f in findings.for_layer("t") if f.check == "saturated_layer"]
    pooled = float((np.abs(z) > TANH_EDGE).mean())
    gain = float(np.mean(1 - y ** 2))  # tanh' = 1 - tanh^2, peak 1
    assert layer.measure == pytest.approx(pooled, abs=1e-12) and pooled > 0.9
    assert findings.layer("t").gradient_gain == pytest.approx(gain, rel=1e-6) and gain < 0.1
    assert layer.severity.value == "critical"
    # a layer half in the zone with a healthy gain: a warning only
    z2 = np.stack([pinned(rng, 3000, 0.3, 0.3, TANH_EDGE) for _ in range(16)], 1)
    half = analyze(dump_from_arrays({"t": {"activation": "tanh", "preact": z2}}))
    (layer,) = [f for f in half.for_layer("t") if f.check == "saturated_layer"]
    assert layer.severity.value == "warning"


def test_tanh_layers_are_not_told_to_switch_to_tanh():
    rng = np.random.default_rng(2)
    z = np.stack([pinned(rng, 2000, 0.99, 0.0, TANH_EDGE)] * 4, 1)
    for kind, reference in (("tanh", np.tanh), ("logistic", special.expit)):
        edge = TANH_EDGE if kind == "tanh" else LOGISTIC_EDGE
        zk = z * edge / TANH_EDGE
        findings = analyze(dump_from_arrays({"s": {"activation": kind, "preact": zk,
                                                   "output": reference(zk)}}))
        for finding in findings.for_layer("s"):
            if kind == "tanh":
                assert "to tanh" not in finding.remedy, finding.check
        if kind == "logistic":
            (sat,) = [f for f in findings.for_layer("s") if f.check == "saturated"]
            # logistic layers: a zero-centred kind is advice that fits, and the reference
            # initialisation is 4x Glorot (slope 1/4 at 0), not plain Glorot
            assert "tanh" in sat.remedy and "4 times the Glorot & Bengio 2010" in sat.remedy


def test_trained_weights_off_the_reference_are_information_unless_the_units_show_it():
    # healthy relu units with weights 6x He's scale: trained weights drift, so info
    rng = np.random.default_rng(3)
    fan_in, units, rows = 50, 20, 2000
    x = rng.normal(size=(rows, fan_in))
    w = rng.normal(0, 6 * math.sqrt(2 / fan_in), (units, fan_in))
    z = x @ w.T
    healthy = analyze(dump_from_arrays({"h": {"activation": "relu", "preact": z, "weight": w}}))
    (init,) = [f for f in healthy.for_layer("h") if f.check == "init_scale"]
    assert init.severity.value == "info" and init.measure == pytest.approx(6, rel=0.1)
    # the same weights with a bias that silences most units: the scale now has a witness
    dead = analyze(dump_from_arrays({"h": {"activation": "relu", "preact": z - 1e3,
                                           "weight": w}}))
    (init,) = [f for f in dead.for_layer("h") if f.check == "init_scale"]
    assert init.severity.value == "warning" and "dead" in init.summary


def test_vanishing_signal_blames_dead_units_not_small_weights():
    # issue 12: weights 7.8x too large and 94% of the units dead; the vanishing signal blamed
    # small weights. The cause must follow the data, and the findings point at each other.
    rng = np.random.default_rng(4)
    rows, fan_in, units = 3000, 32, 32
    h1 = np.maximum(rng.normal(size=(rows, fan_in)), 0)
    w2 = rng.normal(0, 7.8 * math.sqrt(2 / fan_in), (units, fan_in))
    bias = np.full(units, -1e4)
    bias[:2] = 0.0  # 30 of 32 units (94%) dead
    z2 = h1 @ w2.T + bias
    findings = analyze(dump_from_arrays({
        "first": {"activation": "relu", "preact": h1 * 300},  # the first layer's scale
        "second": {"activation": "relu", "preact": z2, "weight": w2, "bias": bias}}))
    by_check = {f.check: f for f in findings.for_layer("second")}
    assert {"dead", "init_scale", "vanishing_signal"} <= set(by_check)
    vanish = by_check["vanishing_signal"]
    assert "dead or dormant" in vanish.cause and "small weights are not the cause" in vanish.cause
    assert "forward output RMS only" in vanish.summary
    assert set(vanish.related) >= {"dead", "init_scale"}
    assert "vanishing_signal" in by_check["dead"].related
    assert by_check["init_scale"].severity.value == "warning"


def test_dead_units_are_not_declared_beyond_revival():
    z = np.full((500, 2), -5.0)
    z[:, 1] = np.linspace(-1, 1, 500)
    (dead,) = [f for f in analyze(dump_from_arrays({"r": {"activation": "relu", "preact": z}}))
               .findings if f.check == "dead"]
    assert "cannot revive" not in dead.cause and "deeper unit can come back" in dead.cause


def test_unit_states_hold_names_longer_than_sixteen_characters():
    # issue 13: states were <U16 strings, silently cutting a longer check name
    name = "a_check_name_longer_than_sixteen"

    @unit_check(name, rank=99, cause="test cause", remedy="test remedy",
                kinds={ActivationKind.LINEAR})
    def planted(unit):
        mask = np.zeros(unit.info.units, bool)
        mask[0] = True
        return UnitVerdict(mask=mask, values=np.zeros(unit.info.units), threshold=0.0,
                           phrase="are planted")

    try:
        z = np.random.default_rng(5).normal(size=(100, 3))
        findings = analyze(dump_from_arrays({"lin": {"activation": "linear", "preact": z}}))
        assert findings.layer("lin").unit_table["state"][0] == name
        assert [f.check for f in findings.for_layer("lin")] == [name]
    finally:
        del REGISTRY[name]


def test_the_engine_names_no_check():
    # issue 13: a new check needs no edit elsewhere; everything the engine needs is registered
    source = inspect.getsource(engine) + inspect.getsource(verdicts)
    for name in REGISTRY:
        assert f'"{name}"' not in source and f"'{name}'" not in source, name


def test_probe_report_and_related_findings_survive_the_archive(tmp_path):
    # the dashboard caches a whole Findings object (actdoc.reports.archive); the new fields
    # must come back as they were
    from actdoc.reports.archive import load_findings, save_findings

    rng = np.random.default_rng(6)
    x = rng.normal(0, 50, size=(300, 5))
    x[3, 2] = np.nan
    z = np.nan_to_num(x) @ rng.normal(size=(5, 4))
    z[:, 0] = -1e3
    found = analyze(dump_from_arrays({"r": {"activation": "relu", "preact": z}},
                                     probe_input=x))
    save_findings(found, tmp_path / "cache")
    back = load_findings(tmp_path / "cache")
    assert [(f.check, f.layer, f.related) for f in back.findings] == \
        [(f.check, f.layer, f.related) for f in found.findings]
    assert back.probe.nonfinite_rows == 1 and back.probe.samples == 300
    np.testing.assert_array_equal(back.probe.feature_std, found.probe.feature_std)
    assert {f.check for f in found.findings if f.layer == "probe/input"} == \
        {"probe_size", "probe_scale", "probe_nonfinite"}
