"""Overfitting flags: each fires on its case, stays silent on the opposite, and its numbers
come from the reference libraries (scipy, statsmodels, scikit-learn, mlxtend)."""

from __future__ import annotations

import numpy as np
import pytest
from mlxtend.evaluate import bias_variance_decomp
from scipy import stats
from sklearn.datasets import load_diabetes
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, Ridge
from sklearn.metrics import mean_squared_error
from sklearn.model_selection import train_test_split
from sklearn.tree import DecisionTreeRegressor
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

from service.scoring._checks import ScoringInputError
from service.scoring.flags import FLAG_CODES, overfitting_flags, welch_greater
from service.scoring.options import FlagThresholds
from service.scoring.results import Decomposition


@pytest.fixture(scope="module")
def diabetes():
    X, y = load_diabetes(return_X_y=True)
    return train_test_split(X, y, test_size=0.3, random_state=0)


def _row_losses(model, diabetes):
    X_tr, X_te, y_tr, y_te = diabetes
    model.fit(X_tr, y_tr)
    return (model.predict(X_te) - y_te) ** 2, (model.predict(X_tr) - y_tr) ** 2


def _baselines(diabetes):
    X_tr, X_te, y_tr, y_te = diabetes
    dummy = DummyRegressor().fit(X_tr, y_tr)  # the training mean
    # reference: sklearn.metrics.mean_squared_error of sklearn's DummyRegressor
    return (
        mean_squared_error(y_te, dummy.predict(X_te)),
        mean_squared_error(y_tr, dummy.predict(X_tr)),
    )


def _codes(flags):
    return [f.code for f in flags]


def _assert_plain_floats(flag):
    assert flag.evidence
    assert all(type(v) is float for v in flag.evidence.values()), flag.evidence


# ----------------------------------------------------------------------------- generalization gap


