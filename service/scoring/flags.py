"""Overfitting evidence as flags a user can act on.

Four codes, always returned in this order (``FLAG_CODES``):

- ``generalization_gap``: the held-out loss is significantly and materially above the loss on
  the submitter's own training rows (one-sided Welch test, test > train);
- ``variance_dominated``: most of the expected loss is seed-to-seed variance, so the model
  is sensitive to its training draw (averaging the seeds would remove that part);
- ``underfit``: training and held-out losses are both close to, or above, the loss of the
  trivial baseline (the training mean for regression, class frequencies for classification)
  on the same rows: the model has learned little;
- ``seed_instability``: the primary loss changes a lot from seed to seed (coefficient of
  variation), so a single seed's score is not to be trusted.

Severity rule:

- ``critical``: the score should not be relied on as it stands: a generalization gap with the
  held-out loss at least double the training loss (``FlagThresholds.gap_critical_relative``),
  or underfit with a held-out loss no better than the trivial baseline's
  (``FlagThresholds.underfit_critical_ratio``);
- ``warning``: every other flag raised;
- ``info``: reserved for notes that need no action; none of these four codes emits it.

No evidence, no flag: a check whose inputs are missing or too small (fewer than two rows on a
side, fewer than two seeds, a zero baseline or a non-positive mean loss) is skipped, never
guessed. Thresholds come from ``FlagThresholds``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from ._checks import ScoringInputError, as_targets, as_weights
from .intervals import mean_sd_effective_n
from .options import FlagThresholds
from .results import Decomposition, Flag

FLAG_CODES = ("generalization_gap", "variance_dominated", "underfit", "seed_instability")
"""Every flag code, in the order flags are returned."""


def _num(x: float) -> str:
    """How numbers appear in messages: 4 significant digits."""
    return format(x, ".4g")


def welch_greater(
    test_losses: NDArray[np.float64],
    train_losses: NDArray[np.float64],
    test_weight: NDArray[np.float64] | None = None,
    train_weight: NDArray[np.float64] | None = None,
) -> dict[str, float] | None:
    """One-sided Welch t test of mean(test) > mean(train) for independent samples.

    Unweighted, it is ``scipy.stats.ttest_ind(test, train, equal_var=False,
    alternative="greater")``. Weighted, each side uses its weighted mean and Kish's
    effective sample size (``intervals.mean_sd_effective_n``), with the Welch-Satterthwaite
    degrees of freedom. Returns None when a side has fewer than two (effective) rows. When
    both sides have zero spread the p-value is 0 for a positive gap and 1 otherwise (the t
    test's limits).
    """
    mean_t, sd_t, n_t = mean_sd_effective_n(test_losses, test_weight)
    mean_r, sd_r, n_r = mean_sd_effective_n(train_losses, train_weight)
    if not (math.isfinite(sd_t) and math.isfinite(sd_r)):
        return None
    v_t = sd_t * sd_t / n_t
    v_r = sd_r * sd_r / n_r
    gap = mean_t - mean_r
    se = math.sqrt(v_t + v_r)
    if se > 0:
        df = (v_t + v_r) ** 2 / (v_t * v_t / (n_t - 1.0) + v_r * v_r / (n_r - 1.0))
        statistic = gap / se
        p_value = float(stats.t.sf(statistic, df))
    else:
        df = n_t + n_r - 2.0
        statistic = math.copysign(math.inf, gap) if gap != 0 else 0.0
        p_value = 0.0 if gap > 0 else 1.0
    return {
        "test_loss": mean_t,
        "train_loss": mean_r,
        "gap": gap,
        "statistic": statistic,
        "df": df,
        "p_value": p_value,
    }


def _gap_flag(
    loss: str,
    test: NDArray[np.float64],
    train: NDArray[np.float64],
    w_test: NDArray[np.float64] | None,
    w_train: NDArray[np.float64] | None,
    thresholds: FlagThresholds,
) -> Flag | None:
    result = welch_greater(test, train, w_test, w_train)
    if result is None:
        return None
    train_loss, test_loss, gap = result["train_loss"], result["test_loss"], result["gap"]
    if train_loss > 0:
        relative = gap / train_loss
    else:
        relative = math.inf if gap > 0 else 0.0
    p_value = result["p_value"]
    if not (p_value < thresholds.gap_alpha and relative >= thresholds.gap_min_relative):
        return None
    severity = "critical" if relative >= thresholds.gap_critical_relative else "warning"
    how_much = (
        f"{_num(100 * relative)}% above" if math.isfinite(relative) else "above a zero"
    )
    message = (
        f"Held-out {loss} loss {_num(test_loss)} is {how_much} the training loss "
        f"{_num(train_loss)} (one-sided Welch test p = {_num(p_value)}): the model fits its "
        "training rows better than new rows. Try stronger regularization, a simpler model or "
        "more training data."
    )
    evidence = {
        "train_loss": train_loss,
        "test_loss": test_loss,
        "gap": gap,
        "relative_gap": relative,
        "p_value": p_value,
        "statistic": result["statistic"],
        "df": result["df"],
    }
    return Flag("generalization_gap", severity, message, evidence)


def _variance_flag(
    loss: str, decomposition: Decomposition, n_seeds: int, thresholds: FlagThresholds
) -> Flag | None:
    share = decomposition.variance_share
    if n_seeds < 2 or not math.isfinite(share) or share <= thresholds.variance_share:
        return None
    message = (
        f"Seed-to-seed variance is {_num(100 * share)}% of the expected {loss} loss "
        f"(variance {_num(decomposition.variance)}, bias {_num(decomposition.bias)}): the "
        "model depends strongly on its training draw. Averaging the seeds' predictions would "
        f"lower the loss to {_num(decomposition.ensemble_loss)}; more data or regularization "
        "would lower the variance itself."
    )
    evidence = {
        "variance": float(decomposition.variance),
        "bias": float(decomposition.bias),
        "share": float(share),
        "expected_loss": float(decomposition.expected_loss),
        "ensemble_loss": float(decomposition.ensemble_loss),
    }
    return Flag("variance_dominated", "warning", message, evidence)


def _underfit_flag(
    loss: str,
    test_loss: float,
    baseline_test_loss: float | None,
    train_loss: float | None,
    baseline_train_loss: float | None,
    thresholds: FlagThresholds,
) -> Flag | None:
    if baseline_test_loss is None:
        return None
    baseline_test_loss = float(baseline_test_loss)
    if not (math.isfinite(baseline_test_loss) and baseline_test_loss > 0):
        return None
    test_ratio = test_loss / baseline_test_loss
    if test_ratio < thresholds.underfit_ratio:
        return None
    evidence = {
        "test_loss": test_loss,
        "baseline_test_loss": baseline_test_loss,
        "test_ratio": test_ratio,
    }
    both = ""
    if train_loss is not None and baseline_train_loss is not None:
        baseline_train_loss = float(baseline_train_loss)
        if not (math.isfinite(baseline_train_loss) and baseline_train_loss > 0):
            return None
        train_ratio = train_loss / baseline_train_loss
        if train_ratio < thresholds.underfit_ratio:
            return None
        evidence.update(
            train_loss=train_loss,
            baseline_train_loss=baseline_train_loss,
            train_ratio=train_ratio,
        )
        both = (
            f" and its training {loss} loss {_num(train_loss)} is {_num(100 * train_ratio)}% "
            f"of the baseline's {_num(baseline_train_loss)}"
        )
    severity = "critical" if test_ratio >= thresholds.underfit_critical_ratio else "warning"
    message = (
        f"Held-out {loss} loss {_num(test_loss)} is {_num(100 * test_ratio)}% of the trivial "
        f"baseline's {_num(baseline_test_loss)}{both}: the model has learned little "
        "beyond the baseline. Try a more flexible model, better features or less "
        "regularization."
    )
    return Flag("underfit", severity, message, evidence)


def _instability_flag(
    loss: str, seed_losses: NDArray[np.float64], thresholds: FlagThresholds
) -> Flag | None:
    if seed_losses.size < 2:
        return None
    mean = float(seed_losses.mean())
    if not mean > 0:
        return None
    sd = float(seed_losses.std(ddof=1))
    cv = sd / mean
    if cv <= thresholds.instability_cv:
        return None
    low, high = float(seed_losses.min()), float(seed_losses.max())
    message = (
        f"The {loss} loss varies from {_num(low)} to {_num(high)} over "
        f"{seed_losses.size} seeds (coefficient of variation {_num(cv)}, sd {_num(sd)}, mean "
        f"{_num(mean)}): a single seed's score is not reliable. Report the mean over seeds, "
        "fix the training randomness or make training more stable."
    )
    evidence = {"cv": cv, "sd": sd, "mean": mean, "min": low, "max": high}
    return Flag("seed_instability", "warning", message, evidence)


def overfitting_flags(
    *,
    loss: str,
    test_row_losses: ArrayLike,
    train_row_losses: ArrayLike | None = None,
    baseline_test_loss: float | None = None,
    baseline_train_loss: float | None = None,
    decomposition: Decomposition | None = None,
    seed_losses: Sequence[float] | ArrayLike,
    sample_weight: ArrayLike | None = None,
    train_sample_weight: ArrayLike | None = None,
    thresholds: FlagThresholds = FlagThresholds(),  # noqa: B008 (frozen, so safe to share)
) -> list[Flag]:
    """Collect the overfitting flags the evidence supports (module docstring for the rules).

    Parameters
    ----------
    loss : str
        Name of the loss the rows hold, used in messages (e.g. "squared").
    test_row_losses : array-like of shape (n_rows,)
        Per-row loss on the held-out rows, averaged over seeds.
    train_row_losses : array-like of shape (m_rows,), optional
        Per-row loss on the submitter's training rows, averaged over seeds. The two samples are
        independent rows, hence Welch's test for ``generalization_gap``.
    baseline_test_loss, baseline_train_loss : float, optional
        Loss of the trivial baseline on the held-out (training) rows, for ``underfit``. The
        training side counts only when both ``train_row_losses`` and
        ``baseline_train_loss`` are given.
    decomposition : Decomposition, optional
        Bias-variance decomposition over the seeds, for ``variance_dominated``.
    seed_losses : array-like of shape (n_seeds,)
        The primary loss of each seed on the held-out rows.
    sample_weight, train_sample_weight : array-like, optional
        Row weights of the held-out and training rows.
    thresholds : FlagThresholds

    Returns
    -------
    list of Flag
        In ``FLAG_CODES`` order; empty when nothing is flagged.
    """
    test = as_targets(test_row_losses, name="test_row_losses")
    w_test = as_weights(sample_weight, test.size)
    seeds = np.asarray(seed_losses, dtype=np.float64)
    if seeds.ndim != 1 or seeds.size == 0 or not np.isfinite(seeds).all():
        raise ScoringInputError(
            "seed_losses", f"expected finite values of shape (n_seeds,), got shape {seeds.shape}"
        )
    train = None
    w_train = None
    if train_row_losses is not None:
        train = as_targets(train_row_losses, name="train_row_losses")
        if train_sample_weight is not None:
            try:
                w_train = as_weights(train_sample_weight, train.size)
            except ScoringInputError as err:
                raise ScoringInputError("train_sample_weight", err.message) from err
    elif train_sample_weight is not None:
        raise ScoringInputError("train_sample_weight", "given without train_row_losses")

    test_loss = float(np.average(test, weights=w_test))
    train_loss = None if train is None else float(np.average(train, weights=w_train))
    candidates = [
        None if train is None else _gap_flag(loss, test, train, w_test, w_train, thresholds),
        None
        if decomposition is None
        else _variance_flag(loss, decomposition, seeds.size, thresholds),
        _underfit_flag(
            loss, test_loss, baseline_test_loss, train_loss, baseline_train_loss, thresholds
        ),
        _instability_flag(loss, seeds, thresholds),
    ]
    return [flag for flag in candidates if flag is not None]


__all__ = [
    "FLAG_CODES",
    "overfitting_flags",
    "welch_greater",
]
