"""Layers at the edges of what a probe batch can hold: one sample, values near the float limits.

Expected verdicts are the rules of docs/contract.md section 4 applied with numpy to the planted
arrays; the statistics are compared with numpy's own mean and standard deviation.
"""

from __future__ import annotations

import warnings

import numpy as np

from actdoc.analysis import analyze
from actdoc.io.memory import dump_from_arrays


def checks_by_unit(findings, layer):
    return {f.check: set(f.units) for f in findings.for_layer(layer)}


def test_one_observation_cannot_show_a_constant_output():
    """With one observation per unit a range is zero by construction, so `constant` would name
    every unit; variation needs at least two observations (common practice). `dead` still
    applies: docs/contract.md section 4, never active on any sample."""
    z = np.array([[1.5, -0.5, 2.0, 0.25]], np.float32)
    findings = analyze(dump_from_arrays({"fc": {"activation": "relu", "preact": z,
                                                "output": np.maximum(z, 0)}}), workers=1)
    named = checks_by_unit(findings, "fc")
    assert "constant" not in named
    assert named == {"dead": set(np.flatnonzero(np.maximum(z, 0)[0] <= 0))}
    assert findings.layer("fc").fractions["constant"] == 0.0


def test_two_equal_observations_are_a_constant_output():
    """The same unit seen twice with one value: the check applies as before."""
    z = np.array([[1.5, -0.5], [1.5, 0.75]], np.float32)
    findings = analyze(dump_from_arrays({"fc": {"activation": "relu", "preact": z}}), workers=1)
    spread = np.ptp(np.maximum(z, 0), axis=0)
    assert checks_by_unit(findings, "fc") == {"constant": set(np.flatnonzero(spread == 0))}


def test_one_sample_of_a_spatial_layer_has_many_observations():
    """Each spatial position is an observation (docs/contract.md section 1), so one sample of a
    convolution can still show a constant channel."""
    z = np.zeros((1, 2, 3, 3), np.float32)
    z[0, 1] = np.arange(9).reshape(3, 3)
    z[0, 0] = 4.0
    findings = analyze(dump_from_arrays({"conv": {"activation": "linear", "preact": z}}),
                       workers=1)
    assert checks_by_unit(findings, "conv") == {"constant": {0}}


def test_values_near_the_float32_limit_measure_without_warnings():
    """Finite float32 values whose sum overflows are still finite observations: no warning on
    stderr, and the mean and standard deviation equal numpy's in float64."""
    rng = np.random.default_rng(3)
    z = (rng.uniform(1e38, 3e38, size=(64, 3))).astype(np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        findings = analyze(dump_from_arrays({"big": {"activation": "linear", "preact": z}}),
                           workers=1)
    table = findings.layer("big").unit_table
    wide = z.astype(np.float64)
    np.testing.assert_allclose(table["mean"], wide.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(table["std"], wide.std(axis=0), rtol=1e-9)
    assert "non_finite" not in checks_by_unit(findings, "big")


def test_float64_values_whose_squares_overflow_still_explode():
    """Outputs near 1e200 square past the float64 range, so their RMS is infinite; the layer is
    far past `signal_limit` times the first layer's RMS (docs/contract.md section 4,
    exploding_signal), and the overflow warns nothing on stderr."""
    rng = np.random.default_rng(5)
    first = rng.normal(size=(200, 4))
    huge = rng.uniform(1e199, 1e200, size=(200, 4)) * rng.choice([-1.0, 1.0], size=(200, 4))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(over="ignore"):  # numpy's own RMS of `huge`, as the reference
            assert np.isinf(np.sqrt(np.mean(np.square(huge))))
        findings = analyze(dump_from_arrays({
            "first": {"activation": "linear", "preact": first},
            "huge": {"activation": "linear", "preact": huge}}), workers=1)
    assert [f.check for f in findings.for_layer("huge")] == ["exploding_signal"]
    np.testing.assert_allclose(findings.layer("huge").unit_table["max"], huge.max(axis=0))
