"""Regression metrics, report and intervals, checked against scikit-learn, scipy and statsmodels."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats
from sklearn import metrics as skm
from sklearn.exceptions import UndefinedMetricWarning
from statsmodels.stats.weightstats import DescrStatsW

from service.scoring import ScoringInputError, ScoringOptions, to_jsonable
from service.scoring.decomposition import squared_loss_decomposition
from service.scoring.intervals import order_statistic_interval
from service.scoring.regression import (
    MAPE_EPSILON,
    METRICS,
    ensemble_prediction,
    regression_metrics,
    regression_report,
    regression_row_losses,
)

# reference: each key's scikit-learn function (sklearn.metrics, 1.9)
SKLEARN = {
    "mse": skm.mean_squared_error,
    "rmse": skm.root_mean_squared_error,
    "mae": skm.mean_absolute_error,
    "median_absolute_error": skm.median_absolute_error,
    "max_error": skm.max_error,
    "r2": skm.r2_score,
    "explained_variance": skm.explained_variance_score,
    "mape": skm.mean_absolute_percentage_error,
}
RTOL = 1e-12


def sklearn_value(name: str, y: np.ndarray, p: np.ndarray, w: np.ndarray | None = None) -> float:
    """The scikit-learn value of one metric on one seed (max_error: rows of positive weight)."""
    if name == "max_error":
        # sklearn.metrics.max_error takes no weights; ours skips rows of zero weight
        keep = slice(None) if w is None else w > 0
        return skm.max_error(y[keep], p[keep])
    with warnings.catch_warnings():
        # r2_score warns on a single row (UndefinedMetricWarning) and returns NaN
        warnings.simplefilter("ignore", UndefinedMetricWarning)
        return SKLEARN[name](y, p, sample_weight=w)


def assert_matches_sklearn(
    y: np.ndarray, preds: np.ndarray, w: np.ndarray | None = None, rtol: float = RTOL
) -> dict[str, np.ndarray]:
    got = regression_metrics(y, preds, sample_weight=w)
    assert list(got) == list(METRICS)
    for name in METRICS:
        assert got[name].shape == (preds.shape[0],)
        for k in range(preds.shape[0]):
            ref = sklearn_value(name, y, preds[k], w)
            if math.isnan(ref):
                assert math.isnan(got[name][k]), name
            else:
                assert got[name][k] == pytest.approx(ref, rel=rtol, abs=1e-300), (name, k)
    return got


# ------------------------------------------------------------------------------ metrics


@pytest.mark.parametrize("n", [1, 2, 3, 10, 1001])
@pytest.mark.parametrize("weighted", [False, True])
def test_random_inputs_match_sklearn(n: int, weighted: bool) -> None:
    rng = np.random.default_rng(n + 1000 * weighted)
    y = rng.normal(2.0, 3.0, size=n)
    preds = y + rng.normal(0.5, 1.0, size=(3, n)) * rng.uniform(0.1, 2.0, size=(3, 1))
    w = rng.uniform(0.0, 2.0, size=n) if weighted else None
    assert_matches_sklearn(y, preds, w)


@pytest.mark.parametrize("n", [70_000, 70_001])
def test_large_inputs_use_the_bracketed_median_and_match_sklearn(n: int) -> None:
    # above _BRACKET_MIN_ROWS rows the median comes from a sampled bracket: still exact
    rng = np.random.default_rng(n)
    y = rng.standard_t(3, size=n)
    preds = y + rng.standard_t(2, size=(2, n))
    assert_matches_sklearn(y, preds)


@pytest.mark.parametrize(
    "make_residual",
    [
        lambda rng, n: rng.integers(-2, 3, size=n).astype(float),  # heavy ties at the median
        lambda rng, n: np.full(n, 0.25),  # one value
        lambda rng, n: np.sort(rng.normal(size=n)),  # sorted rows
        lambda rng, n: np.where(np.arange(n) < n // 2, 0.0, 1e6),  # two far-apart clusters
    ],
)
def test_bracketed_median_is_exact_on_adversarial_residuals(make_residual) -> None:
    n = 66_000
    rng = np.random.default_rng(5)
    y = rng.normal(size=n)
    preds = np.vstack([y + make_residual(rng, n), y - make_residual(rng, n)])
    got = regression_metrics(y, preds)
    for k in range(2):
        # reference: sklearn.metrics.median_absolute_error
        ref = skm.median_absolute_error(y, preds[k])
        assert got["median_absolute_error"][k] == pytest.approx(ref, rel=RTOL)


@pytest.mark.parametrize("margin", [-40.0, 0.0])
def test_a_missed_bracket_falls_back_to_an_exact_partition(monkeypatch, margin: float) -> None:
    # a negative margin puts the bracket beside the median on purpose; zero makes it tight
    from service.scoring import regression

    monkeypatch.setattr(regression, "_BRACKET_Z", margin)
    rng = np.random.default_rng(6)
    n = 66_001
    y = rng.normal(size=n)
    preds = y + rng.normal(size=(2, n))
    got = regression.regression_metrics(y, preds)
    for k in range(2):
        # reference: sklearn.metrics.median_absolute_error
        ref = skm.median_absolute_error(y, preds[k])
        assert got["median_absolute_error"][k] == pytest.approx(ref, rel=RTOL)
    level = 0.95
    report = regression.regression_report(y, preds, options=ScoringOptions(level=level))
    # reference: scipy.stats.quantile_test(...).confidence_interval (binomial ranks)
    cis = [stats.quantile_test(np.abs(p - y), p=0.5).confidence_interval(level) for p in preds]
    iv = report.intervals["median_absolute_error"]
    assert iv.low == pytest.approx(np.mean([c.low for c in cis]), rel=1e-15)
    assert iv.high == pytest.approx(np.mean([c.high for c in cis]), rel=1e-15)
    # the ensemble row misses too and is recomputed; reference: sklearn on the seed mean
    ens = skm.median_absolute_error(y, preds.mean(axis=0))
    assert report.ensemble["median_absolute_error"] == pytest.approx(ens, rel=RTOL)


def test_ties_and_integer_valued_data_match_sklearn() -> None:
    rng = np.random.default_rng(3)
    y = rng.integers(0, 4, size=60).astype(float)
    preds = rng.integers(0, 4, size=(3, 60)).astype(float)
    assert_matches_sklearn(y, preds)
    assert_matches_sklearn(y, preds, rng.integers(0, 3, size=60).astype(float) + 1.0)


def test_constant_predictions_match_sklearn() -> None:
    y = np.random.default_rng(4).normal(size=25)
    preds = np.vstack([np.full(25, 1.5), np.full(25, y.mean()), y])
    got = assert_matches_sklearn(y, preds)
    assert got["r2"][2] == 1.0 and got["explained_variance"][2] == 1.0


def test_constant_targets_follow_sklearn_force_finite() -> None:
    y = np.full(12, 3.0)
    preds = np.vstack([y, np.full(12, 4.0), y + np.linspace(-1, 1, 12)])
    got = assert_matches_sklearn(y, preds)
    # reference: sklearn.metrics.r2_score / explained_variance_score docs (force_finite=True):
    # 1.0 for perfect predictions, 0.0 otherwise; a constant offset is "perfect" for the
    # explained variance (its numerator, the variance of the residuals, is zero)
    assert got["r2"].tolist() == [1.0, 0.0, 0.0]
    assert got["explained_variance"].tolist() == [1.0, 1.0, 0.0]


def test_zero_targets_make_mape_huge_as_in_sklearn() -> None:
    y = np.array([1.0, 0.0, 2.4, 7.0])
    preds = np.array([[1.2, 0.1, 2.4, 8.0], [1.0, 0.0, 2.4, 7.0]])
    got = assert_matches_sklearn(y, preds)
    # reference: sklearn.metrics.mean_absolute_percentage_error divides by max(|y|, eps)
    assert MAPE_EPSILON == np.finfo(np.float64).eps
    assert got["mape"][0] > 1e14
    assert got["mape"][1] == 0.0
    report = regression_report(y, preds)
    assert report.details["mape_zero_targets"] == 1
    assert any("zero target" in note for note in report.details["notes"])


def test_single_row_matches_sklearn_and_r2_is_nan() -> None:
    y, preds = np.array([2.0]), np.array([[2.5], [1.0]])
    got = assert_matches_sklearn(y, preds)
    assert np.isnan(got["r2"]).all()  # reference: sklearn.metrics.r2_score (NaN, warns)
    report = regression_report(y, preds)
    assert math.isnan(report.scores["r2"])
    assert to_jsonable(report)["scores"]["r2"] is None
    assert any("single row" in note for note in report.details["notes"])


def test_weights_with_zeros_match_sklearn_and_drop_rows_from_max_error() -> None:
    rng = np.random.default_rng(6)
    y = rng.normal(size=40)
    preds = y + rng.normal(size=(2, 40))
    w = rng.uniform(0.5, 2.0, size=40)
    w[[3, 17]] = 0.0
    preds[:, 3] += 100.0  # a zero-weight row with the largest error
    got = assert_matches_sklearn(y, preds, w)
    # documented difference: sklearn.metrics.max_error ignores weights and would report
    # the zero-weight row's error; we take the maximum over rows of positive weight
    assert (got["max_error"] < np.array([skm.max_error(y, p) for p in preds])).all()


def test_unit_weights_equal_no_weights() -> None:
    rng = np.random.default_rng(7)
    y = rng.normal(size=101)
    preds = y + rng.normal(size=(2, 101))
    plain = regression_metrics(y, preds)
    unit = regression_metrics(y, preds, sample_weight=np.ones(101))
    for name in METRICS:
        np.testing.assert_allclose(unit[name], plain[name], rtol=1e-13)


def test_integer_inputs_equal_float_inputs() -> None:
    rng = np.random.default_rng(8)
    y = rng.integers(-50, 50, size=31)
    preds = rng.integers(-50, 50, size=(2, 31))
    got = regression_metrics(y, preds)
    as_float = regression_metrics(y.astype(np.float64), preds.astype(np.float64))
    for name in METRICS:
        np.testing.assert_array_equal(got[name], as_float[name])
    assert_matches_sklearn(y, preds)
    # int32 and float32 too
    narrow = regression_metrics(y.astype(np.int32), preds.astype(np.float32))
    for name in METRICS:
        np.testing.assert_array_equal(narrow[name], as_float[name])


def test_one_dimensional_predictions_are_one_seed() -> None:
    rng = np.random.default_rng(9)
    y = rng.normal(size=20)
    p = y + rng.normal(size=20)
    got = regression_metrics(y, p)
    assert all(v.shape == (1,) for v in got.values())
    assert got["mse"][0] == pytest.approx(skm.mean_squared_error(y, p), rel=RTOL)


def test_large_offset_explained_variance_matches_sklearn() -> None:
    # a large common offset and a mean residual dominating its spread: the two-pass path
    rng = np.random.default_rng(10)
    y = 1e8 + rng.normal(size=200)
    preds = y + 5.0 + 1e-3 * rng.normal(size=(2, 200))
    assert_matches_sklearn(y, preds, rtol=1e-9)


@pytest.mark.parametrize(
    "args,field",
    [
        ((np.ones(3), np.ones((2, 4))), "predictions"),
        ((np.ones((3, 1)), np.ones(3)), "y_true"),
        ((np.array([1.0, np.nan]), np.ones(2)), "y_true"),
        ((np.ones(2), np.array([1.0, np.inf])), "predictions"),
    ],
)
def test_bad_input_names_the_field(args, field: str) -> None:
    with pytest.raises(ScoringInputError) as err:
        regression_metrics(*args)
    assert err.value.field == field


def test_overflowing_errors_are_inf_in_metrics_and_an_error_in_the_report() -> None:
    y = np.array([1e200, -1e200, 3.0, 4.0])
    preds = np.array([[-1e200, 1e200, 3.0, 4.0]])
    got = regression_metrics(y, preds)  # no floating-point warning (they are errors here)
    assert got["mse"][0] == math.inf
    with np.errstate(over="ignore"):  # sklearn warns on the overflow
        assert skm.mean_squared_error(y, preds[0]) == math.inf  # reference: sklearn
    with pytest.raises(ScoringInputError, match="overflow") as err:
        regression_report(y, preds)
    assert err.value.field == "predictions"


def test_bad_weights_and_half_a_training_set_are_rejected() -> None:
    with pytest.raises(ScoringInputError, match="sample_weight"):
        regression_metrics(np.ones(3), np.ones(3), sample_weight=np.array([1.0, -1.0, 1.0]))
    with pytest.raises(ScoringInputError) as err:
        regression_report(np.ones(3), np.ones(3), train_y_true=np.ones(4))
    assert err.value.field == "train_predictions"


@settings(max_examples=40, derandomize=True, deadline=None)
@given(
    n=st.integers(1, 60),
    k=st.integers(1, 3),
    seed=st.integers(0, 2**32 - 1),
    weighted=st.booleans(),
    tied=st.booleans(),
)
def test_permuting_rows_changes_no_metric(
    n: int, k: int, seed: int, weighted: bool, tied: bool
) -> None:
    rng = np.random.default_rng(seed)
    if tied:
        y = rng.integers(0, 3, size=n).astype(float)
        preds = rng.integers(0, 3, size=(k, n)).astype(float)
    else:
        y = rng.normal(size=n)
        preds = y + rng.normal(size=(k, n))
    w = rng.uniform(0.1, 2.0, size=n) if weighted else None
    perm = rng.permutation(n)
    got = regression_metrics(y, preds, sample_weight=w)
    w_perm = None if w is None else w[perm]
    permuted = regression_metrics(y[perm], preds[:, perm], sample_weight=w_perm)
    for name in METRICS:
        np.testing.assert_allclose(permuted[name], got[name], rtol=1e-12, atol=1e-12)


# ------------------------------------------------------------------------------ row losses


def test_row_losses_and_ensemble_prediction() -> None:
    rng = np.random.default_rng(11)
    y = rng.normal(size=50)
    preds = y + rng.normal(size=(4, 50))
    rows = regression_row_losses(y, preds)
    # reference: numpy, the definition (common practice): mean over seeds of (p - y)^2
    np.testing.assert_allclose(rows, ((preds - y) ** 2).mean(axis=0), rtol=1e-14)
    per_seed = [skm.mean_squared_error(y, p) for p in preds]  # reference: sklearn MSE
    assert rows.mean() == pytest.approx(np.mean(per_seed), rel=1e-13)
    np.testing.assert_array_equal(ensemble_prediction(preds), preds.mean(axis=0))
    np.testing.assert_array_equal(ensemble_prediction(preds[0]), preds[0])
    with pytest.raises(ScoringInputError, match="predictions"):
        ensemble_prediction(np.ones((2, 3, 4)))


# ------------------------------------------------------------------------------ report


@pytest.fixture(scope="module")
def diabetes_runs():
    """Several seeds of a real model on scikit-learn's bundled diabetes data."""
    from sklearn.datasets import load_diabetes
    from sklearn.ensemble import RandomForestRegressor
    from sklearn.model_selection import train_test_split

    x, y = load_diabetes(return_X_y=True)
    x_tr, x_te, y_tr, y_te = train_test_split(x, y, test_size=0.3, random_state=0)
    test_preds, train_preds = [], []
    for seed in range(4):
        model = RandomForestRegressor(n_estimators=20, max_features=0.5, random_state=seed)
        model.fit(x_tr, y_tr)
        test_preds.append(model.predict(x_te))
        train_preds.append(model.predict(x_tr))
    return y_te, np.array(test_preds), y_tr, np.array(train_preds)


