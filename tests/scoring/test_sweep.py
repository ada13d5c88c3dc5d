"""Complexity sweep and the one-standard-error rule (Breiman et al. 1984; ESL section 7.10)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from mlxtend.evaluate import bias_variance_decomp
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import mean_squared_error
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler
from sklearn.tree import DecisionTreeRegressor

from service.scoring._checks import ScoringInputError
from service.scoring.sweep import SweepInput, complexity_sweep, sweep_from_predictions

N_SEEDS = 4
BOOTSTRAP_SEED = 3


def _assert_one_se_rule(result) -> None:
    """The properties that follow from the rule's definition (ESL section 7.10)."""
    losses = np.array([p.test_loss for p in result.points])
    complexity = np.array([p.complexity for p in result.points])
    best = int(np.argmin(losses))
    band = losses[best] + result.points[best].test_loss_se
    assert result.best_complexity == complexity[best]
    assert result.one_se_complexity <= result.best_complexity
    chosen = int(np.flatnonzero(complexity == result.one_se_complexity)[0])
    assert losses[chosen] <= band
    assert np.all(losses[:chosen] > band)  # no simpler point qualifies
    for i, point in enumerate(result.points):
        if losses[i] <= band:
            assert point.region == "optimal"
        elif i < chosen:
            assert point.region == "underfit"
        elif i > best:
            assert point.region == "overfit"
        else:
            assert point.region == "neutral"


def _bootstrap_predictions(make_model, X_tr, y_tr, X_te):
    """K models on bootstrap draws of the training rows, drawn the way mlxtend's
    bias_variance_decomp draws them (RandomState(seed).choice per round), so its numbers are
    a like-for-like reference."""
    rng = np.random.RandomState(BOOTSTRAP_SEED)
    test_preds, train_preds = [], []
    for _ in range(N_SEEDS):
        idx = rng.choice(np.arange(X_tr.shape[0]), size=X_tr.shape[0], replace=True)
        model = make_model().fit(X_tr[idx], y_tr[idx])
        test_preds.append(model.predict(X_te))
        train_preds.append(model.predict(X_tr))
    return np.array(test_preds), np.array(train_preds)


@pytest.fixture(scope="module")
def diabetes():
    X, y = load_diabetes(return_X_y=True)
    return train_test_split(X, y, test_size=0.3, random_state=0)


def _tree(depth):
    return lambda: DecisionTreeRegressor(max_depth=depth, random_state=0)


def _poly(degree):
    return lambda: make_pipeline(
        PolynomialFeatures(degree), StandardScaler(), Ridge(alpha=1e-3)
    )


@pytest.mark.parametrize(
    ("family", "complexities"),
    [(_tree, [1, 2, 3, 4, 6, 8]), (_poly, [1, 2, 3])],
    ids=["tree_depth", "polynomial_degree"],
)
def test_sweep_on_diabetes_matches_sklearn_and_mlxtend(diabetes, family, complexities) -> None:
    X_tr, X_te, y_tr, y_te = diabetes
    entries, preds = [], {}
    for c in complexities:
        test_p, train_p = _bootstrap_predictions(family(c), X_tr, y_tr, X_te)
        preds[c] = (test_p, train_p)
        entries.append((float(c), test_p, y_tr, train_p))
    result = sweep_from_predictions(y_te, entries[::-1])  # order of entries does not matter
    assert [p.complexity for p in result.points] == [float(c) for c in complexities]
    _assert_one_se_rule(result)
    for point, c in zip(result.points, complexities, strict=True):
        test_p, train_p = preds[c]
        # reference: sklearn.metrics.mean_squared_error, averaged over seeds
        mse = np.mean([mean_squared_error(y_te, p) for p in test_p])
        assert point.test_loss == pytest.approx(mse, rel=1e-12)
        train_mse = np.mean([mean_squared_error(y_tr, p) for p in train_p])
        assert point.train_loss == pytest.approx(train_mse, rel=1e-12)
        row_losses = ((test_p - y_te) ** 2).mean(axis=0)
        se = row_losses.std(ddof=1) / math.sqrt(y_te.size)
        assert point.test_loss_se == pytest.approx(se, rel=1e-12)
        # reference: mlxtend.evaluate.bias_variance_decomp(loss="mse") with the same draws
        expected, bias, variance = bias_variance_decomp(
            family(c)(), X_tr, y_tr, X_te, y_te, loss="mse", num_rounds=N_SEEDS,
            random_seed=BOOTSTRAP_SEED,
        )
        assert point.test_loss == pytest.approx(expected, rel=1e-9)
        assert point.bias == pytest.approx(bias, rel=1e-9)
        assert point.variance == pytest.approx(variance, rel=1e-9)