def test_gap_fires_on_a_deep_tree_with_scipy_welch_p_value(diabetes) -> None:
    test, train = _row_losses(DecisionTreeRegressor(max_depth=6, random_state=0), diabetes)
    flags = overfitting_flags(
        loss="squared", test_row_losses=test, train_row_losses=train, seed_losses=[test.mean()]
    )
    assert _codes(flags) == ["generalization_gap"]
    gap = flags[0]
    # reference: scipy.stats.ttest_ind, Welch's unequal-variance test, one-sided
    ref = stats.ttest_ind(test, train, equal_var=False, alternative="greater")
    assert gap.evidence["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert gap.evidence["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert gap.evidence["df"] == pytest.approx(ref.df, rel=1e-12)
    assert gap.evidence["test_loss"] == pytest.approx(test.mean(), rel=1e-12)
    assert gap.evidence["train_loss"] == pytest.approx(train.mean(), rel=1e-12)
    relative = (test.mean() - train.mean()) / train.mean()
    assert gap.evidence["relative_gap"] == pytest.approx(relative, rel=1e-12)
    assert relative >= 1.0 and gap.severity == "critical"
    _assert_plain_floats(gap)
    for key in ("test_loss", "train_loss", "p_value"):
        assert format(gap.evidence[key], ".4g") in gap.message


def test_critical_severity_thresholds_are_the_callers(diabetes) -> None:
    test, train = _row_losses(DecisionTreeRegressor(max_depth=6, random_state=0), diabetes)
    relative = (test.mean() - train.mean()) / train.mean()

    def severity(critical_relative: float) -> str:
        thresholds = FlagThresholds(gap_critical_relative=critical_relative)
        [gap] = overfitting_flags(
            loss="squared",
            test_row_losses=test,
            train_row_losses=train,
            seed_losses=[test.mean()],
            thresholds=thresholds,
        )
        return gap.severity

    assert severity(relative * 0.99) == "critical"
    assert severity(relative * 1.01) == "warning"


def test_gap_is_silent_on_a_linear_model_and_obeys_thresholds(diabetes) -> None:
    test, train = _row_losses(LinearRegression(), diabetes)
    kwargs = dict(loss="squared", test_row_losses=test, train_row_losses=train, seed_losses=[1.0])
    assert overfitting_flags(**kwargs) == []
    # reference: scipy.stats.ttest_ind (Welch, one-sided): this gap is not significant
    assert stats.ttest_ind(test, train, equal_var=False, alternative="greater").pvalue > 0.01

    tree_test, tree_train = _row_losses(DecisionTreeRegressor(max_depth=3, random_state=0),
                                        diabetes)
    kwargs.update(test_row_losses=tree_test, train_row_losses=tree_train)
    relative = (tree_test.mean() - tree_train.mean()) / tree_train.mean()
    p = stats.ttest_ind(tree_test, tree_train, equal_var=False, alternative="greater").pvalue
    # the caller's thresholds move the decision either way
    fires = FlagThresholds(gap_alpha=min(1.0, p * 2), gap_min_relative=relative * 0.9)
    assert _codes(overfitting_flags(**kwargs, thresholds=fires)) == ["generalization_gap"]
    too_strict_p = FlagThresholds(gap_alpha=p / 2, gap_min_relative=relative * 0.9)
    assert overfitting_flags(**kwargs, thresholds=too_strict_p) == []
    too_strict_gap = FlagThresholds(gap_alpha=min(1.0, p * 2), gap_min_relative=relative * 1.1)
    assert overfitting_flags(**kwargs, thresholds=too_strict_gap) == []


def test_gap_with_weights_matches_statsmodels_welch() -> None:
    rng = np.random.default_rng(4)
    test, train = rng.exponential(2.0, 90), rng.exponential(1.6, 120)
    w_test, w_train = rng.uniform(0.3, 2.0, 90), rng.uniform(0.3, 2.0, 120)
    ours = welch_greater(test, train, w_test, w_train)

    def kish(w):
        return w * (w.sum() / (w**2).sum())  # rescaled to sum to Kish's effective n

    # reference: statsmodels CompareMeans(...).ttest_ind(usevar="unequal"), weights rescaled
    ref = CompareMeans(DescrStatsW(test, weights=kish(w_test)),
                       DescrStatsW(train, weights=kish(w_train)))
    t, p, df = ref.ttest_ind(alternative="larger", usevar="unequal")
    assert ours["statistic"] == pytest.approx(t, rel=1e-10)
    assert ours["p_value"] == pytest.approx(p, rel=1e-10)
    assert ours["df"] == pytest.approx(df, rel=1e-10)
    flags = overfitting_flags(
        loss="absolute", test_row_losses=test, train_row_losses=train, seed_losses=[1.0],
        sample_weight=w_test, train_sample_weight=w_train,
        thresholds=FlagThresholds(gap_alpha=0.5, gap_min_relative=0.0),
    )
    assert flags[0].evidence["p_value"] == ours["p_value"]


def test_gap_on_a_memorized_training_set() -> None:
    # a fully grown tree reproduces its training targets: zero training loss
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.3, random_state=1)
    tree = DecisionTreeRegressor(random_state=0).fit(X_tr, y_tr)
    train = (tree.predict(X_tr) - y_tr) ** 2
    test = (tree.predict(X_te) - y_te) ** 2
    assert train.max() == 0.0
    [gap] = overfitting_flags(loss="squared", test_row_losses=test, train_row_losses=train,
                              seed_losses=[1.0])
    assert gap.evidence["relative_gap"] == float("inf") and gap.severity == "critical"
    # reference: scipy.stats.ttest_ind (Welch, one-sided)
    ref = stats.ttest_ind(test, train, equal_var=False, alternative="greater")
    assert gap.evidence["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)


# ----------------------------------------------------------------------------- underfit


def test_underfit_fires_on_a_nearly_constant_model(diabetes) -> None:
    test, train = _row_losses(Ridge(alpha=1e4), diabetes)
    base_test, base_train = _baselines(diabetes)
    flags = overfitting_flags(
        loss="squared", test_row_losses=test, train_row_losses=train,
        baseline_test_loss=base_test, baseline_train_loss=base_train, seed_losses=[test.mean()],
    )
    assert _codes(flags) == ["underfit"]
    flag = flags[0]
    # reference: sklearn.metrics.mean_squared_error of the model and of DummyRegressor
    X_tr, X_te, y_tr, y_te = diabetes
    ridge = Ridge(alpha=1e4).fit(X_tr, y_tr)
    test_ratio = mean_squared_error(y_te, ridge.predict(X_te)) / base_test
    train_ratio = mean_squared_error(y_tr, ridge.predict(X_tr)) / base_train
    assert flag.evidence["test_ratio"] == pytest.approx(test_ratio, rel=1e-12)
    assert flag.evidence["train_ratio"] == pytest.approx(train_ratio, rel=1e-12)
    assert flag.severity == ("critical" if test_ratio >= 1.0 else "warning")
    _assert_plain_floats(flag)
    assert format(flag.evidence["test_loss"], ".4g") in flag.message
    assert format(flag.evidence["baseline_test_loss"], ".4g") in flag.message
    # the caller's ratio decides
    strict = FlagThresholds(underfit_ratio=max(test_ratio, train_ratio) * 1.01)
    assert overfitting_flags(
        loss="squared", test_row_losses=test, train_row_losses=train,
        baseline_test_loss=base_test, baseline_train_loss=base_train, seed_losses=[1.0],
        thresholds=strict,
    ) == []


def test_underfit_is_silent_on_a_linear_model_or_without_a_baseline(diabetes) -> None:
    test, train = _row_losses(LinearRegression(), diabetes)
    base_test, base_train = _baselines(diabetes)
    common = dict(loss="squared", test_row_losses=test, seed_losses=[1.0])
    assert overfitting_flags(**common, baseline_test_loss=base_test) == []
    assert overfitting_flags(**common) == []
    assert overfitting_flags(**common, baseline_test_loss=0.0) == []
    # test side alone is not enough when the training side is given and learned something
    flat_test, _ = _row_losses(Ridge(alpha=1e4), diabetes)
    assert overfitting_flags(
        loss="squared", test_row_losses=flat_test, train_row_losses=train,
        baseline_test_loss=base_test, baseline_train_loss=base_train, seed_losses=[1.0],
        thresholds=FlagThresholds(gap_alpha=1e-300),
    ) == []


# ----------------------------------------------------------------------------- variance share


@pytest.fixture(scope="module")
def mlxtend_decompositions(diabetes):
    X_tr, X_te, y_tr, y_te = diabetes
    out = {}
    for name, est in (("tree", DecisionTreeRegressor(random_state=0)),
                      ("linear", LinearRegression())):
        # reference: mlxtend.evaluate.bias_variance_decomp (loss="mse"), 5 bootstrap rounds
        expected, bias, variance = bias_variance_decomp(
            est, X_tr, y_tr, X_te, y_te, loss="mse", num_rounds=5, random_seed=1
        )
        out[name] = Decomposition("squared", expected, bias, variance, variance / expected,
                                  bias)
    return out


def test_variance_dominated_follows_the_threshold(mlxtend_decompositions) -> None:
    tree, linear = mlxtend_decompositions["tree"], mlxtend_decompositions["linear"]
    assert tree.variance_share > 0.2 > linear.variance_share  # about 0.32 and 0.06
    lenient = FlagThresholds(variance_share=0.2)
    seeds = [1.0, 1.0, 1.0]
    [flag] = overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                               decomposition=tree, seed_losses=seeds, thresholds=lenient)
    assert flag.code == "variance_dominated" and flag.severity == "warning"
    assert flag.evidence["share"] == tree.variance_share
    assert flag.evidence["variance"] == tree.variance and flag.evidence["bias"] == tree.bias
    _assert_plain_floats(flag)
    assert format(100 * tree.variance_share, ".4g") in flag.message
    assert format(tree.variance, ".4g") in flag.message
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                             decomposition=linear, seed_losses=seeds, thresholds=lenient) == []
    # default threshold 0.5: neither is variance-dominated
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                             decomposition=tree, seed_losses=seeds) == []
    # one seed: no variance to speak of, never flagged
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                             decomposition=tree, seed_losses=[1.0], thresholds=lenient) == []


