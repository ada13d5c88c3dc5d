"""Gates and verdicts: the grammar, every status path, and each paired test against
scipy, statsmodels and scikit-learn on the same arrays (scikit-learn's bundled datasets with
real models)."""

from __future__ import annotations

import math
import operator

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.metrics import (
    brier_score_loss,
    log_loss,
    mean_absolute_error,
    mean_absolute_percentage_error,
    mean_squared_error,
    r2_score,
    roc_auc_score,
    root_mean_squared_error,
)
from sklearn.model_selection import cross_val_predict, train_test_split
from sklearn.naive_bayes import GaussianNB
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.tree import DecisionTreeRegressor
from statsmodels.stats._delta_method import NonlinearDeltaCov
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.weightstats import ttost_paired

from service.scoring import (
    ScoringInputError,
    ScoringOptions,
    catalog,
    classification_report,
    classification_row_losses,
    mcnemar_test,
    regression_report,
    regression_row_losses,
    to_jsonable,
)
from service.scoring.comparison import MCNEMAR_EXACT_BELOW
from service.scoring.results import Comparison, Flag, Interval
from service.scoring.verdict import (
    BoundGate,
    CompareGate,
    FlagGate,
    GateSpecError,
    Verdict,
    compare_for_gate,
    evaluate_gates,
    parse_gates,
    plan_comparison,
)

# ------------------------------------------------------------------------------ data


@pytest.fixture(scope="module")
def diabetes_pair():
    """Out-of-fold predictions of two real models on all 442 diabetes rows."""
    X, y = load_diabetes(return_X_y=True)
    full = cross_val_predict(LinearRegression(), X, y, cv=5)
    two = cross_val_predict(LinearRegression(), X[:, [2, 8]], y, cv=5)
    return y, full, two


@pytest.fixture(scope="module")
def diabetes_seeds():
    """Five bootstrap fits of two models each, predicting a held-out split (K = 5)."""
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.4, random_state=3)
    rng = np.random.default_rng(11)
    full, two = [], []
    for _ in range(5):
        idx = rng.integers(0, y_tr.size, y_tr.size)
        full.append(LinearRegression().fit(X_tr[idx], y_tr[idx]).predict(X_te))
        cols = [2, 8]
        two.append(LinearRegression().fit(X_tr[idx][:, cols], y_tr[idx]).predict(X_te[:, cols]))
    return y_te, np.array(full), np.array(two)


@pytest.fixture(scope="module")
def cancer_pair():
    X, y = load_breast_cancer(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.4, random_state=0)
    logistic = make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000))
    bayes = GaussianNB()
    return y_te, logistic.fit(X_tr, y_tr), bayes.fit(X_tr, y_tr), X_te, (X_tr, y_tr)


def _gate(raw: dict, task: str = "regression"):
    (gate,) = parse_gates([raw], task=task)
    return gate


# ------------------------------------------------------------------------------ grammar


def test_parse_every_kind_with_defaults() -> None:
    raw = [
        {"metric": "rmse", "op": "<=", "value": 3.2},
        {"metric": "variance_share", "op": "<=", "value": 0.5, "severity": "warn"},
        {"metric": "bias_variance.squared.ensemble_loss", "op": "<", "value": 10},
        {"flag": "generalization_gap"},
        {"flag": "underfit", "min_severity": "critical", "severity": "warn"},
        {"compare": "non_inferior", "metric": "rmse", "margin": 0.05, "alpha": 0.025},
        {"compare": "superior", "metric": "r2"},
    ]
    gates = parse_gates(raw, task="regression")
    assert gates[0] == BoundGate("rmse", "<=", 3.2, "fail", (), None, raw[0])
    assert gates[1].losses == ("squared",) and gates[1].term == "variance_share"
    assert gates[1].severity == "warn"
    assert gates[2].losses == ("squared",) and gates[2].term == "ensemble_loss"
    assert gates[2].value == 10.0 and isinstance(gates[2].value, float)
    assert gates[3] == FlagGate("generalization_gap", "warning", "fail", raw[3])
    assert gates[4] == FlagGate("underfit", "critical", "warn", raw[4])
    assert gates[5] == CompareGate("non_inferior", "rmse", 0.05, 0.025, "fail", raw[5])
    assert gates[5].level == pytest.approx(0.95)
    assert gates[6] == CompareGate("superior", "r2", 0.0, 0.05, "fail", raw[6])
    # the gate is kept as written, and is a copy
    raw[0]["value"] = 99
    assert gates[0].given["value"] == 3.2


def test_shorthand_and_addresses_by_task() -> None:
    (short,) = parse_gates([{"metric": "bias", "op": "<", "value": 1}], task="binary")
    assert short.losses == ("log", "zero_one") and short.term == "bias"
    (net,) = parse_gates(
        [{"metric": "bias_variance.zero_one.net_variance", "op": "<", "value": 0.1}],
        task="multiclass",
    )
    assert net.losses == ("zero_one",) and net.term == "net_variance"
    assert parse_gates(None, task="regression") == []
    assert parse_gates([], task="binary") == []


_VALID = {"metric": "mse", "op": "<", "value": 1.0}