def test_report_on_diabetes_matches_sklearn(diabetes_runs) -> None:
    y, preds, y_tr, preds_tr = diabetes_runs
    report = regression_report(y, preds, train_y_true=y_tr, train_predictions=preds_tr)
    assert report.task == "regression"
    assert (report.n_rows, report.n_seeds) == (y.size, 4)
    assert list(report.scores) == list(METRICS)
    for name in METRICS:
        per_seed = [sklearn_value(name, y, p) for p in preds]
        expected = math.sqrt(np.mean([skm.mean_squared_error(y, p) for p in preds])) if (
            name == "rmse"
        ) else np.mean(per_seed)
        assert report.scores[name] == pytest.approx(expected, rel=RTOL), name
        spread = report.seed_spread[name]
        assert spread.mean == pytest.approx(np.mean(per_seed), rel=RTOL)
        assert spread.sd == pytest.approx(np.std(per_seed, ddof=1), rel=1e-9)
        assert (spread.min, spread.max) == pytest.approx((min(per_seed), max(per_seed)))
        # the seed-averaged prediction's metrics (reference: sklearn on preds.mean(0))
        assert report.ensemble[name] == pytest.approx(
            sklearn_value(name, y, preds.mean(axis=0)), rel=RTOL
        )
        train_ref = [sklearn_value(name, y_tr, p) for p in preds_tr]
        expected_train = (
            math.sqrt(np.mean([skm.mean_squared_error(y_tr, p) for p in preds_tr]))
            if name == "rmse"
            else np.mean(train_ref)
        )
        assert report.train_scores[name] == pytest.approx(expected_train, rel=RTOL)
    assert report.scores["rmse"] ** 2 == pytest.approx(report.scores["mse"], rel=1e-15)
    assert report.details["per_seed"]["mae"] == pytest.approx(
        [skm.mean_absolute_error(y, p) for p in preds], rel=RTOL
    )
    decomposition = report.bias_variance["squared"]
    assert decomposition.expected_loss == pytest.approx(report.scores["mse"], rel=1e-12)
    assert decomposition.bias == pytest.approx(report.ensemble["mse"], rel=1e-12)
    # a forest fits its training rows much better than new rows: the gap is flagged
    assert "generalization_gap" in {flag.code for flag in report.flags}
    assert set(report.intervals) == set(METRICS)


