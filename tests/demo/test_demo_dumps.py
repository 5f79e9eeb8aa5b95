"""The committed demo dumps: each develops its pathology (as actdoc's own analysis finds it),
the baseline stays healthy, and ``write_all`` regenerates exactly what is committed.

The pass marks come from the findings thresholds of docs/contract.md section 4 and
actdoc/analysis/defaults.py (10% of a layer for a warning, 50% for critical: common practice).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from actdoc.analysis import analyze
from actdoc.io import dump_from_arrays, open_dump
from actdoc.model import PROBE_LAYER, Severity
from demo_models import DEMOS, DUMPS_DIR, bundled_dumps
from demo_models.generate import DATA_SEED, PROBE_ROWS, TRAIN_ROWS, tanh_raw_inputs, write_all
from demo_models.scenario import make_split


@pytest.fixture(scope="module")
def findings():
    """Analysis of every committed dump, keyed by file stem."""
    results = {}
    for path in bundled_dumps():
        with open_dump(path) as dump:
            results[path.stem] = analyze(dump)
    return results


def share(found, layer: str, check: str) -> float:
    return found.layer(layer).fractions.get(check, 0.0)


def dead_units(found) -> int:
    return sum(len(f.units) for f in found.findings if f.check == "dead")


def test_demo_table_names_exactly_the_committed_files():
    listed = sorted(name for demo in DEMOS for name in demo.files)
    assert listed == [path.name for path in bundled_dumps()]
    assert all(path.parent == DUMPS_DIR for path in bundled_dumps())
    assert len({demo.name for demo in DEMOS}) == len(DEMOS)
    # "a few MB in total": the shipped dumps stay small.
    assert sum(path.stat().st_size for path in bundled_dumps()) < 8 * 2**20


def test_healthy_baseline_has_no_warning_and_almost_no_dead_units(findings):
    found = findings["healthy_baseline"]
    # every demo is recorded on 512 probe rows, fewer than the 1000 docs/checks.md asks for
    # (n p >= 10 at the 1% dormant limit): the probe's own size finding is the only warning
    assert all(f.severity == Severity.INFO for f in found.findings if f.layer != PROBE_LAYER)
    assert [(f.check, f.severity) for f in found.findings if f.layer == PROBE_LAYER] == \
        [("probe_size", Severity.WARNING)]
    for report in found.layers:
        assert report.fractions.get("dead", 0.0) < 0.05
        assert str(report.status) == "healthy"


def test_high_rate_kills_at_least_a_third_of_a_layer(findings):
    found = findings["relu_high_rate"]
    assert max(share(found, r.name, "dead") for r in found.layers) >= 0.3
    assert found.worst() == Severity.CRITICAL
    # The baseline, trained identically but at the usual rate, kept every unit.
    assert dead_units(findings["healthy_baseline"]) == 0


def test_checkpoint_series_loses_units_step_by_step(findings):
    series = [findings[f"relu_dying_step{i}"] for i in range(1, 6)]
    counts = [dead_units(found) for found in series]
    assert counts == sorted(counts) and counts[0] < counts[-1]
    assert len(set(counts)) == len(counts)  # strictly rising: every checkpoint loses units
    assert share(series[0], "hidden2", "dead") < 0.05
    assert share(series[-1], "hidden2", "dead") >= 0.3


def test_deep_logistic_saturates_its_top_hidden_layer_only(findings):
    found = findings["logistic_deep_old_init"]
    assert share(found, "hidden4", "saturated") >= 0.9
    top_means = found.layer("hidden4").unit_table["mean"]
    assert np.all(top_means < 0.01)  # pinned at 0, as in Glorot & Bengio 2010, Figure 2
    # the top layer's weights are small (0.16x the logistic's reference): the cause named is
    # the bias, as Glorot & Bengio 2010 describe, and larger weights are not the advice
    (sat,) = [f for f in found.for_layer("hidden4") if f.check == "saturated"]
    assert "weights are not large" in sat.cause and "larger weights will not help" in sat.remedy
    (vanish,) = [f for f in found.for_layer("hidden4") if f.check == "vanishing_signal"]
    assert "saturated" in vanish.cause and "saturated" in vanish.related
    for name in ("hidden1", "hidden2", "hidden3"):
        assert share(found, name, "saturated") == 0.0
        assert float(np.mean(found.layer(name).unit_table["mean"])) > 0.4


def test_grown_logistic_weights_make_near_binary_units(findings):
    found = findings["logistic_near_binary"]
    assert share(found, "hidden1", "near_binary") >= 0.2
    assert share(found, "hidden1", "near_binary") + share(found, "hidden1", "saturated") >= 0.75
    # The weights grew far past the Glorot reference scale of the layer.
    init = [f for f in found.findings if f.check == "init_scale" and f.layer == "hidden1"]
    assert init and init[0].measure > 10


def test_raw_inputs_saturate_tanh_units_where_standardised_inputs_do_not(findings):
    found = findings["tanh_raw_inputs"]
    assert share(found, "hidden1", "saturated") >= 0.5
    # the layer as a whole: nearly every total input past the edge, the gain near zero
    # (docs/checks.md: critical when both limits are passed)
    (layer,) = [f for f in found.for_layer("hidden1") if f.check == "saturated_layer"]
    assert layer.severity == Severity.CRITICAL and layer.measure > 0.9
    # the probe input shows why: pressure in pascals, sunlight in lux (feature std up to 3e4)
    (scale,) = [f for f in found.findings if f.check == "probe_scale"]
    assert scale.severity == Severity.WARNING and found.probe.feature_std.max() > 1e4
    sat = [f for f in found.for_layer("hidden1") if f.check == "saturated"][0]
    assert "not standardised" in sat.cause
    # every other demo standardises its inputs: no probe_scale finding there
    for name, other in findings.items():
        if name != "tanh_raw_inputs":
            assert not [f for f in other.findings if f.check == "probe_scale"], name
    # Control: the same recipe on standardised inputs leaves the first layer usable.
    standardised = make_split(TRAIN_ROWS, PROBE_ROWS, DATA_SEED, standardise=True)
    control = tanh_raw_inputs(standardised)[0]
    checked = analyze(dump_from_arrays(control.layers, name="tanh_standardised"))
    assert share(checked, "hidden1", "saturated") < 0.1


#: Demos trained at a learning rate where training is chaotic: a numpy release that rounds exp or
#: tanh differently in the last bit sends the weights elsewhere (measured 2026-12-03: numpy 2.4.6
#: against the numpy the dumps were first written with moved every weight of these two, while the
#: other eight stayed bit-identical). For these the regenerated dump must show the same pathology,
#: each layer's check shares within 0.1 of the committed dump's (the drift seen was 0.03).
CHAOTIC_DEMOS = {"logistic_near_binary.h5", "tanh_raw_inputs.h5"}


def same_arrays(fresh_path, committed_path) -> None:
    with h5py.File(fresh_path) as fresh, h5py.File(committed_path) as committed:
        assert list(fresh["layers"]) == list(committed["layers"])
        for layer in committed["layers"]:
            group, other = committed["layers"][layer], fresh["layers"][layer]
            assert dict(group.attrs) == dict(other.attrs)
            assert sorted(group) == sorted(other)
            for array in group:
                # Equal to float32 rounding; a larger gap means the recipes changed and
                # the committed dumps must be regenerated with write_all.
                np.testing.assert_allclose(
                    other[array][...], group[array][...], rtol=1e-5, atol=1e-6,
                    err_msg=f"{committed_path.name}: {layer}/{array} differs")
        np.testing.assert_allclose(fresh["probe/input"][...], committed["probe/input"][...],
                                   rtol=1e-6)


def same_pathology(fresh_path, committed_path) -> None:
    fresh, committed = analyze(open_dump(fresh_path)), analyze(open_dump(committed_path))
    assert [layer.name for layer in fresh.layers] == [layer.name for layer in committed.layers]
    for now, then in zip(fresh.layers, committed.layers):
        for check in set(now.fractions) | set(then.fractions):
            gap = abs(now.fractions.get(check, 0.0) - then.fractions.get(check, 0.0))
            assert gap <= 0.1, f"{committed_path.name}: {now.name} {check} moved by {gap:.2f}"


def test_write_all_regenerates_the_committed_dumps(tmp_path):
    written = write_all(tmp_path)
    assert [p.name for p in written] == [p.name for p in bundled_dumps()]
    for fresh_path, committed_path in zip(written, bundled_dumps()):
        if committed_path.name in CHAOTIC_DEMOS:
            same_pathology(fresh_path, committed_path)
        else:
            same_arrays(fresh_path, committed_path)