@pytest.mark.parametrize(
    "task, gate, field, fragment",
    [
        ("regression", {"metric": "accuracy", "op": "<", "value": 1}, "metric", "not a metric"),
        ("binary", {"metric": "rmse", "op": "<", "value": 1}, "metric", "binary holdout"),
        ("regression", {"metric": "max_error", "op": "<", "value": 1}, "metric", "residual"),
        ("regression", {"op": "<", "value": 1, "metric": None}, "metric", "not a metric"),
        ("regression", {"metric": "mse", "op": "=<", "value": 1}, "op", "'<='"),
        ("regression", {"metric": "mse", "value": 1}, "op", "required"),
        ("regression", {"metric": "mse", "op": "<"}, "value", "required"),
        ("regression", {"metric": "mse", "op": "<", "value": True}, "value", "finite number"),
        ("regression", {"metric": "mse", "op": "<", "value": "3"}, "value", "finite number"),
        ("regression", {"metric": "mse", "op": "<", "value": math.inf}, "value", "finite"),
        ("regression", {**_VALID, "severity": "error"}, "severity", "'fail', 'warn'"),
        ("regression", {**_VALID, "bound": 3}, "bound", "unknown key"),
        ("regression", {"metric": "bias_variance.log.bias", "op": "<", "value": 1}, "metric",
         "no 'log' decomposition"),
        ("regression", {"metric": "bias_variance.squared", "op": "<", "value": 1}, "metric",
         "bias_variance.<loss>.<term>"),
        ("regression", {"metric": "bias_variance.squared.nope", "op": "<", "value": 1},
         "metric", "unknown term"),
        ("binary", {"metric": "bias_variance.log.net_variance", "op": "<", "value": 1},
         "metric", "unknown term"),
        ("regression", {"flag": "overfit"}, "flag", "generalization_gap"),
        ("regression", {"flag": "underfit", "min_severity": "info"}, "min_severity", "warning"),
        ("regression", {"flag": "underfit", "metric": "mse"}, "metric", "unknown key"),
        ("regression", {"compare": "better", "metric": "mse"}, "compare", "non_inferior"),
        ("regression", {"compare": "non_inferior", "metric": "mse"}, "margin", "required"),
        ("regression", {"compare": "non_inferior", "metric": "mse", "margin": -0.1}, "margin",
         ">= 0"),
        ("regression", {"compare": "non_inferior", "metric": "mse", "margin": math.nan},
         "margin", ">= 0"),
        ("regression", {"compare": "superior", "metric": "mse", "margin": 0.1}, "margin",
         "takes no margin"),
        ("regression", {"compare": "superior", "metric": "mse", "alpha": 0}, "alpha", "(0, 0.5)"),
        ("regression", {"compare": "superior", "metric": "mse", "alpha": 0.5}, "alpha",
         "(0, 0.5)"),
        ("regression", {"compare": "superior", "metric": "mse", "alpha": 0.7}, "alpha",
         "(0, 0.5)"),
        ("regression", {"compare": "superior", "metric": "mse", "alpha": -0.1}, "alpha",
         "(0, 0.5)"),
        ("regression", {"compare": "superior", "metric": "mse", "alpha": True}, "alpha",
         "(0, 0.5)"),
        ("regression", {"compare": "superior"}, "metric", "required"),
        ("binary", {"compare": "superior", "metric": "mse"}, "metric", "not a metric"),
        ("regression", {"compare": "superior", "metric": "median_absolute_error"}, "metric",
         "residual"),
    ],
)
def test_parse_errors_name_the_gate_and_field(task, gate, field, fragment) -> None:
    valid = _VALID if task == "regression" else {"metric": "accuracy", "op": ">", "value": 0.5}
    with pytest.raises(GateSpecError) as info:
        parse_gates([valid, gate], task=task)
    err = info.value
    assert isinstance(err, ScoringInputError) and isinstance(err, ValueError)
    assert err.field == f"gates[1].{field}"
    assert fragment in err.message
    assert all(where.startswith("gates[1]") for where, _ in err.problems)


def test_parse_collects_every_problem_at_once() -> None:
    with pytest.raises(GateSpecError) as info:
        parse_gates(
            [
                "rmse <= 3",
                {},
                {"metric": "rmse", "op": "<=", "value": 3},
                {"compare": "non_inferior", "metric": "rmse", "margin": -1, "alpha": 2},
            ],
            task="regression",
        )
    fields = [where for where, _ in info.value.problems]
    assert fields == ["gates[0]", "gates[1]", "gates[3].margin", "gates[3].alpha"]
    assert "gates[3].alpha" in str(info.value)
    with pytest.raises(GateSpecError) as whole:
        parse_gates({"metric": "rmse"}, task="regression")  # type: ignore[arg-type]
    assert whole.value.field == "gates"
    with pytest.raises(ValueError, match="task"):
        parse_gates([], task="ranking")


def test_parse_refuses_comparisons_the_stored_row_losses_cannot_decide() -> None:
    ok = parse_gates(
        [
            {"compare": "superior", "metric": m}
            for m in ("mse", "rmse", "r2")
        ],
        task="regression",
        comparable_row_losses={"squared"},
    )
    assert [g.metric for g in ok] == ["mse", "rmse", "r2"]
    with pytest.raises(GateSpecError) as info:
        parse_gates(
            [{"compare": "superior", "metric": "mae"}],
            task="regression",
            comparable_row_losses={"squared"},
        )
    assert info.value.field == "gates[0].metric"
    assert "mse, rmse, r2" in info.value.message
    (acc,) = parse_gates(
        [{"compare": "superior", "metric": "accuracy"}],
        task="binary",
        comparable_row_losses={"zero_one"},
    )
    assert acc.metric == "accuracy"
    with pytest.raises(GateSpecError, match="accuracy"):
        parse_gates(
            [{"compare": "superior", "metric": "log_loss"}],
            task="binary",
            comparable_row_losses={"zero_one"},
        )