def test_mean_r2_over_seeds_is_one_minus_expected_mse_over_variance(diabetes_runs) -> None:
    y, preds, _, _ = diabetes_runs
    report = regression_report(y, preds)
    # shared denominator: mean_k (1 - mse_k / var(y)) = 1 - mean_k mse_k / var(y)
    # reference: numpy population variance of y (common practice)
    assert report.scores["r2"] == pytest.approx(1 - report.scores["mse"] / np.var(y), rel=1e-12)


def test_single_seed_report_has_zero_spread_and_zero_variance() -> None:
    rng = np.random.default_rng(12)
    y = rng.normal(size=80)
    p = y + rng.normal(size=80)
    report = regression_report(y, p)
    assert report.n_seeds == 1
    assert all(s.sd == 0.0 for s in report.seed_spread.values())
    assert report.bias_variance["squared"].variance == 0.0
    assert report.ensemble == pytest.approx(report.scores, rel=1e-12)
    assert report.train_scores is None


def test_noise_variance_goes_to_the_decomposition() -> None:
    rng = np.random.default_rng(13)
    y = rng.normal(size=100)
    preds = y + rng.normal(size=(3, 100))
    decomposition = regression_report(y, preds, noise_variance=0.25).bias_variance["squared"]
    assert decomposition.noise == 0.25
    assert decomposition.bias + decomposition.noise == pytest.approx(decomposition.ensemble_loss)


