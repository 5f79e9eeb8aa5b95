"""scikit-learn as a second reference: a trained MLPClassifier's hidden layer, analysed by actdoc.

sklearn.neural_network.MLPClassifier is trained on the handwritten digits bundled with
scikit-learn (sklearn.datasets.load_digits: 1797 8x8 images, no download). Its hidden
pre-activations on the held-out split are computed from the fitted ``coefs_`` and
``intercepts_`` (checked against the classifier's own predict_proba first), written as a dump
and analysed. actdoc's per-unit shares and verdicts must equal what numpy computes directly from
sklearn's parameters, and the recorded outputs must give sklearn's predictions.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import special
from sklearn.datasets import load_digits
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier

from actdoc.analysis import analyze
from actdoc.io import open_dump
from actdoc.io.writer import write_dump

HIDDEN_UNITS = 24
#: A high initial rate for Adam (sklearn's default is 1e-3): the relu network then trains in
#: 40 epochs and, as high rates do, silences some of its units (10 of 24 with these seeds).
LEARNING_RATE = 0.05
LOGISTIC_EDGE = math.log(99.0)   # docs/contract.md section 4
SATURATED_SHARE = 0.95           # docs/contract.md section 4
NEAR_BINARY_MINORITY = 0.05      # docs/contract.md section 4
DORMANT_SHARE = 0.01             # docs/contract.md section 4 (dormant default)
#: sklearn's names for the hidden activations and actdoc's kinds for them.
KINDS = {"relu": "relu", "logistic": "logistic"}


@pytest.fixture(scope="module")
def digits():
    x, y = load_digits(return_X_y=True)
    x = x / 16.0  # pixel intensities 0..16 scaled to [0, 1]
    return train_test_split(x, y, test_size=0.3, random_state=0, stratify=y)


@pytest.fixture(scope="module", params=list(KINDS))
def trained(request, digits, tmp_path_factory):
    x_train, x_test, y_train, _ = digits
    clf = MLPClassifier(hidden_layer_sizes=(HIDDEN_UNITS,), activation=request.param,
                        learning_rate_init=LEARNING_RATE, max_iter=40, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # 40 epochs: not converged
        clf.fit(x_train, y_train)
    # sklearn's forward pass: X @ coefs_[i] + intercepts_[i]; coefs_ is [fan_in, units]
    z = x_test @ clf.coefs_[0] + clf.intercepts_[0]
    h = np.maximum(z, 0.0) if request.param == "relu" else special.expit(z)
    logits = h @ clf.coefs_[1] + clf.intercepts_[1]
    path = write_dump(tmp_path_factory.mktemp("sklearn") / f"digits-{request.param}.h5", {
        "hidden": {"activation": KINDS[request.param], "preact": z, "output": h,
                   "weight": clf.coefs_[0].T, "bias": clf.intercepts_[0]},
        "logits": {"activation": "linear", "preact": logits, "output": logits.copy(),
                   "weight": clf.coefs_[1].T, "bias": clf.intercepts_[1]},
    }, probe_input=x_test)
    return request.param, clf, x_test, z, logits, path


def test_reconstructed_forward_pass_is_sklearns(trained):
    # scikit-learn: predict_proba is the softmax of the output layer (out_activation_
    # "softmax" for more than two classes); our z and logits must reproduce it
    _, clf, x_test, _, logits, _ = trained
    assert clf.out_activation_ == "softmax"
    np.testing.assert_allclose(special.softmax(logits, axis=1), clf.predict_proba(x_test),
                               rtol=1e-10, atol=1e-14)


def test_unit_shares_equal_numpy_on_sklearn_parameters(trained):
    # numpy on sklearn's coefs_/intercepts_: share of z > 0 (active) for relu, of z < -ln 99
    # and z > ln 99 (saturated sides) for logistic; the dump stores float64, counts are exact
    activation, _, x_test, z, _, path = trained
    with open_dump(path) as dump:
        findings = analyze(dump)
    table = findings.layer("hidden").unit_table
    assert findings.layer("hidden").info.units == HIDDEN_UNITS
    assert findings.layer("hidden").info.samples == x_test.shape[0]
    if activation == "relu":
        np.testing.assert_allclose(table["active_fraction"], (z > 0).mean(axis=0),
                                   rtol=0, atol=1e-15)
    else:
        np.testing.assert_allclose(table["low_fraction"], (z < -LOGISTIC_EDGE).mean(axis=0),
                                   rtol=0, atol=1e-15)
        np.testing.assert_allclose(table["high_fraction"], (z > LOGISTIC_EDGE).mean(axis=0),
                                   rtol=0, atol=1e-15)


def named(findings, check: str) -> set[int]:
    return {u for f in findings.for_layer("hidden") if f.check == check for u in f.units}


def test_verdicts_equal_numpy_rules_on_sklearn_parameters(trained):
    # the rules of docs/contract.md section 4 applied by numpy to sklearn's pre-activations
    activation, _, _, z, _, path = trained
    with open_dump(path) as dump:
        findings = analyze(dump)
    if activation == "relu":
        active = (z > 0).mean(axis=0)
        dead = set(np.flatnonzero(active == 0).tolist())
        assert named(findings, "dead") == dead
        assert named(findings, "dormant") == \
            set(np.flatnonzero((active > 0) & (active < DORMANT_SHARE)).tolist())
        # the high learning rate really silenced units: the check is not vacuous
        assert dead
    else:
        low, high = (z < -LOGISTIC_EDGE).mean(axis=0), (z > LOGISTIC_EDGE).mean(axis=0)
        # docs/checks.md: both sides count together, unless the rarer one makes it near-binary
        binary = (low + high >= SATURATED_SHARE) & (np.fmin(low, high) >= NEAR_BINARY_MINORITY)
        assert named(findings, "saturated") == \
            set(np.flatnonzero((low + high >= SATURATED_SHARE) & ~binary).tolist())
        assert named(findings, "near_binary") == set(np.flatnonzero(binary).tolist())
        # trained at this rate, the logistic units do reach the asymptotes on some samples
        assert (low + high).max() > 0.1


def test_recorded_outputs_give_sklearns_predictions(trained, digits):
    # scikit-learn: clf.predict is classes_[argmax of the output layer]; the argmax of the
    # logits read back from the dump (softmax is monotone) must give the same labels
    _, clf, x_test, _, _, path = trained
    with open_dump(path) as dump:
        layer = dump.layer("logits")
        # paired_blocks reuses its buffers between blocks: keep copies
        outputs = np.concatenate([y.copy() for _, y in layer.paired_blocks(block_observations=128)])
        np.testing.assert_array_equal(dump.probe_input.read_all(), x_test)
    np.testing.assert_array_equal(clf.classes_[outputs.argmax(axis=1)], clf.predict(x_test))
    # and the network did learn the digits: held-out accuracy (measured 0.97 relu, 0.98
    # logistic with these seeds) well above chance (0.1)
    y_test = digits[3]
    assert np.mean(clf.classes_[outputs.argmax(axis=1)] == y_test) > 0.9