def test_plans_cover_every_metric() -> None:
    for name in catalog.METRICS:
        plan = plan_comparison(name)
        assert plan.method in ("paired_t", "paired_t_delta", "mcnemar", "paired_bootstrap")
        if plan.row_loss is not None:
            assert plan.row_loss in catalog.ROW_LOSSES
    with pytest.raises(ValueError):
        plan_comparison("nope")


# ------------------------------------------------------------------------ status paths


def test_no_gates_pass_with_no_reasons() -> None:
    verdict = evaluate_gates([], scores={"rmse": 1.0}, bias_variance={}, flags=[])
    assert verdict == Verdict("pass", [])


@pytest.mark.parametrize("op", ["<", "<=", ">", ">="])
def test_bound_operators_at_and_around_the_bound(op) -> None:
    # reference: Python's operator module (the op's meaning is the language's comparison)
    fn = {"<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge}[op]
    gate = _gate({"metric": "rmse", "op": op, "value": 3.2})
    for value in (3.1, 3.2, 3.3):
        verdict = evaluate_gates([gate], scores={"rmse": value}, bias_variance={}, flags=[])
        expected = "pass" if fn(value, 3.2) else "fail"
        assert verdict.status == expected
        (reason,) = verdict.reasons
        assert (reason.status, reason.metric, reason.value, reason.bound) == (
            expected, "rmse", value, 3.2
        )
        assert ("meets" if expected == "pass" else "does not meet") in reason.message
        assert reason.gate == {"metric": "rmse", "op": op, "value": 3.2}


def test_fail_beats_warn_beats_pass() -> None:
    fail_gate = _gate({"metric": "rmse", "op": "<=", "value": 3.0})
    warn_gate = _gate({"metric": "mae", "op": "<=", "value": 2.0, "severity": "warn"})
    ok_gate = _gate({"metric": "r2", "op": ">=", "value": 0.1})

    def status(scores):
        return evaluate_gates(
            [fail_gate, warn_gate, ok_gate], scores=scores, bias_variance={}, flags=[]
        )

    assert status({"rmse": 2.0, "mae": 1.0, "r2": 0.5}).status == "pass"
    assert status({"rmse": 2.0, "mae": 2.5, "r2": 0.5}).status == "warn"
    both = status({"rmse": 3.5, "mae": 2.5, "r2": 0.5})
    assert both.status == "fail"
    assert [r.status for r in both.reasons] == ["fail", "warn", "pass"]


@pytest.mark.parametrize("scores", [{}, {"rmse": None}, {"rmse": math.nan}])
def test_a_missing_value_warns_even_on_a_fail_gate(scores) -> None:
    gate = _gate({"metric": "rmse", "op": "<=", "value": 3.0})
    verdict = evaluate_gates([gate], scores=scores, bias_variance={}, flags=[])
    assert verdict.status == "warn"
    (reason,) = verdict.reasons
    assert reason.value is None and "not available" in reason.message


def test_bias_variance_gates_read_the_core_report(diabetes_seeds) -> None:
    y, full, two = diabetes_seeds
    report = regression_report(y, two, options=ScoringOptions(n_resamples=100))
    decomposition = report.bias_variance["squared"]
    gates = parse_gates(
        [
            {"metric": "variance_share", "op": "<=", "value": 0.5},
            {"metric": "bias", "op": "<", "value": decomposition.bias},
            {"metric": "bias_variance.squared.expected_loss", "op": ">=", "value": 0.0},
            {"metric": "rmse", "op": "<=", "value": 1e6},
        ],
        task="regression",
    )
    for bv in (report.bias_variance, to_jsonable(report.bias_variance)):
        verdict = evaluate_gates(gates, scores=report.scores, bias_variance=bv, flags=[])
        share, bias, expected, rmse = verdict.reasons
        assert share.value == decomposition.variance_share
        assert share.metric == "bias_variance.squared.variance_share"
        assert share.status == ("pass" if decomposition.variance_share <= 0.5 else "fail")
        assert bias.status == "fail" and bias.value == decomposition.bias  # not < itself
        # reference: the decomposition's expected loss is the mean MSE over seeds
        # (sklearn.metrics.mean_squared_error per seed)
        assert expected.value == pytest.approx(
            np.mean([mean_squared_error(y, p) for p in two]), rel=1e-12
        )
        # reference: sklearn.metrics.mean_squared_error; rmse = sqrt(mean MSE over seeds)
        assert rmse.value == pytest.approx(
            math.sqrt(np.mean([mean_squared_error(y, p) for p in two])), rel=1e-12
        )
        assert verdict.status == "fail"


def test_classification_shorthand_follows_the_probabilities(cancer_pair) -> None:
    y, logistic, bayes, X_te, _ = cancer_pair
    probs = logistic.predict_proba(X_te)
    with_probs = classification_report(y, 2, probabilities=probs)
    labels_only = classification_report(y, 2, labels=bayes.predict(X_te))
    gates = parse_gates(
        [
            {"metric": "variance", "op": "<=", "value": 1.0},
            {"metric": "bias_variance.zero_one.net_variance", "op": "<=", "value": 1.0},
        ],
        task="binary",
    )
    a = evaluate_gates(gates, scores={}, bias_variance=to_jsonable(with_probs.bias_variance),
                       flags=[])
    b = evaluate_gates(gates, scores={}, bias_variance=labels_only.bias_variance, flags=[])
    assert a.reasons[0].metric == "bias_variance.log.variance"
    assert a.reasons[0].value == with_probs.bias_variance["log"].variance
    assert b.reasons[0].metric == "bias_variance.zero_one.variance"
    assert b.reasons[1].value == labels_only.bias_variance["zero_one"].extra["net_variance"]
    assert a.status == b.status == "pass"
    missing = evaluate_gates(gates[:1], scores={}, bias_variance={}, flags=[])
    assert missing.status == "warn" and "not available" in missing.reasons[0].message


def test_flag_gates_on_a_deep_tree() -> None:
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.3, random_state=0)
    tree = DecisionTreeRegressor(random_state=0).fit(X_tr, y_tr)  # memorizes its rows
    report = regression_report(
        y_te,
        tree.predict(X_te),
        train_y_true=y_tr,
        train_predictions=tree.predict(X_tr),
        options=ScoringOptions(n_resamples=100),
    )
    codes = {f.code: f.severity for f in report.flags}
    assert codes.get("generalization_gap") == "critical"
    gates = parse_gates(
        [
            {"flag": "generalization_gap", "min_severity": "critical"},
            {"flag": "generalization_gap", "severity": "warn"},
            {"flag": "underfit"},
        ],
        task="regression",
    )
    for flags in (report.flags, to_jsonable(report.flags)):
        verdict = evaluate_gates(gates, scores=report.scores, bias_variance={}, flags=flags)
        assert [r.status for r in verdict.reasons] == ["fail", "warn", "pass"]
        assert verdict.status == "fail"
        assert verdict.reasons[0].details == {"flag_severity": "critical"}
        assert "raised at critical" in verdict.reasons[0].message
    warning_only = [Flag("generalization_gap", "warning", "m")]
    verdict = evaluate_gates(gates[:1], scores={}, bias_variance={}, flags=warning_only)
    assert verdict.status == "pass"  # the gate trips at critical only