def test_weighted_report_matches_sklearn() -> None:
    rng = np.random.default_rng(14)
    y = rng.normal(size=300)
    preds = y + rng.normal(size=(3, 300))
    w = rng.uniform(0.0, 3.0, size=300)
    report = regression_report(y, preds, sample_weight=w)
    for name in METRICS:
        if name == "rmse":
            continue
        expected = np.mean([sklearn_value(name, y, p, w) for p in preds])
        assert report.scores[name] == pytest.approx(expected, rel=RTOL), name
    assert any("positive weight" in note for note in report.details["notes"])
    iv = report.intervals["median_absolute_error"]
    assert iv.method == "seed_mean_conservative"
    # each seed's Woodruff interval, as order_statistic_interval computes it (that helper is
    # checked against numpy's inverted-CDF quantile of repeated rows in test_intervals.py)
    per_seed = [order_statistic_interval(np.abs(p - y), 0.5, w, level=0.95) for p in preds]
    assert iv.low == pytest.approx(np.mean([s.low for s in per_seed]), rel=1e-15)
    assert iv.high == pytest.approx(np.mean([s.high for s in per_seed]), rel=1e-15)
    # the weighted normal intervals use Kish's effective n
    # reference: statsmodels DescrStatsW with weights rescaled to sum to Kish's n
    rows = ((preds - y) ** 2).mean(axis=0)
    n_eff = w.sum() ** 2 / (w**2).sum()
    ref = DescrStatsW(rows, weights=w * n_eff / w.sum()).zconfint_mean(alpha=0.05)
    assert (report.intervals["mse"].low, report.intervals["mse"].high) == pytest.approx(
        ref, rel=1e-12
    )


# ------------------------------------------------------------------------------ report intervals


def test_report_intervals_against_references(diabetes_runs) -> None:
    y, preds, _, _ = diabetes_runs
    level = 0.9
    report = regression_report(y, preds, options=ScoringOptions(level=level))
    iv = report.intervals
    rows = ((preds - y) ** 2).mean(axis=0)
    # reference: statsmodels DescrStatsW.zconfint_mean of the seed-averaged row losses
    assert (iv["mse"].low, iv["mse"].high) == pytest.approx(
        DescrStatsW(rows).zconfint_mean(alpha=1 - level), rel=1e-12
    )
    assert (iv["mae"].low, iv["mae"].high) == pytest.approx(
        DescrStatsW(np.abs(preds - y).mean(axis=0)).zconfint_mean(alpha=1 - level), rel=1e-12
    )
    pct = np.abs(preds - y).mean(axis=0) / np.maximum(np.abs(y), MAPE_EPSILON)
    assert (iv["mape"].low, iv["mape"].high) == pytest.approx(
        DescrStatsW(pct).zconfint_mean(alpha=1 - level), rel=1e-12
    )
    assert (iv["rmse"].low, iv["rmse"].high) == pytest.approx(
        (math.sqrt(iv["mse"].low), math.sqrt(iv["mse"].high)), rel=1e-15
    )
    # median: mean over seeds of each seed's binomial-rank interval
    # reference: scipy.stats.quantile_test(...).confidence_interval
    cis = [stats.quantile_test(np.abs(p - y), p=0.5).confidence_interval(level) for p in preds]
    assert iv["median_absolute_error"].low == pytest.approx(np.mean([c.low for c in cis]))
    assert iv["median_absolute_error"].high == pytest.approx(np.mean([c.high for c in cis]))
    assert iv["max_error"].method == "none" and iv["max_error"].note
    for name in METRICS:
        assert iv[name].level == level
        if name != "max_error":
            assert iv[name].low <= report.scores[name] <= iv[name].high, name


