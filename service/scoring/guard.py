"""Guards that keep a holdout safe to reuse: what a submitter is told about a feedback score.

A group that submits often can read labels out of exact scores, or tune to the feedback
slice until its score means nothing. The guards here decide what is reported; they are
pure functions, and the state they need is passed in and returned (the service stores it
per group per holdout).

- ``ladder_step``: the parameter-free Ladder (Blum & Hardt 2015, "The Ladder: A Reliable
  Leaderboard for Machine Learning Competitions", ICML; arXiv 1502.04585).
- ``rounded_guard``: the score rounded to a number of decimals, nothing more.
- ``no_guard``: the exact score, for trusted internal pipelines.
- ``adaptive_overfit_test``: evidence, for the owner, that a group's feedback-slice score
  beats its reserve-slice score by more than chance (flag code ``feedback_tuned``).

Every guard works on per-row losses, so it applies to any primary metric: the per-row loss
is the one ``service.scoring.catalog`` names for the metric (``METRICS[name].row_loss``:
``squared``, ``zero_one``, ``log`` or ``brier``), the single source of that table. For a
metric that is a mean of that loss (MSE, log loss, Brier, 1 - accuracy) the Ladder decides
on the metric itself; otherwise (RMSE, R^2, F1, ROC AUC, ...) it decides on the loss the
metric is built on, and the service shows a new primary-metric value only when the loss
improved.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from ._checks import ScoringInputError

__all__ = [
    "FEEDBACK_TUNED",
    "GUARDS",
    "LadderDecision",
    "LadderState",
    "adaptive_overfit_test",
    "ladder_step",
    "no_guard",
    "round_nested",
    "rounded_guard",
]

GUARDS = ("ladder", "rounded", "none")
"""Guard names a holdout's policy may choose (service default: ``ladder``)."""

FEEDBACK_TUNED = "feedback_tuned"
"""Flag code of ``adaptive_overfit_test``: feedback-slice loss below reserve-slice loss."""

_TIE_RTOL = 1e-9
"""Relative margin by which an improvement must exceed the Ladder's threshold.

A submission that differs from the best on exactly one row improves the mean loss by
exactly the threshold (for one nonzero difference delta, s = |delta| / sqrt(n), so
s / sqrt(n) = |delta| / n, the decrease of the mean). The paper's strict inequality
rejects it; this margin keeps that decision from depending on floating-point rounding,
which is what stops a one-row probe from reading a label.
"""


@dataclass(frozen=True)
class LadderState:
    """What the Ladder remembers for one group on one holdout (the service stores it).

    Attributes
    ----------
    best_loss : float
        Exact mean loss of the group's best submission so far on the feedback slice;
        ``inf`` before the first. Owner-only: never shown to submitters.
    best_submission_id : str or None
        Id of that submission; the service keeps its per-row losses and passes them back
        as ``best_row_losses``.
    reported : float or None
        The loss last reported to the group (rounded); None before the first submission.
    n_improvements : int
        Number of accepted improvements, including the first submission. Each one is the
        only moment the group learns anything new about the feedback labels.
    """

    best_loss: float = math.inf
    best_submission_id: str | None = None
    reported: float | None = None
    n_improvements: int = 0


@dataclass(frozen=True)
class LadderDecision:
    """The Ladder's answer to one submission.

    Attributes
    ----------
    reported_loss : float
        What the group is told: the new rounded loss if ``improved``, else the group's
        unchanged previous report.
    improved : bool
        Whether the submission beat the group's best by more than ``threshold``.
    threshold : float
        The margin s / sqrt(n). Owner-only: with the submitter's own predictions it can
        give away the exact loss difference (for zero-one loss s is a function of the
        number of changed rows, which the submitter knows, and of the mean difference).
    raw_loss : float
        The exact mean loss of this submission. Owner-only: the service must not show it
        to submitters.
    message : str
        Safe to show to the submitter; names no threshold or raw value.
    """

    reported_loss: float
    improved: bool
    threshold: float
    raw_loss: float
    message: str


