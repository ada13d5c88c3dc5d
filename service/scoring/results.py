"""Typed results of the scoring core.

Every result is a frozen dataclass of plain Python values (floats, ints, strings,
lists, dicts), so ``to_jsonable`` turns it into JSON without loss: floats keep
their full double precision (JSON encoders write the shortest round-tripping
repr), and the only non-finite values a metric can take (NaN for an undefined
metric, +inf for an unbounded one) become ``null`` with the reason stated in the
surrounding result where one exists.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Interval:
    """A two-sided confidence interval for one metric.

    ``method`` names how it was computed (``normal``, ``t``, ``wilson``, ``delta``,
    ``order_statistic``, ``delong``, ``newcombe_paired``, ``bootstrap_percentile``,
    ``bootstrap_bca``, ``seed_mean_conservative``, ``none``); ``note`` says why when no interval
    can be given (then ``low`` and ``high`` are NaN).
    """

    low: float
    high: float
    level: float
    method: str
    note: str = ""


@dataclass(frozen=True)
class Spread:
    """How one metric varies over the K seeds (sd with ddof=1; 0 when K == 1)."""

    mean: float
    sd: float
    min: float
    max: float


@dataclass(frozen=True)
class Decomposition:
    """Bias-variance decomposition of one loss across seeds.

    ``expected_loss`` is the mean over seeds of the loss; ``bias`` the loss of the
    main prediction (for squared loss this includes irreducible noise unless a
    noise variance was given, then ``noise`` holds it and ``bias`` excludes it);
    ``variance`` the variance term; ``variance_share`` = variance / expected loss;
    ``ensemble_loss`` the loss of the seed-combined prediction. ``extra`` holds
    loss-specific terms (zero-one: ``unbiased_variance``, ``biased_variance``,
    ``net_variance``).
    """

    loss: str
    expected_loss: float
    bias: float
    variance: float
    variance_share: float
    ensemble_loss: float
    noise: float | None = None
    extra: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Flag:
    """One piece of overfitting evidence. ``severity`` is ``info``, ``warning`` or ``critical``."""

    code: str
    severity: str
    message: str
    evidence: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Comparison:
    """Paired comparison of prediction set A against B on the same rows.

    ``difference`` is metric(A) - metric(B); the interval is for that difference;
    ``p_value`` is two-sided for H0: no difference.
    """

    metric: str
    method: str
    difference: float
    interval: Interval
    p_value: float
    n_rows: int
    details: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class SweepPoint:
    complexity: float
    test_loss: float
    test_loss_se: float
    train_loss: float | None
    bias: float
    variance: float
    region: str  # "underfit", "optimal", "overfit" or "neutral"


@dataclass(frozen=True)
class SweepResult:
    loss: str
    points: list[SweepPoint]
    best_complexity: float
    one_se_complexity: float


@dataclass(frozen=True)
class Report:
    """Everything the scoring core says about one submission on one set of rows.

    ``scores`` are the headline metrics: for K seeds, the mean over seeds of each
    metric (RMSE is the square root of the expected MSE, so ``rmse**2 == mse``).
    ``ensemble`` holds the metrics of the seed-combined prediction (mean of
    predictions or probabilities; majority vote for labels without probabilities).
    ``details`` holds structured, non-scalar results (classification: classes,
    per-class precision/recall/F1/support, confusion matrix).
    """

    task: str
    n_rows: int
    n_seeds: int
    scores: dict[str, float]
    intervals: dict[str, Interval]
    seed_spread: dict[str, Spread]
    ensemble: dict[str, float]
    bias_variance: dict[str, Decomposition]
    flags: list[Flag]
    train_scores: dict[str, float] | None = None
    details: dict[str, Any] = field(default_factory=dict)


def to_jsonable(value: Any) -> Any:
    """Convert a result (or any nesting of results, numpy scalars and arrays) to JSON types.

    Non-finite floats become ``None`` because JSON has no NaN or infinity.
    """
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: to_jsonable(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    return value