def test_r2_and_explained_variance_intervals_match_a_bootstrap_reference() -> None:
    rng = np.random.default_rng(15)
    n, k = 1500, 3
    y = rng.gamma(3.0, size=n)
    preds = y + 0.3 + rng.normal(size=(1, n)) * 0.8 + rng.normal(size=(k, n)) * 0.5
    report = regression_report(y, preds)

    def mean_r2(yy: np.ndarray, *pp: np.ndarray, axis: int = -1) -> np.ndarray:
        p = np.stack(pp)
        mse = ((p - yy) ** 2).mean(axis=-1).mean(axis=0)
        return 1 - mse / yy.var(axis=-1)

    def mean_ev(yy: np.ndarray, *pp: np.ndarray, axis: int = -1) -> np.ndarray:
        p = np.stack(pp)
        return (1 - (p - yy).var(axis=-1) / yy.var(axis=-1)).mean(axis=0)

    for name, statistic in [("r2", mean_r2), ("explained_variance", mean_ev)]:
        # reference: scipy.stats.bootstrap(paired=True) over rows, percentile method, of the
        # mean over seeds of the metric. Tolerance: endpoints within 10% of the interval's
        # width (first-order delta method against resampling noise).
        ref = stats.bootstrap(
            (y, *preds), statistic, paired=True, n_resamples=2000, method="percentile",
            rng=np.random.default_rng(16),
        ).confidence_interval
        got = report.intervals[name]
        width = ref.high - ref.low
        assert got.method == "delta"
        assert abs(got.low - ref.low) < 0.1 * width, name
        assert abs(got.high - ref.high) < 0.1 * width, name


@pytest.mark.parametrize("weighted", [False, True])
def test_explained_variance_interval_shortcut_agrees_with_the_exact_form(
    monkeypatch, weighted: bool
) -> None:
    from service.scoring import regression

    rng = np.random.default_rng(17)
    n, k = 4000, 4
    y = rng.normal(size=n)
    noise = rng.normal(size=(k, n))
    w = rng.uniform(0.5, 2.0, size=n) if weighted else None

    def interval(preds: np.ndarray, tolerance: float):
        monkeypatch.setattr(regression, "_EV_SHORTCUT_TOLERANCE", tolerance)
        return regression.regression_report(y, preds, sample_weight=w).intervals[
            "explained_variance"
        ]

    # seeds with equal mean residuals: the one-pass form is exact (rbar_k all equal)
    centred = noise - np.average(noise, axis=1, weights=w)[:, None]
    equal = y + 0.2 + 0.5 * rng.normal(size=n) + 0.3 * centred
    short, exact = interval(equal, math.inf), interval(equal, 0.0)
    assert (short.low, short.high) == pytest.approx((exact.low, exact.high), rel=1e-9)
    # seeds with different biases: both forms have the same centre, and the half-widths
    # differ by at most the Cauchy-Schwarz bound (a few percent here)
    biased = y + 0.5 * rng.normal(size=n) + 0.3 * noise + np.array([[0.0], [0.1], [0.2], [0.3]])
    short, exact = interval(biased, math.inf), interval(biased, 0.0)
    assert (short.low + short.high) / 2 == pytest.approx((exact.low + exact.high) / 2, rel=1e-9)
    assert short.high - short.low == pytest.approx(exact.high - exact.low, rel=0.05)


def test_constant_targets_and_tiny_samples_give_reasoned_none_intervals() -> None:
    report = regression_report(np.full(8, 2.0), np.vstack([np.full(8, 2.5), np.full(8, 1.0)]))
    assert report.intervals["r2"].method == "none" and "constant" in report.intervals["r2"].note
    assert report.intervals["explained_variance"].method == "none"
    small = regression_report(np.arange(4.0), np.arange(4.0)[::-1])
    assert small.intervals["median_absolute_error"].method == "none"
    assert small.intervals["mse"].method == "normal"


def test_95_percent_intervals_cover_the_truth_on_simulated_data() -> None:
    # Known truth: y ~ U(1, 3) (variance 1/3, E[1/y] = ln(3)/2), residual of seed k at row i
    # r = b + s z_i + t u_ki with standard normal z, u: every seed's residual is N(b, s^2+t^2).
    b, s, t = 0.3, 0.8, 0.5
    sigma = math.hypot(s, t)
    mse = b * b + sigma * sigma
    # reference: folded normal mean E|N(b, sigma^2)| (common practice; Leone et al. 1961)
    mae = sigma * math.sqrt(2 / math.pi) * math.exp(-b * b / (2 * sigma * sigma)) + b * (
        1 - 2 * stats.norm.cdf(-b / sigma)
    )
    median = optimize.brentq(  # reference: scipy.stats.norm, median of |N(b, sigma^2)|
        lambda m: stats.norm.cdf((m - b) / sigma) - stats.norm.cdf((-m - b) / sigma) - 0.5, 0, 10
    )
    truth = {
        "mse": mse,
        "rmse": math.sqrt(mse),
        "mae": mae,
        "mape": mae * math.log(3) / 2,
        "r2": 1 - mse * 3,
        "explained_variance": 1 - sigma * sigma * 3,
        "median_absolute_error": median,
    }
    rng = np.random.default_rng(2024)
    n, k, draws = 500, 3, 1000
    hits = dict.fromkeys(truth, 0)
    for _ in range(draws):
        y = rng.uniform(1, 3, n)
        r = b + s * rng.normal(size=n) + t * rng.normal(size=(k, n))
        intervals = regression_report(y, y + r).intervals
        for name, value in truth.items():
            hits[name] += int(intervals[name].low <= value <= intervals[name].high)
    coverage = {name: h / draws for name, h in hits.items()}
    assert 0.93 <= coverage["mse"] <= 0.97
    assert 0.93 <= coverage["mae"] <= 0.97
    for name in ("rmse", "mape", "r2", "explained_variance"):
        assert 0.92 <= coverage[name] <= 0.98, (name, coverage[name])
    # the seed-mean median interval is conservative by construction
    assert coverage["median_absolute_error"] >= 0.93