def _undecided(metric: str, level: float) -> Comparison:
    return Comparison(
        metric, "paired_bootstrap", math.nan, Interval(math.nan, math.nan, level, "none", "n/a"),
        math.nan, 10,
    )


def test_comparison_gates_without_a_reference_or_a_bound_warn() -> None:
    gate = _gate({"compare": "non_inferior", "metric": "rmse", "margin": 0.1})
    verdict = evaluate_gates([gate], scores={"rmse": 1.0}, bias_variance={}, flags=[])
    assert verdict.status == "warn" and "no reference" in verdict.reasons[0].message
    verdict = evaluate_gates(
        [gate], scores={"rmse": 1.0}, bias_variance={}, flags=[],
        comparisons={0: _undecided("rmse", gate.level)},
    )
    assert verdict.status == "warn" and "cannot decide" in verdict.reasons[0].message
    with pytest.raises(ValueError, match="comparison is of"):
        evaluate_gates(
            [gate], scores={}, bias_variance={}, flags=[],
            comparisons={0: _undecided("mse", gate.level)},
        )
    with pytest.raises(TypeError):
        evaluate_gates(["rmse"], scores={}, bias_variance={}, flags=[])  # type: ignore[list-item]


# -------------------------------------------------- paired tests against the references


def _margins(d: np.ndarray) -> list[float]:
    """Margins around the observed mean difference, so both decisions occur."""
    se = d.std(ddof=1) / math.sqrt(d.size)
    return [max(0.0, d.mean() + k * se) for k in (-1.0, 0.5, 1.0, 1.5, 2.0, 3.0)]


@pytest.mark.parametrize("alpha", [0.025, 0.05, 0.1])
def test_mse_non_inferiority_and_superiority_agree_with_statsmodels_and_scipy(
    diabetes_pair, alpha
) -> None:
    y, full, two = diabetes_pair
    a, b = (two - y) ** 2, (full - y) ** 2  # candidate: the weaker model
    d = a - b
    outcomes = set()
    for margin in _margins(d) + [0.0]:
        gate = _gate({"compare": "non_inferior", "metric": "mse", "margin": margin,
                      "alpha": alpha})
        cmp_ = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b)
        (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                                   comparisons={0: cmp_}).reasons
        # reference: sklearn.metrics.mean_squared_error for the difference
        assert reason.difference == pytest.approx(
            mean_squared_error(y, two) - mean_squared_error(y, full), rel=1e-10
        )
        # reference: statsmodels ttost_paired, upper one-sided test (H0: mean(d) >= margin)
        _, _, (_, p_upper, _) = ttost_paired(a, b, -margin - 1e6, margin)
        assert reason.details["p_value_one_sided"] == pytest.approx(p_upper, rel=1e-8)
        assert (reason.status == "pass") == (p_upper < alpha)
        # reference: scipy.stats.ttest_1samp with the margin shifted, one-sided
        assert (reason.status == "pass") == (
            stats.ttest_1samp(d, margin, alternative="less").pvalue < alpha
        )
        assert reason.bound == margin and reason.details["bound_side"] == "upper"
        outcomes.add(reason.status)
    assert outcomes == {"pass", "fail"}
    sup = _gate({"compare": "superior", "metric": "mse", "alpha": alpha})
    statuses = []
    for cand, ref in ((a, b), (b, a)):
        cmp_ = compare_for_gate(sup, row_losses_candidate=cand, row_losses_reference=ref)
        (reason,) = evaluate_gates([sup], scores={}, bias_variance={}, flags=[],
                                   comparisons={0: cmp_}).reasons
        # reference: scipy.stats.ttest_rel, one-sided (candidate's loss lower) and two-sided
        assert (reason.status == "pass") == (
            stats.ttest_rel(cand, ref, alternative="less").pvalue < alpha
        )
        assert reason.p_value == pytest.approx(stats.ttest_rel(cand, ref).pvalue, rel=1e-8)
        statuses.append(reason.status)
    assert statuses == ["fail", "pass"]  # ten features beat two on diabetes