def _as_row_losses(values: ArrayLike, name: str, n_rows: int | None = None) -> NDArray[np.float64]:
    a = np.asarray(values, dtype=np.float64)
    if a.ndim != 1:
        raise ScoringInputError(name, f"expected per-row losses of shape (n,), got {a.shape}")
    if n_rows is not None and a.size != n_rows:
        raise ScoringInputError(
            name, f"expected {n_rows} rows (the same rows as the new submission), got {a.size}"
        )
    if a.size < 2:
        raise ScoringInputError(
            name, f"needs at least 2 rows for a standard deviation, got {a.size}"
        )
    if not np.isfinite(a).all():
        raise ScoringInputError(name, "contains NaN or infinity; clip unbounded losses first")
    return a


def _check_decimals(decimals: int) -> int:
    if isinstance(decimals, bool) or not isinstance(decimals, (int, np.integer)):
        raise ScoringInputError("decimals", f"expected a non-negative integer, got {decimals!r}")
    if decimals < 0:
        raise ScoringInputError("decimals", f"must be at least 0, got {decimals!r}")
    return int(decimals)


def _scaled_sd(values: NDArray[np.float64]) -> float:
    """Sample standard deviation (ddof=1), scaled first so tiny or huge values keep it exact."""
    scale = float(np.abs(values).max())
    if scale == 0.0:
        return 0.0
    return float((values / scale).std(ddof=1)) * scale


def _ladder_round(loss: float, n_rows: int, decimals: int | None) -> float:
    if decimals is not None:
        return round(loss, decimals)
    return round(loss * n_rows) / n_rows