# ----------------------------------------------------------------------------- seed instability


def test_seed_instability_fires_and_uses_scipy_variation() -> None:
    seeds = np.array([0.8, 1.3, 1.0, 0.6])
    [flag] = overfitting_flags(loss="zero_one", test_row_losses=[0.0, 1.0], seed_losses=seeds)
    assert flag.code == "seed_instability" and flag.severity == "warning"
    # reference: scipy.stats.variation with ddof=1 (sd / mean)
    assert flag.evidence["cv"] == pytest.approx(stats.variation(seeds, ddof=1), rel=1e-12)
    assert flag.evidence["min"] == 0.6 and flag.evidence["max"] == 1.3
    _assert_plain_floats(flag)
    for key in ("cv", "min", "max"):
        assert format(flag.evidence[key], ".4g") in flag.message
    # the caller's threshold decides
    cv = flag.evidence["cv"]
    assert overfitting_flags(loss="zero_one", test_row_losses=[0.0, 1.0], seed_losses=seeds,
                             thresholds=FlagThresholds(instability_cv=cv * 1.01)) == []


def test_seed_instability_is_silent_when_stable_or_single() -> None:
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                             seed_losses=[1.0, 1.01, 0.99]) == []
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0], seed_losses=[5.0]) == []
    assert overfitting_flags(loss="squared", test_row_losses=[1.0, 2.0],
                             seed_losses=[0.0, 0.0]) == []