def test_r2_gate_is_the_mse_test_on_the_r2_scale(diabetes_pair) -> None:
    y, full, two = diabetes_pair
    a, b = (two - y) ** 2, (full - y) ** 2  # candidate: the weaker model
    # R^2 = 1 - SS_res / SS_tot (sklearn.metrics.r2_score's definition), so each row's share
    # of the R^2 difference is -loss / mean((y - mean(y))^2).
    total = np.mean((y - y.mean()) ** 2)
    va, vb = -a / total, -b / total
    outcomes = set()
    for margin in _margins(vb - va):
        gate = _gate({"compare": "non_inferior", "metric": "r2", "margin": margin})
        cmp_ = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b, y_true=y)
        # reference: sklearn.metrics.r2_score for the difference
        assert cmp_.difference == pytest.approx(r2_score(y, two) - r2_score(y, full), rel=1e-10)
        (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                                   comparisons={0: cmp_}).reasons
        # reference: statsmodels ttost_paired, lower one-sided test (H0: diff <= -margin)
        _, (_, p_lower, _), _ = ttost_paired(va, vb, -margin, margin + 1e6)
        assert reason.details["p_value_one_sided"] == pytest.approx(p_lower, rel=1e-8)
        assert (reason.status == "pass") == (p_lower < 0.05)
        assert reason.bound == -margin and reason.details["bound_side"] == "lower"
        outcomes.add(reason.status)
    assert outcomes == {"pass", "fail"}
    constant = compare_for_gate(
        _gate({"compare": "superior", "metric": "r2"}),
        row_losses_candidate=a, row_losses_reference=b, y_true=np.full_like(y, 3.0),
    )
    verdict = evaluate_gates([_gate({"compare": "superior", "metric": "r2"})], scores={},
                             bias_variance={}, flags=[], comparisons={0: constant})
    assert verdict.status == "warn" and "constant" in verdict.reasons[0].message


def test_rmse_margin_is_on_the_rmse_scale_by_the_delta_method(diabetes_pair) -> None:
    y, full, two = diabetes_pair
    a, b = (full - y) ** 2, (two - y) ** 2
    n = y.size
    gate = _gate({"compare": "non_inferior", "metric": "rmse", "margin": 0.5, "alpha": 0.05})
    cmp_ = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b)
    # reference: sklearn.metrics.root_mean_squared_error for the difference
    expected_diff = root_mean_squared_error(y, full) - root_mean_squared_error(y, two)
    assert cmp_.difference == pytest.approx(expected_diff, rel=1e-10)
    # reference: statsmodels NonlinearDeltaCov (complex-step gradient) for the standard error of
    # sqrt(mean a) - sqrt(mean b), with the sample covariance of the two means
    cov = np.cov(np.vstack([a, b]), ddof=1) / n
    delta = NonlinearDeltaCov(
        lambda p: np.sqrt(p[:1]) - np.sqrt(p[1:]),
        np.array([a.mean(), b.mean()]),
        cov,
    )
    assert cmp_.details["se"] == pytest.approx(float(delta.se_vectorized()[0]), rel=1e-5)
    # reference: scipy.stats.t.ppf for the half-width at level 1 - 2 alpha, df n - 1
    half = stats.t.ppf(0.95, n - 1) * cmp_.details["se"]
    assert cmp_.interval.level == pytest.approx(0.90)
    assert cmp_.interval.high == pytest.approx(cmp_.difference + half, rel=1e-10)
    # reference: scipy.stats.bootstrap(paired=True) standard error of the RMSE difference;
    # the delta method's is its large-sample limit (tolerance: 442 rows, 2000 resamples)
    boot = stats.bootstrap(
        (y, full, two),
        lambda yy, pa, pb: np.sqrt(np.mean((pa - yy) ** 2)) - np.sqrt(np.mean((pb - yy) ** 2)),
        paired=True, vectorized=False, n_resamples=2000, rng=np.random.default_rng(5),
    )
    assert cmp_.details["se"] == pytest.approx(boot.standard_error, rel=0.1)
    (reason,) = evaluate_gates([gate], scores={"rmse": math.sqrt(a.mean())}, bias_variance={},
                               flags=[], comparisons={0: cmp_}).reasons
    assert (reason.status == "pass") == (cmp_.interval.high < 0.5)
    assert reason.value == pytest.approx(root_mean_squared_error(y, full), rel=1e-12)
    assert reason.status == "pass"  # ten features are not worse than two
    # the one-sided p-value is the t test of the shifted difference with the delta se
    t_stat = (cmp_.difference - 0.5) / cmp_.details["se"]
    # reference: scipy.stats.t.cdf
    assert reason.details["p_value_one_sided"] == pytest.approx(
        stats.t.cdf(t_stat, n - 1), rel=1e-10
    )
    swapped = compare_for_gate(gate, row_losses_candidate=b, row_losses_reference=a)
    assert swapped.difference == pytest.approx(-cmp_.difference, rel=1e-12)
    (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                               comparisons={0: swapped}).reasons
    assert reason.status == "fail" and "not shown" in reason.message


