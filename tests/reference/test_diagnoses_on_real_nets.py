"""Diagnoses on networks built with scikit-learn and PyTorch: where NaN starts, the probe batch,
spatial channels, the logistic's reference scale, and what depth does to a ReLU stack.

Data: scikit-learn's bundled handwritten digits (sklearn.datasets.load_digits, 1797 8x8
images, no download); a 30% held-out split has 540 rows. Networks: sklearn's MLPClassifier
(forward pass from its ``coefs_`` and ``intercepts_``) and PyTorch 2.13 CPU modules with
torch.nn.init. Every expected number is computed with numpy from those libraries' tensors.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier
from sklearn.preprocessing import StandardScaler

torch = pytest.importorskip("torch")
from torch import nn  # noqa: E402

from actdoc.analysis import analyze  # noqa: E402
from actdoc.io.memory import dump_from_arrays  # noqa: E402
from actdoc.model import PROBE_LAYER  # noqa: E402

DORMANT_SHARE = 0.01             # docs/contract.md section 4
INPUT_SCALE_LIMIT = 4.0          # docs/checks.md default (input_scale_limit)
PROBE_SAMPLES_NEEDED = 1000      # docs/checks.md: probe_expected_firings 10 / 1% dormant limit


@pytest.fixture(scope="module")
def split():
    x, y = load_digits(return_X_y=True)
    return train_test_split(x, y, test_size=0.3, random_state=0, stratify=y)


@pytest.fixture(scope="module")
def mlp(split):
    x_train, _, y_train, _ = split
    clf = MLPClassifier(hidden_layer_sizes=(24,), max_iter=40, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        clf.fit(x_train / 16.0, y_train)
    return clf


def mlp_layers(clf, x):
    """sklearn's forward pass: X @ coefs_[i] + intercepts_[i] (coefs_ is [fan_in, units])."""
    z = x @ clf.coefs_[0] + clf.intercepts_[0]
    h = np.maximum(z, 0.0)
    logits = h @ clf.coefs_[1] + clf.intercepts_[1]
    return {"hidden": {"activation": "relu", "preact": z, "output": h,
                       "weight": clf.coefs_[0].T.copy(), "bias": clf.intercepts_[0]},
            "logits": {"activation": "linear", "preact": logits,
                       "weight": clf.coefs_[1].T.copy(), "bias": clf.intercepts_[1]}}


def test_one_nan_pixel_is_a_probe_problem_not_a_diverged_model(split, mlp):
    # issue 12: one NaN pixel in one of 540 rows turned every unit critical, cause "diverged
    # training". numpy propagates the NaN through sklearn's parameters to every unit of both
    # layers on that row only.
    x_test = split[1] / 16.0
    assert x_test.shape[0] == 540
    x_test = x_test.copy()
    x_test[17, 30] = np.nan
    layers = mlp_layers(mlp, x_test)
    assert np.isnan(layers["hidden"]["preact"][17]).all()
    findings = analyze(dump_from_arrays(layers, probe_input=x_test))
    nan = {f.layer: f for f in findings.findings if f.check == "non_finite"}
    assert nan["hidden"].severity.value == "warning"
    assert "layer 'hidden' is the first" in nan["hidden"].cause
    assert "1 of 540 probe samples" in nan["hidden"].cause
    assert "1 rows of the probe input" in nan["hidden"].cause
    assert "diverged" not in nan["hidden"].cause
    assert nan["logits"].severity.value == "info" and nan["logits"].cause.startswith("propagated")
    assert not [f for f in findings.findings if f.severity.value == "critical"]
    (rows,) = [f for f in findings.findings if f.check == "probe_nonfinite"]
    assert rows.layer == PROBE_LAYER and rows.measure == 1


def test_nan_weights_are_critical_where_they_start_and_propagated_above(split, mlp):
    x_test = split[1] / 16.0
    layers = mlp_layers(mlp, x_test)
    layers["hidden"]["weight"] = layers["hidden"]["weight"].copy()
    layers["hidden"]["weight"][3, 0] = np.nan
    findings = analyze(dump_from_arrays(layers))
    nan = {f.layer: f for f in findings.findings if f.check == "non_finite"}
    assert nan["hidden"].severity.value == "critical" and "its parameters" in nan["hidden"].cause
    # the recorded activations were computed before the weight was corrupted: only the
    # parameters hold NaN, so the output layer holds none and is not named
    assert "logits" not in nan


