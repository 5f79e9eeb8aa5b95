"""Planted pathologies over every kind, dtype, layout and array set: precision and recall 1.0.

Ground truth comes from the planted roles (see tests/support/planting.py); the decision edges they
are planted around are the defaults of docs/contract.md section 4 (ln 99, atanh 0.99, 1%, 95%).
"""

import numpy as np
import pytest

from actdoc.analysis import analyze
from actdoc.io.memory import dump_from_arrays
from actdoc.model import ActivationKind as K
from actdoc.model import LayerStatus, Severity
from tests.support.planting import ROLES, plant

EXCLUSIVE = ("dead", "dormant", "saturated", "near_binary", "linear_regime", "constant")
UNIT_CHECKS = EXCLUSIVE + ("non_finite",)
DTYPES = {"float16": np.float16, "float32": np.float32, "float64": np.float64}
ARRAY_SETS = {"both": ("preact", "output"), "preact": ("preact",), "output": ("output",)}


def unit_findings(findings, layer):
    return {f.check: set(f.units) for f in findings.for_layer(layer) if f.check in UNIT_CHECKS}


@pytest.mark.parametrize("arrays", list(ARRAY_SETS))
@pytest.mark.parametrize("dtype", list(DTYPES))
@pytest.mark.parametrize("spatial", [(), (2, 5)], ids=["dense", "spatial"])
def test_every_kind_finds_exactly_the_planted_units(arrays, dtype, spatial):
    layers, truths = {}, {}
    for i, kind in enumerate(ROLES):
        spec, truth = plant(kind, DTYPES[dtype], spatial, ARRAY_SETS[arrays], seed=i)
        layers[kind.value], truths[kind.value] = spec, truth
    findings = analyze(dump_from_arrays(layers))
    for name, truth in truths.items():
        assert unit_findings(findings, name) == truth, name
        report = findings.layer(name)
        states = report.unit_table["state"]
        for check, units in truth.items():
            assert all(states[u] == check for u in units), (name, check)
        assert sum(bool(s) for s in states) == sum(len(u) for u in truth.values())


def test_exclusivity_takes_the_first_check_in_order():
    # a dead relu unit's output is also constant (all zeros): it must be named dead only;
    # a logistic unit pinned at z = -10 is saturated and constant in float16: saturated only
    rng = np.random.default_rng(1)
    z, logistic_z = rng.normal(size=(500, 3)), rng.normal(size=(500, 3))
    z[:, 0] = -5.0
    logistic_z[:, 1] = -10.0
    findings = analyze(dump_from_arrays({
        "r": {"activation": "relu", "preact": z},
        "s": {"activation": "logistic", "preact": logistic_z.astype(np.float16)},
    }))
    assert unit_findings(findings, "r") == {"dead": {0}}
    assert unit_findings(findings, "s") == {"saturated": {1}}
    for report in findings.layers:
        for check in EXCLUSIVE:
            named = [set(f.units) for f in findings.for_layer(report.name) if f.check == check]
            others = [set(f.units) for f in findings.for_layer(report.name)
                      if f.check in EXCLUSIVE and f.check != check]
            for a in named:
                assert all(not (a & b) for b in others)


def test_non_finite_values_are_counted_and_kept_out():
    rng = np.random.default_rng(2)
    z = rng.normal(size=(1000, 4))
    z[10, 1], z[20, 2] = np.nan, np.inf
    w = rng.normal(size=(4, 8)) * 0.5
    w[3, 0] = np.nan
    findings = analyze(dump_from_arrays({"t": {"activation": "tanh", "preact": z,
                                               "output": np.tanh(z), "weight": w}}))
    nf = [f for f in findings.findings if f.check == "non_finite"]
    assert len(nf) == 1 and nf[0].units == (1, 2, 3) and nf[0].severity is Severity.CRITICAL
    table = findings.layer("t").unit_table
    assert table["nonfinite"].tolist() == [0, 1, 1, 0]
    # the other statistics ignore the bad observation (numpy nan-aware reference)
    clean = np.where(np.isfinite(z), np.tanh(z), np.nan)
    np.testing.assert_allclose(table["mean"], np.nanmean(clean, axis=0), rtol=1e-12)
    np.testing.assert_allclose(table["std"], np.nanstd(clean, axis=0), rtol=1e-9)
    assert findings.layer("t").status is LayerStatus.CRITICAL


def test_severity_follows_the_share_of_units():
    # 1 of 20 dead: info; 3 of 20: warning; 10 of 20: critical (defaults 0.1 and 0.5)
    rng = np.random.default_rng(3)
    for dead, severity, status in ((1, "info", "healthy"), (3, "warning", "warning"),
                                   (10, "critical", "critical")):
        z = rng.normal(size=(400, 20))
        z[:, :dead] = -3 - np.abs(z[:, :dead])
        findings = analyze(dump_from_arrays({"r": {"activation": "relu", "preact": z}}))
        (finding,) = findings.for_layer("r")  # the probe's own size finding names no layer
        assert finding.check == "dead" and finding.severity.value == severity
        assert findings.layer("r").status.value == status
        assert findings.layer("r").fractions["dead"] == pytest.approx(dead / 20)


def test_findings_carry_text_and_measures():
    spec, truth = plant(K.LOGISTIC)
    findings = analyze(dump_from_arrays({"l": spec}), progress=None)
    for f in findings.findings:
        assert f.summary.startswith("Layer 'l': ") and f.cause and f.remedy
        assert list(f.units) == sorted(f.units) and len(f.unit_measures) == len(f.units)
    sat = next(f for f in findings.findings if f.check == "saturated")
    assert sat.threshold == 0.95 and sat.measure >= 0.95
    sides = findings.layer("l").unit_table["saturation_side"]
    assert sides[0] == "low" and sides[5] == "high"


def test_progress_runs_from_zero_to_one():
    spec, _ = plant(K.RELU, observations=20000)
    seen = []
    analyze(dump_from_arrays({"a": spec, "b": spec}), progress=seen.append)
    assert seen[0] == 0.0 and seen[-1] == 1.0 and seen == sorted(seen) and len(seen) > 4