def _rows_with(mean: float, sd: float, pattern: np.ndarray) -> np.ndarray:
    """Row losses with exactly this mean and sample sd (pattern: mean 0, sd 1)."""
    return mean + sd * pattern


@pytest.fixture(scope="module")
def pattern():
    p = np.random.default_rng(0).normal(size=100)
    p -= p.mean()
    return p / p.std(ddof=1)


def test_u_shaped_curve_gets_the_expected_regions(pattern) -> None:
    # Constructed: n = 100 rows with sd 1, so every SE is 0.1. Minimum 2.0 at complexity 5,
    # band 2.1: complexities 4 (2.05) and 6 (2.08) are within one SE. Expected by
    # construction from the documented rule (one-SE rule, ESL section 7.10).
    means = {1: 10.0, 2: 6.0, 3: 3.0, 4: 2.05, 5: 2.0, 6: 2.08, 7: 4.0, 8: 8.0}
    points = [SweepInput(c, _rows_with(m, 1.0, pattern), bias=m, variance=0.0)
              for c, m in means.items()]
    result = complexity_sweep(points, loss="squared")
    assert result.best_complexity == 5.0
    assert result.one_se_complexity == 4.0
    assert [p.region for p in result.points] == [
        "underfit", "underfit", "underfit", "optimal", "optimal", "optimal", "overfit",
        "overfit",
    ]
    assert all(p.test_loss_se == pytest.approx(0.1) for p in result.points)
    _assert_one_se_rule(result)


def test_bump_between_the_choice_and_the_best_is_neutral(pattern) -> None:
    # Constructed as above: minimum 2.0 at 4, band 2.1, complexity 2 (2.05) is the one-SE
    # choice and complexity 3 (3.0) lies between it and the best: neutral.
    means = {1: 5.0, 2: 2.05, 3: 3.0, 4: 2.0, 5: 6.0}
    points = [SweepInput(c, _rows_with(m, 1.0, pattern), 0.0, 0.0) for c, m in means.items()]
    result = complexity_sweep(points, loss="squared")
    assert (result.one_se_complexity, result.best_complexity) == (2.0, 4.0)
    assert [p.region for p in result.points] == [
        "underfit", "optimal", "neutral", "optimal", "overfit"
    ]


@settings(max_examples=60, derandomize=True, deadline=None)
@given(
    st.lists(st.floats(0.0, 5.0), min_size=1, max_size=8),
    st.integers(2, 30),
    st.integers(0, 2**32 - 1),
)
def test_one_se_rule_properties_on_random_curves(levels, n, seed) -> None:
    rng = np.random.default_rng(seed)
    points = [
        SweepInput(float(c), level + rng.exponential(1.0, n), bias=0.0, variance=0.0)
        for c, level in zip(rng.permutation(len(levels)) * 0.5, levels, strict=True)
    ]
    _assert_one_se_rule(complexity_sweep(points, loss="absolute"))


def test_sweep_rejects_inputs_it_cannot_rank() -> None:
    rows = np.array([1.0, 2.0, 3.0])
    with pytest.raises(ScoringInputError, match="points"):
        complexity_sweep([], loss="squared")
    with pytest.raises(ScoringInputError, match="complexity"):
        complexity_sweep([SweepInput(1, rows, 0, 0), SweepInput(1.0, rows, 0, 0)], loss="s")
    with pytest.raises(ScoringInputError, match="test_row_losses"):
        complexity_sweep([SweepInput(1, rows, 0, 0), SweepInput(2, rows[:2], 0, 0)], loss="s")
    with pytest.raises(ScoringInputError, match="test_row_losses"):
        complexity_sweep([SweepInput(1, rows[:1], 0, 0)], loss="s")
    with pytest.raises(ScoringInputError, match="train_predictions"):
        sweep_from_predictions(rows, [(1.0, rows[None, :], rows, None)])
    with pytest.raises(ValueError, match="squared"):
        sweep_from_predictions(rows, [(1.0, rows[None, :], None, None)], loss="absolute")