def test_rmse_delta_edges() -> None:
    gate = _gate({"compare": "superior", "metric": "rmse"})
    zeros = np.zeros(5)
    same = compare_for_gate(gate, row_losses_candidate=zeros, row_losses_reference=zeros)
    assert same.difference == 0.0 and same.p_value == 1.0
    one_zero = compare_for_gate(gate, row_losses_candidate=zeros,
                                row_losses_reference=np.ones(5))
    assert math.isnan(one_zero.interval.low) and "above zero" in one_zero.interval.note
    short = compare_for_gate(gate, row_losses_candidate=[1.0], row_losses_reference=[2.0])
    assert math.isnan(short.p_value)
    verdict = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                             comparisons={0: one_zero})
    assert verdict.status == "warn"


def test_mae_and_mape_with_seeds_agree_with_sklearn_and_scipy(diabetes_seeds) -> None:
    y, full, two = diabetes_seeds
    for metric, sk in (("mae", mean_absolute_error), ("mape", mean_absolute_percentage_error)):
        gate = _gate({"compare": "superior", "metric": metric, "alpha": 0.05})
        cmp_ = compare_for_gate(gate, y_true=y, pred_candidate=full, pred_reference=two)
        # reference: sklearn.metrics.mean_absolute_error / mean_absolute_percentage_error per
        # seed, averaged over seeds (the headline score)
        expected = np.mean([sk(y, p) for p in full]) - np.mean([sk(y, p) for p in two])
        assert cmp_.difference == pytest.approx(expected, rel=1e-10)
        scale = 1.0 if metric == "mae" else np.abs(y)
        rows_a = (np.abs(full - y) / scale).mean(axis=0)
        rows_b = (np.abs(two - y) / scale).mean(axis=0)
        # reference: scipy.stats.ttest_rel (two-sided, and one-sided for superiority)
        assert cmp_.p_value == pytest.approx(stats.ttest_rel(rows_a, rows_b).pvalue, rel=1e-8)
        (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                                   comparisons={0: cmp_}).reasons
        assert (reason.status == "pass") == (
            stats.ttest_rel(rows_a, rows_b, alternative="less").pvalue < 0.05
        )
    with pytest.raises(ScoringInputError) as info:
        compare_for_gate(_gate({"compare": "superior", "metric": "mae"}), y_true=y,
                         pred_candidate=full)
    assert info.value.field == "pred_reference"


def test_accuracy_one_seed_uses_mcnemar_like_statsmodels(cancer_pair) -> None:
    y, logistic, bayes, X_te, _ = cancer_pair
    pa, pb = logistic.predict(X_te), bayes.predict(X_te)
    za = classification_row_losses(y, labels=pa, loss="zero_one")
    zb = classification_row_losses(y, labels=pb, loss="zero_one")
    ca, cb = pa == y, pb == y
    table = [[np.sum(ca & cb), np.sum(ca & ~cb)], [np.sum(~ca & cb), np.sum(~ca & ~cb)]]
    discordant = table[0][1] + table[1][0]
    for raw in (
        {"compare": "superior", "metric": "accuracy", "alpha": 0.05},
        {"compare": "non_inferior", "metric": "accuracy", "margin": 0.02, "alpha": 0.05},
    ):
        gate = _gate(raw, task="binary")
        from_losses = compare_for_gate(gate, row_losses_candidate=za, row_losses_reference=zb)
        from_correct = compare_for_gate(gate, correct_candidate=ca, correct_reference=cb)
        assert from_losses == from_correct
        assert from_losses.method.startswith("mcnemar") and from_losses.metric == "accuracy"
        # reference: statsmodels.stats.contingency_tables.mcnemar, exact below 25 discordant
        ref = mcnemar(table, exact=bool(discordant < MCNEMAR_EXACT_BELOW), correction=True)
        assert from_losses.p_value == pytest.approx(ref.pvalue, rel=1e-10)
        # reference: the share of rows each model gets right (sklearn accuracy_score)
        assert from_losses.difference == pytest.approx(ca.mean() - cb.mean(), abs=1e-15)
        # the interval is the core's Newcombe interval at 1 - 2 alpha (tested against a
        # published example in test_comparison.py), and its lower end decides
        core = mcnemar_test(ca, cb, level=0.90)
        assert from_losses.interval == core.interval
        (reason,) = evaluate_gates([gate], scores={"accuracy": ca.mean()}, bias_variance={},
                                   flags=[], comparisons={0: from_losses}).reasons
        assert reason.interval == (core.interval.low, core.interval.high)
        assert (reason.status == "pass") == (core.interval.low > reason.bound)
        assert "p_value_one_sided" not in reason.details


