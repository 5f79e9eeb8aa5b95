"""Checks from the weights alone (analysis/checks/static.py) on weight archives without a probe.

The firing probability of a first-layer ReLU unit under standardised inputs x ~ N(0, I) is
P(z > 0) = Phi(b / ||w||), since z = w.x + b ~ N(b, ||w||^2) (a sum of independent normals is
normal: any probability handbook). It is checked two ways: against scipy.stats.norm.cdf, and by
Monte Carlo, drawing the inputs and counting firings (binomial standard errors). All-zero and
duplicate units are checked against numpy's own row comparisons (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

scipy_stats = pytest.importorskip("scipy.stats", reason="scipy is the reference here")

from actdoc.analysis import analyze  # noqa: E402
from actdoc.analysis.checks.static import duplicate_of, firing_probability  # noqa: E402
from actdoc.cli import main  # noqa: E402
from actdoc.io import open_dump  # noqa: E402

RNG = np.random.default_rng(2015)


def first_layer(units=40, fan_in=20):
    w = RNG.normal(0.0, np.sqrt(2.0 / fan_in), (units, fan_in))
    norms = np.linalg.norm(w, axis=1)
    # biases from -4 to +1 standard deviations of z: firing probabilities from 3e-5 to 0.84
    b = np.linspace(-4.0, 1.0, units) * norms
    return w, b


def test_firing_probability_matches_scipy_and_monte_carlo():
    w, b = first_layer()
    p = firing_probability(w, b)
    np.testing.assert_allclose(p, scipy_stats.norm.cdf(b / np.linalg.norm(w, axis=1)),
                               rtol=1e-12, atol=0)
    samples, fired = 400_000, np.zeros(len(b))
    for _ in range(samples // 50_000):
        x = RNG.standard_normal((50_000, w.shape[1]))
        fired += np.count_nonzero(x @ w.T + b > 0, axis=0)
    share = fired / samples
    standard_error = np.sqrt(p * (1 - p) / samples)
    assert np.all(np.abs(share - p) <= 5 * standard_error + 1e-5)


def test_zero_weights_fire_by_the_sign_of_the_bias():
    w = np.zeros((3, 4))
    np.testing.assert_array_equal(firing_probability(w, np.array([1.0, 0.0, -1.0])), [1, 0, 0])


def test_duplicates_against_numpy_row_equality():
    w = RNG.normal(size=(10, 6))
    b = RNG.normal(size=10)
    w[7], b[7] = w[2], b[2]
    w[9], b[9] = w[2], b[2]
    w[5] = w[1]  # same weights, other bias: not a duplicate
    w[3] = 0.0
    w[4] = -0.0  # two all-zero rows are zero_weights, not duplicates
    first = duplicate_of(w, b)
    for unit in range(10):
        rows = np.column_stack([w, b])
        same = [j for j in range(10) if np.array_equal(rows[j], rows[unit])]
        expected = -1 if not w[unit].any() else min(same)
        assert first[unit] == expected


def test_weight_archive_without_probe(tmp_path, capsys):
    w1, b1 = first_layer()
    w2 = RNG.normal(size=(8, 40))
    b2 = RNG.normal(size=8)
    w2[6], b2[6] = w2[1], b2[1]
    w2[3] = 0.0
    path = tmp_path / "weights.npz"
    with open(path, "wb") as handle:  # docs/contract.md section 3
        np.savez(handle, **{"fc1.weight": w1, "fc1.bias": b1, "fc2.weight": w2, "fc2.bias": b2,
                            "out.weight": RNG.normal(size=(2, 8))})
    with open_dump(path, activations=["relu"]) as dump:
        findings = analyze(dump, digest=False)
    expected = np.flatnonzero(scipy_stats.norm.cdf(b1 / np.linalg.norm(w1, axis=1)) < 0.01)
    (rare,) = [f for f in findings.findings if f.check == "rarely_fires"]
    assert rare.layer == "fc1" and list(rare.units) == expected.tolist()
    assert not [f for f in findings.for_layer("fc2") if f.check == "rarely_fires"]  # deeper
    by_check = {f.check: f.units for f in findings.for_layer("fc2")}
    assert by_check == {"duplicate": (6,), "zero_weights": (3,)}
    assert main(["analyze", str(path), "--activation", "relu"]) == 0
    assert "rarely_fires" in capsys.readouterr().out


def test_static_checks_stay_quiet_with_activations(tmp_path):
    """With a probe the measured checks decide; the static ones do not run."""
    from actdoc.io.memory import dump_from_arrays

    w = np.zeros((4, 3))
    z = RNG.normal(size=(50, 4))
    dump = dump_from_arrays({"fc": {"activation": "relu", "preact": z,
                                    "output": np.maximum(z, 0), "weight": w}})
    checks = {f.check for f in analyze(dump, digest=False).findings}
    assert not checks & {"rarely_fires", "zero_weights", "duplicate"}