# ------------------------------------------------------------------------------ fast paths


BAD_VALUES = [np.nan, np.inf, -np.inf]


@pytest.mark.parametrize("bad", BAD_VALUES)
@pytest.mark.parametrize("n", [5, 70_000])  # below and above the bracketed median's size
def test_non_finite_predictions_are_named_though_checked_through_sums(bad: float, n: int) -> None:
    # The report and the metrics check predictions through the sums of squares they take
    # anyway; a NaN or infinite value must still raise the named input error, whichever
    # seed, row and weight it sits on (a zero weight must not hide it).
    rng = np.random.default_rng(40)
    y = rng.normal(size=n)
    preds = y + rng.normal(size=(3, n))
    preds[2, n - 1] = bad
    w = np.ones(n)
    w[n - 1] = 0.0
    calls = [
        lambda: regression_metrics(y, preds),
        lambda: regression_metrics(y, preds, sample_weight=w),
        lambda: regression_row_losses(y, preds),
        lambda: regression_report(y, preds),
        lambda: regression_report(y, preds, sample_weight=w),
    ]
    for call in calls:
        with pytest.raises(ScoringInputError, match="NaN or infinity") as err:
            call()
        assert err.value.field == "predictions"
    with pytest.raises(ScoringInputError, match="NaN or infinity") as err:
        regression_report(y, y + 0.1, train_y_true=y, train_predictions=preds)
    assert err.value.field == "train_predictions"


def test_both_infinities_in_one_seed_are_caught() -> None:
    # +inf and -inf residuals: their squares are both +inf, so the sum cannot cancel to a
    # finite value (a plain sum of residuals would give NaN, also caught)
    y = np.zeros(6)
    preds = np.array([[1.0, np.inf, -np.inf, 2.0, 3.0, 4.0]])
    with pytest.raises(ScoringInputError) as err:
        regression_report(y, preds)
    assert err.value.field == "predictions"


@pytest.mark.parametrize("bad", BAD_VALUES)
def test_non_finite_targets_are_named(bad: float) -> None:
    y = np.array([1.0, 2.0, bad, 4.0])
    for call in (regression_metrics, regression_row_losses, regression_report):
        with pytest.raises(ScoringInputError, match="NaN or infinity") as err:
            call(y, np.ones((2, 4)))
        assert err.value.field == "y_true"
    with pytest.raises(ScoringInputError) as err:
        regression_report(np.ones(4), np.ones(4), train_y_true=y, train_predictions=np.ones(4))
    assert err.value.field == "train_y_true"


def test_huge_finite_values_overflow_into_the_named_overflow_error() -> None:
    # finite input whose squared errors (or the seed mean) overflow: the elementwise check
    # passes, so the report raises its overflow error and the metrics are inf (as sklearn)
    y = np.array([0.0, 1.0, 2.0, 3.0])
    cases = [
        np.array([[3e154, 1.0, 2.0, 3.0], [0.0, 1.0, 2.0, 3.0]]),  # r^2 overflows
        np.array([[1.7e308, 1.0, 2.0, 3.0], [-1.7e308, 1.0, 2.0, 3.0]]),  # r^2 overflows
        np.array([[1e308, 1.0, 2.0, 3.0], [1e308, 1.0, 2.0, 3.0]]),  # the seed sum too
    ]
    for preds in cases:
        got = regression_metrics(y, preds)
        assert got["mse"][0] == math.inf
        with np.errstate(over="ignore"):  # sklearn warns on the overflow
            assert skm.mean_squared_error(y, preds[0]) == math.inf  # reference: sklearn
        with pytest.raises(ScoringInputError, match="overflow") as err:
            regression_report(y, preds)
        assert err.value.field == "predictions"
        with pytest.raises(ScoringInputError, match="overflow") as err:
            regression_report(y, y, train_y_true=y, train_predictions=preds)
        assert err.value.field == "train_predictions"
    # finite squares that only the sum over rows overflows are the same overflow
    y = np.zeros(4)
    preds = np.full((1, 4), 1e154)
    with pytest.raises(ScoringInputError, match="overflow"):
        regression_report(y, preds)


def test_tallied_below_counts_survive_many_blocks(monkeypatch) -> None:
    # small blocks so that the uint8 tally of "below the bracket" counts is added up more
    # than once (every 255 blocks); the medians and their intervals stay exact
    from service.scoring import regression

    monkeypatch.setattr(regression, "_BLOCK_VALUES", 256)
    monkeypatch.setattr(regression, "_MIN_BLOCK_ROWS", 8)
    monkeypatch.setattr(regression, "_BRACKET_MIN_ROWS", 4096)
    monkeypatch.setattr(regression, "_SAMPLE_SIZE", 2048)
    rng = np.random.default_rng(41)
    n = 60_001
    y = rng.normal(size=n)
    preds = y + rng.standard_t(3, size=(2, n))
    got = regression.regression_metrics(y, preds)
    for k in range(2):
        # reference: sklearn.metrics.median_absolute_error
        ref = skm.median_absolute_error(y, preds[k])
        assert got["median_absolute_error"][k] == pytest.approx(ref, rel=RTOL)
    level = 0.9
    report = regression.regression_report(y, preds, options=ScoringOptions(level=level))
    # reference: scipy.stats.quantile_test(...).confidence_interval (binomial ranks)
    cis = [stats.quantile_test(np.abs(p - y), p=0.5).confidence_interval(level) for p in preds]
    iv = report.intervals["median_absolute_error"]
    assert iv.low == pytest.approx(np.mean([c.low for c in cis]), rel=1e-15)
    assert iv.high == pytest.approx(np.mean([c.high for c in cis]), rel=1e-15)
    # reference: sklearn.metrics.median_absolute_error on the seed-averaged prediction
    ens = skm.median_absolute_error(y, preds.mean(axis=0))
    assert report.ensemble["median_absolute_error"] == pytest.approx(ens, rel=RTOL)