def test_accuracy_with_several_seeds_is_a_paired_t_on_correctness(cancer_pair) -> None:
    y, _, _, X_te, (X_tr, y_tr) = cancer_pair
    rng = np.random.default_rng(4)
    seeds_a, seeds_b = [], []
    for _ in range(5):
        idx = rng.integers(0, y_tr.size, y_tr.size)
        seeds_a.append(make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000))
                       .fit(X_tr[idx], y_tr[idx]).predict(X_te))
        seeds_b.append(GaussianNB().fit(X_tr[idx], y_tr[idx]).predict(X_te))
    za = classification_row_losses(y, labels=np.array(seeds_a), loss="zero_one")
    zb = classification_row_losses(y, labels=np.array(seeds_b), loss="zero_one")
    gate = _gate({"compare": "superior", "metric": "accuracy"}, task="binary")
    cmp_ = compare_for_gate(gate, row_losses_candidate=za, row_losses_reference=zb)
    assert cmp_.method == "paired_t"
    ca = (np.array(seeds_a) == y).mean(axis=0)
    cb = (np.array(seeds_b) == y).mean(axis=0)
    # reference: scipy.stats.ttest_rel on the per-row share of seeds right
    assert cmp_.p_value == pytest.approx(stats.ttest_rel(ca, cb).pvalue, rel=1e-8)
    (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                               comparisons={0: cmp_}).reasons
    assert (reason.status == "pass") == (
        stats.ttest_rel(ca, cb, alternative="greater").pvalue < 0.05
    )
    with pytest.raises(ScoringInputError) as info:
        compare_for_gate(gate, row_losses_candidate=za)
    assert info.value.field == "row_losses_reference"


@pytest.mark.parametrize("metric", ["log_loss", "brier"])
def test_probability_losses_agree_with_sklearn_and_statsmodels(cancer_pair, metric) -> None:
    y, logistic, bayes, X_te, _ = cancer_pair
    qa, qb = logistic.predict_proba(X_te), bayes.predict_proba(X_te)
    loss = "log" if metric == "log_loss" else "brier"
    assert plan_comparison(metric).row_loss == loss
    la = classification_row_losses(y, probabilities=qa, loss=loss)
    lb = classification_row_losses(y, probabilities=qb, loss=loss)
    if metric == "log_loss":
        # reference: sklearn.metrics.log_loss
        expected = log_loss(y, qa) - log_loss(y, qb)
    else:
        # reference: sklearn.metrics.brier_score_loss (positive class)
        expected = brier_score_loss(y, qa[:, 1]) - brier_score_loss(y, qb[:, 1])
    for margin in (0.0, 0.01, 0.05):
        gate = _gate({"compare": "non_inferior", "metric": metric, "margin": margin},
                     task="binary")
        cmp_ = compare_for_gate(gate, row_losses_candidate=la, row_losses_reference=lb)
        assert cmp_.difference == pytest.approx(expected, rel=1e-9)
        (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                                   comparisons={0: cmp_}).reasons
        # reference: statsmodels ttost_paired, upper one-sided test (H0: mean(d) >= margin)
        _, _, (_, p_upper, _) = ttost_paired(la, lb, -margin - 1e6, margin)
        assert (reason.status == "pass") == (p_upper < 0.05)


def _auc(y, s, w):
    # rank form of the ROC AUC (Mann-Whitney U / (n_pos n_neg)); checked against
    # sklearn.metrics.roc_auc_score below
    pos = y == 1
    n_pos = int(pos.sum())
    n_neg = y.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return math.nan
    ranks = stats.rankdata(s)
    return (ranks[pos].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg)


def test_roc_auc_uses_the_paired_bootstrap_like_scipy(cancer_pair) -> None:
    y, logistic, bayes, X_te, _ = cancer_pair
    sa, sb = logistic.predict_proba(X_te)[:, 1], bayes.predict_proba(X_te)[:, 1]
    # reference: sklearn.metrics.roc_auc_score
    assert _auc(y, sa, None) == pytest.approx(roc_auc_score(y, sa), rel=1e-12)
    gate = _gate({"compare": "non_inferior", "metric": "roc_auc", "margin": 0.01,
                  "alpha": 0.05}, task="binary")
    assert plan_comparison("roc_auc").method == "paired_bootstrap"
    options = ScoringOptions(n_resamples=2000)
    cmp_ = compare_for_gate(gate, metric_fn=_auc, y_true=y, pred_candidate=sa,
                            pred_reference=sb, options=options)
    assert cmp_.difference == pytest.approx(roc_auc_score(y, sa) - roc_auc_score(y, sb),
                                            rel=1e-10)
    assert cmp_.interval.level == pytest.approx(0.90)
    # reference: scipy.stats.bootstrap(paired=True), percentile, at the same level; the
    # endpoints agree within Monte Carlo error (0.3 standard errors, as test_comparison.py)
    ref = stats.bootstrap(
        (y, sa, sb), lambda yy, aa, bb: _auc(yy, aa, None) - _auc(yy, bb, None),
        paired=True, vectorized=False, n_resamples=2000, confidence_level=0.90,
        method="percentile", rng=np.random.default_rng(9),
    )
    tol = 0.3 * ref.standard_error
    assert cmp_.interval.low == pytest.approx(ref.confidence_interval.low, abs=tol)
    (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                               comparisons={0: cmp_}).reasons
    assert reason.bound == -0.01 and reason.details["method"] == "paired_bootstrap"
    scipy_pass = ref.confidence_interval.low > -0.01
    if abs(ref.confidence_interval.low + 0.01) > tol:  # not borderline: same decision
        assert (reason.status == "pass") == scipy_pass
    with pytest.raises(ScoringInputError) as info:
        compare_for_gate(gate, y_true=y, pred_candidate=sa, pred_reference=sb)
    assert info.value.field == "metric_fn"


