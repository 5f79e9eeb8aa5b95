"""A scikit-learn MLPClassifier trained on its bundled digits so hard that ReLU units die: the
reference network of the forward-pass, upload and repair tests.

SGD at learning rate 0.5 on pixels scaled to [0, 1] silences many hidden units (measured: 52 of
64 and 13 of 32) while the classifier still fits; scikit-learn's own forward pass gives the
hidden activations every test compares against.
"""

from __future__ import annotations

import warnings


def train_dying_relu_mlp():
    """(classifier, inputs, activations): ``activations[i]`` is scikit-learn's own output of
    layer i (0 the inputs, then the two hidden ReLU layers, then the softmax read-out)."""
    from sklearn.datasets import load_digits
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPClassifier

    X, y = load_digits(return_X_y=True)
    X = X / 16.0
    clf = MLPClassifier(hidden_layer_sizes=(64, 32), activation="relu", solver="sgd",
                        learning_rate_init=0.5, max_iter=30, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        clf.fit(X, y)
    activations = clf._forward_pass([X] + [None] * (clf.n_layers_ - 1))
    return clf, X, activations