def ladder_step(
    new_row_losses: ArrayLike,
    best_row_losses: ArrayLike | None,
    state: LadderState,
    *,
    decimals: int | None = None,
    submission_id: str | None = None,
) -> tuple[LadderDecision, LadderState]:
    """One round of the parameter-free Ladder for one group: decide what to report.

    Why: reporting every exact score lets a group overfit the feedback slice (the paper's
    boosting attack) or read labels one row at a time. The Ladder reports a new score only
    when the submission beats the group's best by a one-sided paired test, so the group
    learns something only at a small number of real improvements.

    Rule (Blum & Hardt 2015, Algorithm 1 with the step size of the parameter-free variant,
    as in the authors' reference code ``mrtzh/Ladder.jl``, ``score!`` for ``FreeLadder``):

    - L = mean of ``new_row_losses``;
    - with no best yet, accept; the threshold is then s / sqrt(n) with s the sample
      standard deviation (ddof=1) of the new per-row losses (informational only);
    - otherwise d = new - best per row, s = sample standard deviation (ddof=1) of d,
      threshold = s / sqrt(n), and accept only if L < best_loss - threshold, i.e. only if
      the paired t statistic mean(d) / (s / sqrt(n)) is below -1. The comparison is made
      on mean(d) with a relative margin of 1e-9 so that the exact tie of a one-row change
      is always rejected (see ``_TIE_RTOL``);
    - on acceptance the reported value is L rounded to ``decimals`` places when given,
      else to the nearest multiple of 1/n. From memory: the paper's parameter-free
      variant (Algorithm 2) rounds the reported loss to the nearest multiple of 1/n; the
      authors' reference code reports L unrounded. For zero-one loss L already is a
      multiple of 1/n. Rounding is monotone and the test compares exact losses, so the
      reported value never increases;
    - otherwise the previous report is returned unchanged and the state is unchanged.

    Parameters
    ----------
    new_row_losses : array-like of shape (n,)
        Per-row loss of the new submission on the feedback slice (finite; n >= 2).
    best_row_losses : array-like of shape (n,) or None
        Per-row losses of the group's best submission, same rows in the same order; None
        exactly when ``state`` has no best yet.
    state : LadderState
        The group's state before this submission (``LadderState()`` for a new group).
    decimals : int, optional
        Round reported values to this many decimals instead of to multiples of 1/n. Keep
        it fixed for the life of a holdout.
    submission_id : str, optional
        Stored as ``best_submission_id`` when the submission is accepted.

    Returns
    -------
    decision : LadderDecision
        What to report; ``raw_loss`` and ``threshold`` are for the owner only.
    new_state : LadderState
        The state to store (the same object when nothing improved).

    Notes
    -----
    The Ladder bounds what the group learns, it does not make every label secret: a group
    that already knows one feedback row's label can, at the cost of an accepted
    improvement, test a second row together with it. Quotas bound how often that can be
    tried; the reserve slice stays sealed whatever the group does.
    """
    new = _as_row_losses(new_row_losses, "new_row_losses")
    n = new.size
    if decimals is not None:
        decimals = _check_decimals(decimals)
    loss = float(new.mean())

    if best_row_losses is None:
        if math.isfinite(state.best_loss):
            raise ScoringInputError(
                "best_row_losses",
                "the group already has a best submission "
                f"({state.best_submission_id!r}); pass its per-row losses",
            )
        threshold = _scaled_sd(new) / math.sqrt(n)
        reported = _ladder_round(loss, n, decimals)
        decision = LadderDecision(
            reported_loss=reported,
            improved=True,
            threshold=threshold,
            raw_loss=loss,
            message="First scored submission of this group: its score is reported.",
        )
        new_state = LadderState(
            best_loss=loss,
            best_submission_id=submission_id,
            reported=reported,
            n_improvements=state.n_improvements + 1,
        )
        return decision, new_state

    if not math.isfinite(state.best_loss) or state.reported is None:
        raise ScoringInputError(
            "best_row_losses", "given, but the state has no best submission yet; pass None"
        )
    best = _as_row_losses(best_row_losses, "best_row_losses", n_rows=n)
    best_mean = float(best.mean())
    if not math.isclose(best_mean, state.best_loss, rel_tol=1e-9, abs_tol=1e-12):
        raise ScoringInputError(
            "best_row_losses",
            f"their mean {best_mean!r} does not match the state's best_loss "
            f"{state.best_loss!r}; pass the best submission's losses on the same rows",
        )
    diff = new - best
    mean_diff = float(diff.mean())
    threshold = _scaled_sd(diff) / math.sqrt(n)
    improved = -mean_diff > threshold * (1.0 + _TIE_RTOL)
    if not improved:
        decision = LadderDecision(
            reported_loss=state.reported,
            improved=False,
            threshold=threshold,
            raw_loss=loss,
            message=(
                "Not reported: this submission did not beat the group's best by more than "
                "the Ladder's margin (a one-sided paired test on per-row losses); the "
                "group's unchanged best score is shown."
            ),
        )
        return decision, state

    # Rounding is monotone and loss < best_loss, so the report cannot go up; min() only
    # guards against a change of rounding rule between calls.
    reported = min(_ladder_round(loss, n, decimals), state.reported)
    decision = LadderDecision(
        reported_loss=reported,
        improved=True,
        threshold=threshold,
        raw_loss=loss,
        message="Improved on the group's best by more than the Ladder's margin: score updated.",
    )
    new_state = replace(
        state,
        best_loss=loss,
        best_submission_id=submission_id,
        reported=reported,
        n_improvements=state.n_improvements + 1,
    )
    return decision, new_state


def rounded_guard(value: float, decimals: int) -> float:
    """The score rounded to ``decimals`` places (half to even, on the exact binary value).

    Why: a cheap guard against reading single labels out of many-digit scores; it does not
    stop tuning to the feedback slice (the boosting attack works at 5 decimals).
    """
    d = _check_decimals(decimals)
    return round(float(value), d)