def test_a_paired_t_at_another_level_is_rescaled(diabetes_pair) -> None:
    from service.scoring import paired_loss_test

    y, full, two = diabetes_pair
    a, b = (full - y) ** 2, (two - y) ** 2
    gate = _gate({"compare": "non_inferior", "metric": "mse", "margin": 50.0, "alpha": 0.05})
    at_95 = paired_loss_test(a, b, metric="mse", level=0.95)
    at_90 = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b)
    r95, r90 = (
        evaluate_gates([gate], scores={}, bias_variance={}, flags=[], comparisons={0: c})
        .reasons[0]
        for c in (at_95, at_90)
    )
    assert r95.status == r90.status
    assert r95.interval == pytest.approx(r90.interval, rel=1e-10)


@settings(max_examples=60, derandomize=True, deadline=None)
@given(
    n=st.integers(3, 60),
    seed=st.integers(0, 2**32 - 1),
    shift=st.floats(-1.0, 1.0),
    margin=st.floats(0.0, 1.0),
    alpha=st.floats(0.01, 0.25),
    higher=st.booleans(),
)
def test_decisions_match_scipy_one_sided_t_tests(n, seed, shift, margin, alpha, higher) -> None:
    rng = np.random.default_rng(seed)
    b = rng.gamma(2.0, 1.0, n)
    a = b + shift + rng.normal(0.0, 0.7, n)
    metric = "r2" if higher else "mse"
    gate = _gate({"compare": "non_inferior", "metric": metric, "margin": margin,
                  "alpha": alpha})
    if higher:  # rows whose mean difference is the R^2 difference (R^2 = 1 - SSres/SStot)
        y = rng.normal(0.0, 1.0, n)
        total = np.mean((y - y.mean()) ** 2)
        cmp_ = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b, y_true=y)
        d = (b - a) / total
        # reference: scipy.stats.ttest_1samp, H0: diff <= -margin
        p = stats.ttest_1samp(d, -margin, alternative="greater").pvalue
    else:
        cmp_ = compare_for_gate(gate, row_losses_candidate=a, row_losses_reference=b)
        # reference: scipy.stats.ttest_1samp, H0: diff >= margin
        p = stats.ttest_1samp(a - b, margin, alternative="less").pvalue
    (reason,) = evaluate_gates([gate], scores={}, bias_variance={}, flags=[],
                               comparisons={0: cmp_}).reasons
    if abs(p - alpha) > 1e-9:  # away from the exact boundary
        assert (reason.status == "pass") == (p < alpha)
        assert reason.details["p_value_one_sided"] == pytest.approx(p, rel=1e-6, abs=1e-12)


def test_verdict_end_to_end_on_a_report(diabetes_seeds) -> None:
    y, full, two = diabetes_seeds
    options = ScoringOptions(n_resamples=100)
    candidate = regression_report(y, full, options=options)
    reference_losses = regression_row_losses(y, two)
    candidate_losses = regression_row_losses(y, full)
    # reference: sklearn.metrics.root_mean_squared_error of the mean MSE over seeds
    rmse = math.sqrt(np.mean([mean_squared_error(y, p) for p in full]))
    gates = parse_gates(
        [
            {"metric": "rmse", "op": "<=", "value": rmse + 1.0},
            {"metric": "variance_share", "op": "<=", "value": 0.99, "severity": "warn"},
            {"flag": "generalization_gap"},
            {"compare": "non_inferior", "metric": "rmse", "margin": 5.0},
            {"compare": "superior", "metric": "mse", "severity": "warn"},
        ],
        task="regression",
        comparable_row_losses={"squared"},
    )
    comparisons = {
        i: compare_for_gate(g, row_losses_candidate=candidate_losses,
                            row_losses_reference=reference_losses)
        for i, g in enumerate(gates)
        if isinstance(g, CompareGate)
    }
    verdict = evaluate_gates(
        gates,
        scores=to_jsonable(candidate.scores),
        bias_variance=to_jsonable(candidate.bias_variance),
        flags=to_jsonable(candidate.flags),
        comparisons=comparisons,
    )
    assert verdict.reasons[0].value == pytest.approx(rmse, rel=1e-12)
    assert [r.status for r in verdict.reasons[:3]] == ["pass", "pass", "pass"]
    assert len(verdict.reasons) == 5
    # reference: scipy.stats.ttest_rel, one-sided, on the seed-averaged squared errors
    superior = stats.ttest_rel(candidate_losses, reference_losses, alternative="less").pvalue
    assert verdict.reasons[4].status == ("pass" if superior < 0.05 else "warn")
    ni = verdict.reasons[3]
    assert ni.status == ("pass" if ni.interval[1] < 5.0 else "fail")
    statuses = [r.status for r in verdict.reasons]
    assert verdict.status == (
        "fail" if "fail" in statuses else "warn" if "warn" in statuses else "pass"
    )
    as_json = to_jsonable(verdict)
    assert as_json["reasons"][3]["gate"] == {
        "compare": "non_inferior", "metric": "rmse", "margin": 5.0
    }
    assert isinstance(as_json["reasons"][3]["interval"], list)