@pytest.mark.parametrize("transform, expected", [
    ("raw", "warning"),           # pixel intensities 0..16: feature RMS up to about 13
    ("scaled", "info"),           # divided by 16: some rarely-inked pixels have RMS under 1/4
    ("standardised", None),       # sklearn's StandardScaler fitted on these rows: RMS 1
])
def test_probe_scale_follows_numpy_feature_statistics(split, transform, expected):
    x_train, x_test = split[0], split[1]
    x = {"raw": x_test, "scaled": x_test / 16.0,
         "standardised": StandardScaler().fit_transform(x_test)}[transform]
    z = x @ np.random.default_rng(0).normal(0, 0.1, (64, 8))
    findings = analyze(dump_from_arrays({"h": {"activation": "tanh", "preact": z}},
                                        probe_input=x))
    varies = x.std(axis=0) > 0
    rms = np.sqrt(x.mean(axis=0) ** 2 + x.var(axis=0))[varies]
    found = [f for f in findings.findings if f.check == "probe_scale"]
    if expected is None:
        assert not found
        assert rms.max() < INPUT_SCALE_LIMIT and rms.min() > 1 / INPUT_SCALE_LIMIT
        return
    (finding,) = found
    assert finding.severity.value == expected
    assert finding.measure == pytest.approx(rms.max(), rel=1e-9)
    assert findings.probe.feature_std == pytest.approx(x.std(axis=0), rel=1e-9, abs=1e-12)


def test_probe_size_asks_for_a_thousand_samples(split):
    x = split[1]
    for rows, flagged in ((540, True), (1200, False)):
        z = np.resize(x, (rows, 64)) @ np.random.default_rng(1).normal(0, 0.1, (64, 4))
        findings = analyze(dump_from_arrays({"h": {"activation": "tanh", "preact": z}}))
        found = [f for f in findings.findings if f.check == "probe_size"]
        assert bool(found) == flagged
        if flagged:
            assert found[0].threshold == PROBE_SAMPLES_NEEDED and found[0].measure == rows
            assert f"at least {PROBE_SAMPLES_NEEDED}" in found[0].summary


def test_a_sparse_spatial_detector_is_not_dormant(split):
    # issue 12: a channel active on 0.53% of positions but 24% of samples was called dormant.
    # torch.nn.Conv2d on the raw digits: channel 0 fires where a pixel is fully inked (16),
    # channel 1 only where a 3x3 neighbourhood is inked beyond what 0.3% of images reach.
    images = torch.tensor(np.concatenate(split[:2]), dtype=torch.float32).reshape(-1, 1, 8, 8)
    with torch.no_grad():
        sums = nn.functional.conv2d(images, torch.ones(1, 1, 3, 3), padding=1)
        rare = float(torch.quantile(sums.amax(dim=(1, 2, 3)), 0.997))
        conv = nn.Conv2d(1, 3, 3, padding=1)
        conv.weight.zero_()
        conv.weight[0, 0, 1, 1] = 1.0
        conv.weight[1] = 1.0
        conv.weight[2, 0, 1, 1] = 1.0
        conv.bias.copy_(torch.tensor([-15.5, -rare, 1.0]))
        z = conv(images)
    y = torch.relu(z).numpy()
    findings = analyze(dump_from_arrays({"conv": {"activation": "relu", "preact": z.numpy(),
                                                  "output": y}}))
    table = findings.layer("conv").unit_table
    positions = (y > 0).mean(axis=(0, 2, 3))
    samples = (y > 0).any(axis=(2, 3)).mean(axis=0)
    np.testing.assert_allclose(table["active_fraction"], positions, atol=1e-12)
    np.testing.assert_allclose(table["sample_active_fraction"], samples, atol=1e-12)
    # channel 0: few positions, many samples; channel 1: under 1% of samples
    assert positions[0] < 0.1 and samples[0] > 0.2
    assert 0 < samples[1] < DORMANT_SHARE
    dormant = {u for f in findings.findings if f.check == "dormant" for u in f.units}
    assert dormant == {1}