def no_guard(value: float) -> float:
    """The exact score, unchanged: for trusted internal pipelines only."""
    return float(value)


def round_nested(value: Any, decimals: int) -> Any:
    """Every float in a JSON-like nesting (dicts, lists) rounded to ``decimals`` places.

    Why: the ``rounded`` guard, and the Ladder's reports, show every number a submitter
    receives at the holdout's precision, not only the headline score. Integers (counts),
    booleans, strings and None pass through unchanged; non-finite floats are kept as they
    are (the service writes them as null).
    """
    d = _check_decimals(decimals)
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return round(value, d) if math.isfinite(value) else value
    if isinstance(value, Mapping):
        return {k: round_nested(v, d) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [round_nested(v, d) for v in value]
    return value


def adaptive_overfit_test(
    feedback_row_losses: ArrayLike,
    reserve_row_losses: ArrayLike,
    *,
    alpha: float = 0.01,
) -> dict[str, Any]:
    """One-sided test that a submission's feedback-slice loss is below its reserve-slice loss.

    Why: a group that tunes to the feedback slice ends with a feedback loss lower than its
    reserve loss by more than chance; on an untuned submission both slices estimate the same
    loss. This is the owner-view evidence behind the ``feedback_tuned`` flag.

    The slices are disjoint rows, so the test is unpaired: Welch's t test (unequal
    variances, Welch-Satterthwaite degrees of freedom) of H1: mean feedback loss < mean
    reserve loss; reference ``scipy.stats.ttest_ind(equal_var=False, alternative="less")``.
    When both slices have zero variance the difference is exact: p is 0 if the feedback
    loss is lower, else 1.

    Parameters
    ----------
    feedback_row_losses : array-like of shape (n_feedback,)
        Per-row losses on the feedback slice (at least 2 rows, finite).
    reserve_row_losses : array-like of shape (n_reserve,)
        Per-row losses of the same submission on the reserve slice (at least 2 rows).
    alpha : float
        Flag when the one-sided p-value is below this (default 0.01; with many groups,
        consider the number of tests the owner looks at).

    Returns
    -------
    dict
        ``code`` ("feedback_tuned"), ``flagged``, ``feedback_loss``, ``reserve_loss``,
        ``difference`` (feedback - reserve; negative when the feedback slice looks better),
        ``statistic`` (Welch t), ``df``, ``p_value``, ``alpha``, ``n_feedback``,
        ``n_reserve``.
    """
    a = _as_row_losses(feedback_row_losses, "feedback_row_losses")
    b = _as_row_losses(reserve_row_losses, "reserve_row_losses")
    if not (isinstance(alpha, (int, float)) and 0.0 < float(alpha) < 1.0):
        raise ScoringInputError("alpha", f"must lie strictly between 0 and 1, got {alpha!r}")
    mean_a, mean_b = float(a.mean()), float(b.mean())
    var_a = float(a.var(ddof=1)) / a.size
    var_b = float(b.var(ddof=1)) / b.size
    difference = mean_a - mean_b
    se2 = var_a + var_b
    if se2 > 0.0:
        statistic = difference / math.sqrt(se2)
        df = se2 * se2 / (var_a * var_a / (a.size - 1) + var_b * var_b / (b.size - 1))
        p_value = float(stats.t.cdf(statistic, df))
    else:
        statistic = -math.inf if difference < 0 else (math.inf if difference > 0 else math.nan)
        df = math.nan
        p_value = 0.0 if difference < 0 else 1.0
    return {
        "code": FEEDBACK_TUNED,
        "flagged": bool(p_value < alpha),
        "feedback_loss": mean_a,
        "reserve_loss": mean_b,
        "difference": difference,
        "statistic": float(statistic),
        "df": float(df),
        "p_value": p_value,
        "alpha": float(alpha),
        "n_feedback": int(a.size),
        "n_reserve": int(b.size),
    }
