"""The reuse guards: the parameter-free Ladder, rounding, guarded losses, the feedback_tuned test.

Sources: Blum & Hardt 2015, "The Ladder: A Reliable Leaderboard for Machine Learning
Competitions" (ICML; arXiv 1502.04585) and the authors' reference code (mrtzh/Ladder.jl),
as summarised in REFERENCES.md; scipy.stats for the paired and Welch t tests.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from hypothesis.stateful import (
    RuleBasedStateMachine,
    invariant,
    precondition,
    rule,
)
from scipy import stats

from service.scoring import ScoringInputError
from service.scoring.catalog import METRICS, ROW_LOSSES, TASKS, primary_metric
from service.scoring.guard import (
    FEEDBACK_TUNED,
    GUARDS,
    LadderDecision,
    LadderState,
    adaptive_overfit_test,
    ladder_step,
    no_guard,
    round_nested,
    rounded_guard,
)

SETTINGS = settings(max_examples=80, derandomize=True, deadline=None)

unit_losses = st.floats(min_value=0.0, max_value=1.0, allow_nan=False, allow_subnormal=False)


def loss_vectors(n: int) -> st.SearchStrategy[np.ndarray]:
    return arrays(np.float64, n, elements=unit_losses)


def _first(losses: np.ndarray, **kw: object) -> tuple[LadderDecision, LadderState]:
    return ladder_step(losses, None, LadderState(), **kw)  # type: ignore[arg-type]


# ---------------------------------------------------------------- the Ladder's rule


def test_first_submission_is_accepted_and_reported() -> None:
    rng = np.random.default_rng(1)
    losses = rng.uniform(size=50)
    decision, state = _first(losses, submission_id="s1")
    assert decision.improved
    assert decision.raw_loss == pytest.approx(losses.mean(), rel=1e-12)
    # reference: Ladder.jl score! for FreeLadder: with no leader, s = std of the new
    # per-row losses (sample sd, ddof=1, Julia's default); threshold s / sqrt(n).
    assert decision.threshold == pytest.approx(np.std(losses, ddof=1) / math.sqrt(50), rel=1e-12)
    assert state.best_loss == decision.raw_loss
    assert state.best_submission_id == "s1"
    assert state.reported == decision.reported_loss
    assert state.n_improvements == 1


@SETTINGS
@given(
    n=st.integers(3, 40),
    data=st.data(),
)
def test_acceptance_is_the_one_sided_paired_t_test_at_minus_one(
    n: int, data: st.DataObject
) -> None:
    best = data.draw(loss_vectors(n))
    new = data.draw(loss_vectors(n))
    d = new - best
    sd = float(np.std(d, ddof=1))
    assume(sd > 1e-6)
    # reference: scipy.stats.ttest_rel(new, best, alternative="less"); the parameter-free
    # Ladder accepts when mean(d) < -s / sqrt(n), i.e. when the paired t statistic < -1
    # (REFERENCES.md: "a one-sided paired test"; Ladder.jl: loss < current - s/sqrt(n)).
    t = stats.ttest_rel(new, best, alternative="less").statistic
    assume(abs(t + 1.0) > 1e-6)  # away from the exact boundary, decided by the tie margin
    _, state = _first(best)
    decision, _ = ladder_step(new, best, state)
    assert decision.improved == bool(t < -1.0)
    assert decision.threshold == pytest.approx(sd / math.sqrt(n), rel=1e-9)


@SETTINGS
@given(n=st.integers(2, 60), data=st.data())
def test_identical_to_best_never_improves(n: int, data: st.DataObject) -> None:
    best = data.draw(loss_vectors(n))
    _, state = _first(best)
    decision, after = ladder_step(best.copy(), best, state)
    assert not decision.improved
    assert decision.reported_loss == state.reported
    assert after is state
    assert "did not beat" in decision.message


@SETTINGS
@given(n=st.integers(2, 60), row=st.integers(0, 59), delta=st.floats(-1e6, 1e6), data=st.data())
def test_a_one_row_change_never_improves(
    n: int, row: int, delta: float, data: st.DataObject
) -> None:
    # For d with one nonzero entry delta: mean = delta / n and s = |delta| / sqrt(n), so the
    # decrease equals the threshold exactly and the strict inequality of the Ladder
    # (Algorithm 1: L < R - eta) rejects it. Checked here for any loss values and any row.
    best = data.draw(arrays(np.float64, n, elements=st.floats(0.0, 1e3)))
    row %= n
    new = best.copy()
    new[row] = best[row] + delta
    assume(np.isfinite(new).all() and new[row] != best[row])
    _, state = _first(best)
    decision, after = ladder_step(new, best, state)
    assert not decision.improved
    assert after is state


def test_a_uniform_improvement_on_every_row_is_accepted() -> None:
    # s = 0 and mean(d) < 0: the one-sided paired test is as significant as it gets.
    best = np.full(20, 0.5)
    _, state = _first(best)
    decision, after = ladder_step(best - 0.1, best, state, submission_id="b")
    assert decision.improved
    assert decision.threshold == pytest.approx(0.0, abs=1e-15)
    assert after.best_submission_id == "b"
    assert after.best_loss == pytest.approx(0.4)


def test_two_row_improvement_passes_the_test() -> None:
    # Two rows each better by 1 (zero-one loss): mean(d) = -2/n, s ~ sqrt(2/n), threshold
    # ~ sqrt(2)/n < 2/n, so it is accepted (reference: scipy.stats.ttest_rel statistic).
    n = 1000
    best = np.zeros(n)
    best[:300] = 1.0
    new = best.copy()
    new[:2] = 0.0
    assert stats.ttest_rel(new, best, alternative="less").statistic < -1
    _, state = _first(best)
    decision, _ = ladder_step(new, best, state)
    assert decision.improved


# ---------------------------------------------------------------- rounding


@SETTINGS
@given(n=st.integers(2, 500), data=st.data())
def test_default_rounding_is_to_multiples_of_one_over_n(n: int, data: st.DataObject) -> None:
    # From memory: the paper's parameter-free variant rounds the reported loss to the
    # nearest multiple of 1/n.
    losses = data.draw(loss_vectors(n))
    decision, _ = _first(losses)
    units = decision.reported_loss * n
    assert abs(units - round(units)) < 1e-6
    assert abs(decision.reported_loss - decision.raw_loss) <= 0.5 / n + 1e-12


@SETTINGS
@given(n=st.integers(2, 50), decimals=st.integers(0, 8), data=st.data())
def test_decimals_round_like_python_round(n: int, decimals: int, data: st.DataObject) -> None:
    losses = data.draw(loss_vectors(n))
    decision, _ = _first(losses, decimals=decimals)
    # reference: Python's round(x, ndigits), correctly rounded on the binary value
    assert decision.reported_loss == round(decision.raw_loss, decimals)


def test_zero_one_loss_is_reported_exactly() -> None:
    # A mean zero-one loss already is a multiple of 1/n, so the 1/n rounding leaves it.
    rng = np.random.default_rng(3)
    losses = rng.integers(0, 2, 4000).astype(float)
    decision, _ = _first(losses)
    assert decision.reported_loss == losses.sum() / 4000


def test_improvement_smaller_than_rounding_step_keeps_the_report() -> None:
    # Accepted, but at 1 decimal the rounded report cannot move below the previous one.
    best = np.full(10, 0.54)
    _, state = _first(best, decimals=1)
    decision, after = ladder_step(best - 0.02, best, state, decimals=1)
    assert decision.improved
    assert decision.reported_loss == round(0.52, 1) == state.reported
    assert after.best_loss == pytest.approx(0.52)


# ---------------------------------------------------------------- the state machine


class LadderMachine(RuleBasedStateMachine):
    """Random submissions, copies of the best and one-row edits of the best."""

    n = 25

    def __init__(self) -> None:
        super().__init__()
        self.state = LadderState()
        self.best: np.ndarray | None = None
        self.reports: list[float] = []
        self.best_losses: list[float] = []

    def _submit(self, losses: np.ndarray) -> LadderDecision:
        before = self.state
        decision, self.state = ladder_step(losses, self.best, before)
        if decision.improved:
            assert self.state.n_improvements == before.n_improvements + 1
            if self.best is not None:
                # The rule in its paired form (exact where the two means round alike).
                assert float(np.mean(losses - self.best)) < -decision.threshold
                assert decision.raw_loss <= before.best_loss
            self.best = losses
        else:
            assert self.state is before
            assert decision.reported_loss == before.reported
        self.reports.append(decision.reported_loss)
        self.best_losses.append(self.state.best_loss)
        return decision

    @rule(losses=loss_vectors(n))
    def submit_random(self, losses: np.ndarray) -> None:
        self._submit(losses)

    @rule(shift=st.floats(0.0, 0.3), data=st.data())
    def submit_lower_on_some_rows(self, shift: float, data: st.DataObject) -> None:
        base = self.best if self.best is not None else np.full(self.n, 0.5)
        rows = data.draw(arrays(np.bool_, self.n))
        self._submit(np.clip(base - shift * rows, 0.0, 1.0))

    @precondition(lambda self: self.best is not None)
    @rule()
    def submit_copy_of_best(self) -> None:
        assert self.best is not None
        assert not self._submit(self.best.copy()).improved

    @precondition(lambda self: self.best is not None)
    @rule(row=st.integers(0, n - 1), value=unit_losses)
    def submit_one_row_edit(self, row: int, value: float) -> None:
        assert self.best is not None
        new = self.best.copy()
        new[row] = value
        assert not self._submit(new).improved

    @invariant()
    def reported_never_increases(self) -> None:
        assert all(b <= a for a, b in zip(self.reports, self.reports[1:], strict=False))
        assert all(b <= a for a, b in zip(self.best_losses, self.best_losses[1:], strict=False))

    @invariant()
    def report_is_the_rounded_best(self) -> None:
        if self.state.reported is not None:
            assert self.state.reported == round(self.state.best_loss * self.n) / self.n


LadderMachine.TestCase.settings = settings(
    max_examples=40, stateful_step_count=25, derandomize=True, deadline=None
)
TestLadderMachine = LadderMachine.TestCase


# ---------------------------------------------------------------- input errors


def test_state_with_best_needs_the_best_losses() -> None:
    _, state = _first(np.array([0.0, 1.0, 1.0]), submission_id="s1")
    with pytest.raises(ScoringInputError) as err:
        ladder_step(np.array([0.0, 0.0, 1.0]), None, state)
    assert err.value.field == "best_row_losses"
    assert "s1" in str(err.value)


def test_best_losses_without_a_best_are_refused() -> None:
    with pytest.raises(ScoringInputError) as err:
        ladder_step(np.ones(3), np.ones(3), LadderState())
    assert err.value.field == "best_row_losses"


def test_best_losses_must_match_the_state() -> None:
    _, state = _first(np.array([0.0, 1.0, 1.0]))
    with pytest.raises(ScoringInputError, match="does not match"):
        ladder_step(np.zeros(3), np.array([1.0, 1.0, 1.0]), state)


@pytest.mark.parametrize(
    "losses",
    [np.array([0.5]), np.zeros((2, 2)), np.array([0.1, math.nan]), np.array([0.1, math.inf])],
)
def test_bad_loss_vectors_are_refused(losses: np.ndarray) -> None:
    with pytest.raises(ScoringInputError) as err:
        ladder_step(losses, None, LadderState())
    assert err.value.field == "new_row_losses"


def test_row_count_must_match_the_best() -> None:
    _, state = _first(np.array([0.0, 1.0, 1.0]))
    with pytest.raises(ScoringInputError, match="expected 4 rows") as err:
        ladder_step(np.zeros(4), np.array([0.0, 1.0, 1.0]), state)
    assert err.value.field == "best_row_losses"


@pytest.mark.parametrize("decimals", [-1, 1.5, True])
def test_bad_decimals_are_refused(decimals: object) -> None:
    with pytest.raises(ScoringInputError) as err:
        ladder_step(np.ones(3), None, LadderState(), decimals=decimals)  # type: ignore[arg-type]
    assert err.value.field == "decimals"


# ---------------------------------------------------------------- rounded and no guard


@SETTINGS
@given(value=st.floats(-1e6, 1e6), decimals=st.integers(0, 10))
def test_rounded_guard_is_python_round(value: float, decimals: int) -> None:
    # reference: Python's built-in round(x, ndigits)
    assert rounded_guard(value, decimals) == round(value, decimals)
    assert no_guard(value) == value


def test_guard_names() -> None:
    assert GUARDS == ("ladder", "rounded", "none")


def test_round_nested_rounds_every_float_and_nothing_else() -> None:
    value = {
        "scores": {"rmse": 1.234567, "r2": None},
        "intervals": [{"low": 0.123456, "high": float("inf"), "method": "normal"}],
        "counts": [[3, 4], [5, 6]],
        "flag": True,
    }
    out = round_nested(value, 3)
    # reference: Python's round (half to even on the exact binary value)
    assert out["scores"] == {"rmse": round(1.234567, 3), "r2": None}
    assert out["intervals"][0]["low"] == round(0.123456, 3)
    assert out["intervals"][0]["high"] == float("inf") and out["intervals"][0]["method"] == "normal"
    assert out["counts"] == [[3, 4], [5, 6]] and out["flag"] is True
    with pytest.raises(ScoringInputError):
        round_nested(value, -1)


# ---------------------------------------------------------------- guarded losses


def test_every_primary_metric_is_guarded_by_a_stored_row_loss() -> None:
    # The Ladder decides on the per-row loss the catalog stores for the primary metric
    # (catalog.METRICS[m].row_loss is the single table; the guard has none of its own).
    for task in TASKS:
        for name, info in METRICS.items():
            if task in info.tasks and not info.reveals_row:
                assert primary_metric(task, name).row_loss in ROW_LOSSES
    assert METRICS["accuracy"].row_loss == "zero_one"
    assert METRICS["log_loss"].row_loss == "log"
    assert METRICS["roc_auc"].row_loss == "brier"


def test_guarding_rmse_and_r2_through_squared_error_orders_like_them() -> None:
    # On a fixed holdout RMSE = sqrt(MSE) and R^2 = 1 - MSE / var(y) are monotone in MSE,
    # so a Ladder on the per-row squared error guards them. reference:
    # sklearn.metrics.mean_squared_error, r2_score, root_mean_squared_error
    from sklearn.metrics import mean_squared_error, r2_score, root_mean_squared_error

    assert METRICS["rmse"].row_loss == METRICS["r2"].row_loss == "squared"
    rng = np.random.default_rng(5)
    y = rng.normal(size=200)
    preds = [y + rng.normal(scale=s, size=200) for s in (0.2, 0.5, 1.0, 2.0)]
    mse = [mean_squared_error(y, p) for p in preds]
    order = np.argsort(mse)
    assert np.all(np.diff([root_mean_squared_error(y, preds[i]) for i in order]) > 0)
    assert np.all(np.diff([r2_score(y, preds[i]) for i in order]) < 0)


# ---------------------------------------------------------------- feedback_tuned


# Losses on a grid of 1/64 (exact in binary): nearly identical values, on which scipy
# warns of catastrophic cancellation, cannot occur; exactly constant slices can.
grid_losses = st.integers(0, 64).map(lambda k: k / 64)


@SETTINGS
@given(
    a=arrays(np.float64, st.integers(2, 60), elements=grid_losses),
    b=arrays(np.float64, st.integers(2, 60), elements=grid_losses),
)
def test_adaptive_overfit_test_matches_scipy_welch(a: np.ndarray, b: np.ndarray) -> None:
    assume(np.ptp(a) > 0 or np.ptp(b) > 0)
    result = adaptive_overfit_test(a, b)
    # reference: scipy.stats.ttest_ind(equal_var=False, alternative="less"); scipy warns
    # of cancellation when one slice is exactly constant, which is exact on this grid.
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", "Precision loss occurred", RuntimeWarning)
        ref = stats.ttest_ind(a, b, equal_var=False, alternative="less")
    assert result["p_value"] == pytest.approx(ref.pvalue, rel=1e-7, abs=1e-12)
    assert result["statistic"] == pytest.approx(ref.statistic, rel=1e-7, abs=1e-9)
    assert result["df"] == pytest.approx(ref.df, rel=1e-7)
    assert result["feedback_loss"] == pytest.approx(a.mean())
    assert result["reserve_loss"] == pytest.approx(b.mean())
    assert result["difference"] == pytest.approx(a.mean() - b.mean())
    assert result["flagged"] == (ref.pvalue < 0.01)
    assert result["code"] == FEEDBACK_TUNED == "feedback_tuned"


def test_tuned_feedback_slice_is_flagged_and_untuned_is_not() -> None:
    rng = np.random.default_rng(11)
    reserve = rng.integers(0, 2, 2800).astype(float)
    honest = rng.integers(0, 2, 1200).astype(float)
    tuned = (rng.uniform(size=1200) < 0.42).astype(float)
    assert adaptive_overfit_test(tuned, reserve)["flagged"]
    # A worse feedback slice is never evidence of tuning to it (one-sided).
    assert not adaptive_overfit_test(1.0 - tuned, reserve)["flagged"]
    res = adaptive_overfit_test(honest, reserve, alpha=0.01)
    ref = stats.ttest_ind(honest, reserve, equal_var=False, alternative="less")
    assert res["flagged"] == (ref.pvalue < 0.01)


def test_zero_variance_slices() -> None:
    # Both slices constant: the difference is exact (documented in the docstring); scipy
    # agrees where it answers (reference: scipy.stats.ttest_ind, equal_var=False).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = stats.ttest_ind(np.zeros(5), np.ones(5), equal_var=False, alternative="less")
    assert ref.pvalue == 0.0
    assert adaptive_overfit_test(np.zeros(5), np.ones(5))["p_value"] == 0.0
    assert adaptive_overfit_test(np.zeros(5), np.ones(5))["flagged"]
    assert adaptive_overfit_test(np.ones(5), np.ones(5))["p_value"] == 1.0
    assert not adaptive_overfit_test(np.ones(5), np.zeros(5))["flagged"]


@pytest.mark.parametrize("alpha", [0.0, 1.0, -0.5, "0.1"])
def test_bad_alpha_is_refused(alpha: object) -> None:
    with pytest.raises(ScoringInputError) as err:
        adaptive_overfit_test(np.ones(3), np.ones(3), alpha=alpha)  # type: ignore[arg-type]
    assert err.value.field == "alpha"