def test_logistic_layers_are_held_against_four_times_glorot():
    # Glorot & Bengio 2010 derive their scale for a slope of 1 at 0; the logistic's is 1/4 and
    # 4x the Glorot range is the standard choice for it. torch.nn.init.xavier_uniform_ with
    # gain 4 draws exactly that; gain 1 (plain Glorot) is a quarter of it.
    torch.manual_seed(0)
    x = np.random.default_rng(2).normal(size=(1200, 64))
    for gain, flagged in ((4.0, False), (1.0 / 3.0, True)):
        linear = nn.Linear(64, 64)
        nn.init.xavier_uniform_(linear.weight, gain=gain)
        w = linear.weight.detach().numpy().astype(np.float64)
        z = x @ w.T
        findings = analyze(dump_from_arrays({
            "l": {"activation": "logistic", "preact": z, "weight": w}}))
        init = [f for f in findings.findings if f.check == "init_scale"]
        glorot = math.sqrt(2.0 / (64 + 64))
        assert findings.layer("l").weights.reference_std == pytest.approx(4 * glorot)
        assert bool(init) == flagged
        if flagged:
            assert init[0].measure == pytest.approx(w.std() / (4 * glorot), rel=1e-9)
            assert "4 times" in init[0].remedy


def relu_stack(depth: int, init, bias: float, width: int = 64):
    """A plain ReLU stack on random inputs (torch), recorded layer by layer."""
    torch.manual_seed(0)
    h = torch.randn(1200, width)
    layers = {}
    with torch.no_grad():
        for i in range(depth):
            linear = nn.Linear(width, width)
            init(linear.weight)
            nn.init.constant_(linear.bias, bias)
            z = linear(h)
            h = torch.relu(z)
            layers[f"fc{i + 1}"] = {"activation": "relu", "preact": z.numpy(),
                                    "weight": linear.weight.numpy(), "bias": linear.bias.numpy()}
    return layers


def test_he_scale_depth_is_blamed_on_depth_and_1_over_n_on_the_weights():
    # He et al. 2015 (ICCV) eq. 10: Var(w) = 1/n halves the second moment per ReLU layer, so
    # the weights explain a vanishing signal; at Var(w) = 2/n they do not, and when a plain
    # stack's signal still fades (here a bias of -0.1 per layer, as biases drift in training)
    # depth is the cause: residual connections or normalisation, not "use He init"
    he = relu_stack(20, lambda w: nn.init.kaiming_normal_(w, nonlinearity="relu"), -0.1)
    findings = analyze(dump_from_arrays(he))
    vanish = [f for f in findings.findings if f.check == "vanishing_signal"]
    depth = [f for f in vanish if "the initialisation is not the cause" in f.cause]
    assert depth
    for finding in depth:
        assert "residual connections" in finding.remedy and "will not help" in finding.remedy
    # deeper still, half the units have died: they are named as the cause (with the weights
    # cleared of blame); no vanishing finding on this stack advises He initialisation
    for finding in vanish:
        assert finding in depth or "small weights are not the cause" in finding.cause
        assert "initialise with He" not in finding.remedy
    small = relu_stack(20, lambda w: nn.init.normal_(w, 0.0, math.sqrt(1.0 / 64)), 0.0)
    findings = analyze(dump_from_arrays(small))
    vanish = [f for f in findings.findings if f.check == "vanishing_signal"]
    assert vanish
    for finding in vanish:
        assert "below the He et al. 2015 scale" in finding.cause
        # the product of (std / He std) over the layers after the first predicts the
        # observed ratio (about 1/sqrt 2 per layer), within the drift of a finite width
        index = int(finding.layer[2:])
        predicted = math.prod(small[f"fc{i}"]["weight"].std() / math.sqrt(2.0 / 64)
                              for i in range(2, index + 1))
        assert abs(math.log(finding.measure / predicted)) < math.log(3.0)