def test_aligned_scratch_buffers_start_on_a_cache_line() -> None:
    from service.scoring.regression import _ALIGN_BYTES, _aligned_empty

    for size in (1, 7, 1000, 12_345):
        buf = _aligned_empty(size)
        assert buf.shape == (size,) and buf.dtype == np.float64
        assert buf.ctypes.data % _ALIGN_BYTES == 0


def test_report_with_row_losses_is_the_report_and_the_row_losses(diabetes_runs) -> None:
    from service.scoring.regression import regression_report_with_row_losses

    y, preds, y_tr, preds_tr = diabetes_runs
    w = np.random.default_rng(42).uniform(0.5, 2.0, size=y.size)
    for kwargs in ({}, {"sample_weight": w}, {"train_y_true": y_tr, "train_predictions": preds_tr}):
        report, rows = regression_report_with_row_losses(y, preds, **kwargs)
        assert to_jsonable(report) == to_jsonable(regression_report(y, preds, **kwargs))
        # to the bit what the service would otherwise compute in a second pass
        np.testing.assert_array_equal(rows, regression_row_losses(y, preds))
        # reference: numpy, the definition (common practice): mean over seeds of (p - y)^2
        np.testing.assert_allclose(rows, ((preds - y) ** 2).mean(axis=0), rtol=1e-14)
    # the report itself carries no per-row values
    flat = json_leaves(to_jsonable(report))
    assert all(not (isinstance(v, list) and len(v) >= y.size) for v in flat)


def json_leaves(value):
    """Every list and scalar inside a JSON-like value."""
    if isinstance(value, dict):
        for v in value.values():
            yield from json_leaves(v)
    elif isinstance(value, list):
        yield value
        for v in value:
            yield from json_leaves(v)
    else:
        yield value


def _count_direct_decompositions(monkeypatch) -> list[int]:
    from service.scoring import decomposition

    calls = [0]
    direct = decomposition._squared_loss_checked

    def counted(*args, **kwargs):
        calls[0] += 1
        return direct(*args, **kwargs)

    monkeypatch.setattr(decomposition, "_squared_loss_checked", counted)
    return calls


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("n,k", [(50, 2), (5000, 7), (100_000, 3)])
def test_report_decomposition_from_the_pass_agrees_with_the_direct_method(
    monkeypatch, weighted: bool, n: int, k: int
) -> None:
    # where the variance is a fair share of the loss, the report takes it as mean MSE over
    # seeds minus the ensemble's MSE (the identity) instead of a second pass; it must agree
    # with the direct two-pass method to 1e-10 relative
    rng = np.random.default_rng(n + k + weighted)
    y = rng.normal(3.0, 2.0, size=n)
    preds = y + 0.3 + 0.6 * rng.normal(size=n) + rng.uniform(0.05, 0.5) * rng.normal(size=(k, n))
    w = rng.uniform(0.0, 2.0, size=n) if weighted else None
    direct = squared_loss_decomposition(y, preds, sample_weight=w, noise_variance=0.1)
    calls = _count_direct_decompositions(monkeypatch)
    got = regression_report(y, preds, sample_weight=w, noise_variance=0.1).bias_variance[
        "squared"
    ]
    assert calls[0] == 0  # the identity was used
    for name in ("expected_loss", "bias", "variance", "variance_share", "ensemble_loss"):
        assert getattr(got, name) == pytest.approx(getattr(direct, name), rel=1e-10), name
    assert got.noise == direct.noise == 0.1
    # reference: sklearn.metrics.mean_squared_error per seed and of the seed mean; numpy.var
    # over seeds (ddof=0) averaged over rows (Geman et al. 1992)
    expected = np.mean([skm.mean_squared_error(y, p, sample_weight=w) for p in preds])
    ensemble = skm.mean_squared_error(y, preds.mean(axis=0), sample_weight=w)
    variance = np.average(np.var(preds, axis=0), weights=w)
    assert got.expected_loss == pytest.approx(expected, rel=1e-12)
    assert got.ensemble_loss == pytest.approx(ensemble, rel=1e-12)
    assert got.variance == pytest.approx(variance, rel=1e-10)


def test_report_decomposition_is_accurate_on_numacc_seeds_and_tiny_variances(
    monkeypatch,
) -> None:
    # NIST StRD NumAcc4-style seeds (offset 1e7, spread 0.1; values from memory): the
    # report's ensemble residual is the mean of the seeds' residuals, which carries no
    # rounding at the offset's scale, so whichever method it takes the variance must match
    # exact rational arithmetic (fractions) on the float64 values actually passed
    from fractions import Fraction

    seeds = np.array([10000000.2] + [10000000.1, 10000000.3] * 500)
    n_rows = 4
    preds = np.tile(seeds[:, np.newaxis], (1, n_rows))
    y = np.full(n_rows, 10000000.2)
    calls = _count_direct_decompositions(monkeypatch)
    got = regression_report(y, preds).bias_variance["squared"]
    exact = [Fraction(x) for x in seeds.tolist()]
    mean = sum(exact) / len(exact)
    variance = sum((x - mean) ** 2 for x in exact) / len(exact)
    assert got.variance == pytest.approx(float(variance), rel=1e-12)
    # a tiny variance beside a large loss cannot be had from the difference of losses to
    # 1e-10: the report must take the direct two-pass method
    before = calls[0]
    rng = np.random.default_rng(43)
    y = rng.normal(size=1000)
    preds = y + 5.0 + 1e-6 * rng.normal(size=(3, 1000))
    got = regression_report(y, preds).bias_variance["squared"]
    assert calls[0] == before + 1
    # reference: numpy.var over seeds (ddof=0) averaged over rows
    assert got.variance == pytest.approx(np.var(preds, axis=0).mean(), rel=1e-9)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("blocks", ["default", "many_sorted"])