# ----------------------------------------------------------------------------- together


def test_flags_come_in_a_stable_order(diabetes, mlxtend_decompositions) -> None:
    test, train = _row_losses(DecisionTreeRegressor(max_depth=6, random_state=0), diabetes)
    base_test, base_train = _baselines(diabetes)
    flags = overfitting_flags(
        loss="squared", test_row_losses=test, train_row_losses=train,
        baseline_test_loss=base_test * 0.5, baseline_train_loss=train.mean() * 0.5,
        decomposition=mlxtend_decompositions["tree"], seed_losses=[1.0, 2.0, 3.0],
        thresholds=FlagThresholds(variance_share=0.2),
    )
    assert _codes(flags) == list(FLAG_CODES)
    for flag in flags:
        _assert_plain_floats(flag)  # numpy scalars in, plain floats out
    assert {f.severity for f in flags} <= {"info", "warning", "critical"}


def test_no_evidence_no_flags() -> None:
    assert overfitting_flags(loss="squared", test_row_losses=[3.0], seed_losses=[3.0]) == []
    # one training row: no variance on that side, the gap test is skipped
    assert overfitting_flags(loss="squared", test_row_losses=[3.0, 4.0, 5.0],
                             train_row_losses=[0.0], seed_losses=[4.0]) == []


def test_bad_inputs_name_the_field() -> None:
    with pytest.raises(ScoringInputError, match="seed_losses"):
        overfitting_flags(loss="squared", test_row_losses=[1.0], seed_losses=[])
    with pytest.raises(ScoringInputError, match="train_sample_weight"):
        overfitting_flags(loss="squared", test_row_losses=[1.0], train_row_losses=[1.0, 2.0],
                          train_sample_weight=[1.0], seed_losses=[1.0])
    with pytest.raises(ScoringInputError, match="test_row_losses"):
        overfitting_flags(loss="squared", test_row_losses=[np.inf], seed_losses=[1.0])
