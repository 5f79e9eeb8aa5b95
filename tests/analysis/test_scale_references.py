"""Layer-level scale checks against published initialisation results."""

import math

import numpy as np
import pytest

from actdoc.analysis import analyze
from actdoc.analysis.summary import reference_std, weight_summary
from actdoc.io.memory import dump_from_arrays
from actdoc.model import ActivationKind as K


def relu_stack(weight_variance_times_fan_in, depth=10, width=256, samples=2048, seed=0):
    rng = np.random.default_rng(seed)
    h = rng.standard_normal((samples, width))
    layers = {}
    for i in range(depth):
        w = rng.normal(0, math.sqrt(weight_variance_times_fan_in / width), (width, width))
        z = h @ w.T
        h = np.maximum(z, 0)
        layers[f"fc{i}"] = {"activation": "relu", "preact": z.astype(np.float32),
                            "output": h.astype(np.float32), "weight": w}
    return dump_from_arrays(layers)


def test_he_relu_stack_at_one_over_fan_in_halves_the_second_moment_and_vanishes():
    # He et al. 2015 (ICCV), eq. 9-10: with Var(w) = 1/fan_in each ReLU layer halves E[y^2]
    findings = analyze(relu_stack(1.0))
    scales = np.array([r.output_scale for r in findings.layers]) ** 2
    # per layer the factor scatters with the finite width; its geometric mean is the result
    assert (scales[-1] / scales[0]) ** (1 / 9) == pytest.approx(0.5, rel=0.06)
    np.testing.assert_allclose(scales[1:] / scales[:-1], 0.5, rtol=0.25)
    vanishing = {f.layer for f in findings.findings if f.check == "vanishing_signal"}
    # RMS ratio 2^(-l/2): below 1/10 from layer 7 on
    assert {"fc8", "fc9"} <= vanishing and vanishing <= {"fc7", "fc8", "fc9"}
    f9 = next(f for f in findings.findings if f.check == "vanishing_signal" and f.layer == "fc9")
    assert f9.measure == pytest.approx(math.sqrt(scales[-1] / scales[0]), rel=1e-9)
    assert f9.measure == pytest.approx(2 ** -4.5, rel=0.25) and f9.threshold == 0.1
    assert f9.units == () and f9.severity.value == "warning"


def test_he_relu_stack_at_two_over_fan_in_keeps_its_scale():
    # He et al. 2015 (ICCV), eq. 10: Var(w) = 2/fan_in keeps the second moment
    findings = analyze(relu_stack(2.0))
    scales = np.array([r.output_scale for r in findings.layers]) ** 2
    assert (scales[-1] / scales[0]) ** (1 / 9) == pytest.approx(1.0, rel=0.06)
    checks = {f.check for f in findings.findings}
    assert not checks & {"vanishing_signal", "exploding_signal", "init_scale"}
    for report in findings.layers:
        # half the inputs pass a ReLU: mean f' / max f' is about 1/2
        assert report.gradient_gain == pytest.approx(0.5, abs=0.05)
        assert report.weights.reference == "He et al. 2015"


def test_exploding_signal_on_a_stack_at_four_over_fan_in():
    # 4/fan_in doubles E[y^2] per layer (He et al. 2015, eq. 9): RMS grows sqrt 2 per layer
    findings = analyze(relu_stack(4.0, depth=9))
    exploding = {f.layer for f in findings.findings if f.check == "exploding_signal"}
    assert {"fc7", "fc8"} <= exploding and "fc5" not in exploding


def test_glorot_uniform_variance_and_reference():
    # Glorot & Bengio 2010 (AISTATS), eq. 1 and the text after it: U[-1/sqrt(n), 1/sqrt(n)]
    # gives n Var(w) = 1/3; eq. 16: the normalised scale has Var = 2 / (n_in + n_out)
    n = 512
    rng = np.random.default_rng(3)
    w = rng.uniform(-1 / math.sqrt(n), 1 / math.sqrt(n), (n, n))
    layer = dump_from_arrays({"t": {"activation": "tanh", "weight": w}}).layers[0]
    summary, bad = weight_summary(layer)
    assert n * summary.std ** 2 == pytest.approx(1 / 3, rel=0.01)
    assert summary.reference_std == pytest.approx(math.sqrt(2 / (n + n)))
    assert summary.std / summary.reference_std == pytest.approx(1 / math.sqrt(3), rel=0.01)
    assert bad.sum() == 0
    normalised = rng.uniform(-math.sqrt(6 / (2 * n)), math.sqrt(6 / (2 * n)), (n, n))
    ref, name = reference_std(K.TANH, n, n)
    assert normalised.std() == pytest.approx(ref, rel=0.01) and name == "Glorot & Bengio 2010"


def test_he_reference_for_leaky_units():
    # He et al. 2015, eq. 15: std = sqrt(2 / ((1 + a^2) fan_in))
    assert reference_std(K.LEAKY_RELU, 100, 50, 0.2)[0] == pytest.approx(
        math.sqrt(2 / (1.04 * 100)))
    assert reference_std(K.RELU, 100, 50)[0] == pytest.approx(math.sqrt(2 / 100))


def test_init_scale_flags_weights_far_from_the_reference():
    rng = np.random.default_rng(4)
    ref = math.sqrt(2 / 64)
    layers = {name: {"activation": "relu", "weight": rng.normal(0, ref * scale, (32, 64))}
              for name, scale in (("small", 0.1), ("fine", 1.3), ("large", 10.0))}
    findings = analyze(dump_from_arrays(layers))
    flagged = {f.layer: f for f in findings.findings if f.check == "init_scale"}
    assert set(flagged) == {"small", "large"}
    assert flagged["small"].measure == pytest.approx(0.1, rel=0.1)
    assert flagged["small"].threshold == 0.25 and flagged["large"].threshold == 4.0
