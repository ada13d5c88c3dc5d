"""Our decompositions against mlxtend.evaluate.bias_variance_decomp on scikit-learn data.

mlxtend retrains an estimator on ``num_rounds`` bootstrap draws of the training set and
reports (expected loss, bias, variance) on the test set. Its source
(mlxtend/evaluate/bias_variance_decomp.py, 0.25) draws every round with
``rng = np.random.RandomState(random_seed)`` and ``_draw_bootstrap_sample``:
``rng.choice(np.arange(n_train), size=n_train, replace=True)``, in round order, from one
generator. ``_rounds`` repeats exactly those draws with a deterministic estimator (fixed
``random_state``), so both runs fit the same models and predict the same labels; we then
score the collected per-round predictions as K seeds and compare the three numbers.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from mlxtend.evaluate import bias_variance_decomp
from sklearn.base import clone
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris, load_wine
from sklearn.model_selection import train_test_split
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from service.scoring.decomposition import squared_loss_decomposition, zero_one_decomposition

ROUNDS = 25
SEED = 123
approx = functools.partial(pytest.approx, rel=1e-10, abs=0.0)


def _rounds(estimator, x_train, y_train, x_test, num_rounds: int, random_seed: int):
    """Per-round test predictions, drawn as mlxtend 0.25 draws them (see module docstring)."""
    rng = np.random.RandomState(random_seed)
    indices = np.arange(x_train.shape[0])
    predictions = []
    for _ in range(num_rounds):
        boot = rng.choice(indices, size=indices.shape[0], replace=True)
        model = clone(estimator).fit(x_train[boot], y_train[boot])
        predictions.append(model.predict(x_test))
    return np.array(predictions)


def _split(loader):
    x, y = loader(return_X_y=True)
    return train_test_split(x, y, test_size=0.3, random_state=0)


def test_squared_loss_matches_mlxtend_mse_on_diabetes() -> None:
    x_train, x_test, y_train, y_test = _split(load_diabetes)
    estimator = DecisionTreeRegressor(max_depth=4, random_state=0)
    # reference: mlxtend.evaluate.bias_variance_decomp(loss="mse")
    expected, bias, variance = bias_variance_decomp(
        estimator,
        x_train,
        y_train,
        x_test,
        y_test,
        loss="mse",
        num_rounds=ROUNDS,
        random_seed=SEED,
    )
    predictions = _rounds(estimator, x_train, y_train, x_test, ROUNDS, SEED)
    d = squared_loss_decomposition(y_test, predictions)
    assert d.expected_loss == approx(expected)
    assert d.bias == approx(bias)
    assert d.variance == approx(variance)
    assert variance > 0  # the draws differ, so the comparison is not trivially 0 = 0


@pytest.mark.parametrize(
    ("loader", "n_classes"),
    [(load_breast_cancer, 2), (load_iris, 3), (load_wine, 3)],
    ids=["breast_cancer", "iris", "wine"],
)
def test_zero_one_loss_matches_mlxtend_on_classification_sets(loader, n_classes: int) -> None:
    x_train, x_test, y_train, y_test = _split(loader)
    estimator = DecisionTreeClassifier(max_depth=3, random_state=0)
    # reference: mlxtend.evaluate.bias_variance_decomp(loss="0-1_loss")
    expected, bias, variance = bias_variance_decomp(
        estimator,
        x_train,
        y_train,
        x_test,
        y_test,
        loss="0-1_loss",
        num_rounds=ROUNDS,
        random_seed=SEED,
    )
    labels = _rounds(estimator, x_train, y_train, x_test, ROUNDS, SEED)
    d = zero_one_decomposition(y_test, labels, n_classes=n_classes)
    assert d.expected_loss == approx(expected)
    assert d.bias == approx(bias)
    assert d.variance == approx(variance)
    assert variance > 0
    # Domingos (2000): noise-free, expected loss = bias + net variance on real predictions
    assert d.expected_loss == approx(d.bias + d.extra["net_variance"], rel=1e-12)