def test_r2_and_explained_variance_intervals_are_the_delta_method_written_out(
    monkeypatch, weighted: bool, blocks: str
) -> None:
    # the report forms these intervals from the pass's sums and the co-moments it gathers
    # block by block; here they are written out from their definitions and the statsmodels
    # normal interval. "many_sorted": rows sorted by target and tiny blocks, so that block
    # means differ widely (the block-combination formula at work), and with weights one
    # block of zero weight
    from service.scoring import regression

    rng = np.random.default_rng(44 + weighted)
    n, k = 3000, 3
    y = rng.gamma(3.0, size=n)
    preds = y + 0.3 + 0.8 * rng.normal(size=n) + 0.5 * rng.normal(size=(k, n))
    preds += 0.1 * y * rng.normal(size=n)  # errors that grow with the target
    w = rng.uniform(0.2, 2.0, size=n) if weighted else None
    if blocks == "many_sorted":
        monkeypatch.setattr(regression, "_BLOCK_VALUES", 64)
        monkeypatch.setattr(regression, "_MIN_BLOCK_ROWS", 16)
        order = np.argsort(y)
        y, preds = y[order], preds[:, order]
        if w is not None:
            w[:40] = 0.0
    level = 0.9
    wsum = float(n) if w is None else float(w.sum())
    n_eff = float(n) if w is None else wsum**2 / float((w**2).sum())
    scaled = None if w is None else w * n_eff / wsum
    b = (y - np.average(y, weights=w)) ** 2
    r = preds - y
    rbar = np.average(r, axis=1, weights=w)

    def delta(a: np.ndarray) -> tuple[float, float]:
        ratio = np.average(a, weights=w) / np.average(b, weights=w)
        influence = (a - ratio * b) / np.average(b, weights=w)
        # reference: statsmodels DescrStatsW.zconfint_mean of the linearization (Kish's n)
        low, high = DescrStatsW(influence, weights=scaled).zconfint_mean(alpha=1 - level)
        half = (high - low) / 2
        return 1 - (ratio + half), 1 - (ratio - half)

    options = ScoringOptions(level=level)
    report = regression.regression_report(y, preds, sample_weight=w, options=options)
    iv = report.intervals["r2"]
    assert (iv.low, iv.high) == pytest.approx(delta((r**2).mean(axis=0)), rel=1e-10)
    # and the normal intervals of the per-row means, the same way
    for name, rows in [
        ("mse", (r**2).mean(axis=0)),
        ("mae", np.abs(r).mean(axis=0)),
        ("mape", np.abs(r).mean(axis=0) / np.maximum(np.abs(y), MAPE_EPSILON)),
    ]:
        # reference: statsmodels DescrStatsW.zconfint_mean (weights rescaled to Kish's n)
        ref = DescrStatsW(rows, weights=scaled).zconfint_mean(alpha=1 - level)
        got = report.intervals[name]
        assert (got.low, got.high) == pytest.approx(ref, rel=1e-11), name
    # explained variance, exact form: a_i = mean_k (r_ki - rbar_k)^2
    monkeypatch.setattr(regression, "_EV_SHORTCUT_TOLERANCE", 0.0)
    report = regression.regression_report(y, preds, sample_weight=w, options=options)
    iv = report.intervals["explained_variance"]
    exact = ((r - rbar[:, None]) ** 2).mean(axis=0)
    assert (iv.low, iv.high) == pytest.approx(delta(exact), rel=1e-10)
    # the one-pass form: a'_i = u_i - 2 rho e_i + 2 rho^2 - mean_k rbar_k^2
    monkeypatch.setattr(regression, "_EV_SHORTCUT_TOLERANCE", math.inf)
    report = regression.regression_report(y, preds, sample_weight=w, options=options)
    iv = report.intervals["explained_variance"]
    rho = rbar.mean()
    e = preds.mean(axis=0) - y
    shortcut = (r**2).mean(axis=0) - 2 * rho * e + 2 * rho**2 - np.mean(rbar**2)
    assert (iv.low, iv.high) == pytest.approx(delta(shortcut), rel=1e-10)


def test_biased_seeds_take_the_two_pass_explained_variance_for_the_ensemble_too() -> None:
    # mean residual well above its spread: every row's explained variance numerator comes
    # from scikit-learn's two-pass formula, the ensemble's from its recomputed residuals
    rng = np.random.default_rng(45)
    n = 5000
    y = rng.normal(10.0, 2.0, size=n)
    preds = y + 3.0 + 0.5 * rng.normal(size=n) + 0.2 * rng.normal(size=(3, n))
    report = regression_report(y, preds)
    for k in range(3):
        # reference: sklearn.metrics.explained_variance_score
        ref = skm.explained_variance_score(y, preds[k])
        assert report.details["per_seed"]["explained_variance"][k] == pytest.approx(ref, rel=RTOL)
    ref = skm.explained_variance_score(y, preds.mean(axis=0))  # reference: sklearn
    assert report.ensemble["explained_variance"] == pytest.approx(ref, rel=RTOL)
