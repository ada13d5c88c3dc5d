"""Held-out loss along a complexity axis, and which complexity to pick.

A submitter scores one model family at several complexities (tree depth, polynomial degree,
inverse regularization strength) on the same held-out rows. ``complexity_sweep`` reports the
curve with a standard error at each point, the complexity with the lowest loss and the one
picked by the one-standard-error rule: the simplest complexity whose held-out loss is within
one standard error of the minimum (Breiman, Friedman, Olshen & Stone 1984, Classification
and Regression Trees; Hastie, Tibshirani & Friedman, ESL 2nd ed., section 7.10).

Regions, with ``min`` the lowest test loss, ``se_min`` the standard error at that point and
``band = min + se_min``:

- ``optimal``: test loss <= band (within one standard error of the minimum); the one-SE
  choice and the best point are always optimal;
- ``underfit``: complexity below the one-SE choice (so, by the rule, loss > band);
- ``overfit``: complexity above the best complexity and loss > band;
- ``neutral``: complexity between the one-SE choice and the best with loss > band (a bump
  in a curve that is not U-shaped).

The standard error at a point is ``sd(row losses) / sqrt(n)`` over the held-out rows. It
ignores the correlation between points scored on the same rows, as the rule does with
cross-validation folds.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ._checks import ScoringInputError, as_seed_predictions, as_targets
from .decomposition import squared_loss_decomposition
from .results import SweepPoint, SweepResult


@dataclass(frozen=True, eq=False)
class SweepInput:
    """One point of a complexity sweep.

    ``test_row_losses`` (n,) is the per-row held-out loss averaged over seeds; ``bias`` and
    ``variance`` are the decomposition's terms at this complexity; ``train_loss`` the mean
    loss on the training rows, if known.
    """

    complexity: float
    test_row_losses: NDArray[np.float64]
    bias: float
    variance: float
    train_loss: float | None = None


def _finite(value: float, name: str) -> float:
    v = float(value)
    if not math.isfinite(v):
        raise ScoringInputError(name, f"must be finite, got {value!r}")
    return v


def complexity_sweep(points: Sequence[SweepInput], *, loss: str) -> SweepResult:
    """Summarize held-out loss against complexity and apply the one-standard-error rule.

    Parameters
    ----------
    points : sequence of SweepInput
        At least one point; distinct complexities; every ``test_row_losses`` of the same
        length n >= 2 (the same held-out rows).
    loss : str
        Name of the loss, carried into the result.

    Returns
    -------
    SweepResult
        Points sorted by complexity with ``test_loss`` (mean row loss), ``test_loss_se``
        (sd with ddof=1 / sqrt(n)) and ``region`` (module docstring); ``best_complexity`` =
        the argmin of the test loss (the simplest on ties); ``one_se_complexity`` = the
        smallest complexity whose test loss <= min + SE at the minimum.
    """
    if len(points) == 0:
        raise ScoringInputError("points", "needs at least one complexity")
    ordered = sorted(points, key=lambda p: float(p.complexity))
    complexity = np.array([_finite(p.complexity, "complexity") for p in ordered])
    if np.any(np.diff(complexity) == 0):
        raise ScoringInputError(
            "complexity", f"each complexity must appear once, got {complexity.tolist()}"
        )
    rows = [as_targets(p.test_row_losses, name="test_row_losses") for p in ordered]
    n = rows[0].size
    if n < 2 or any(r.size != n for r in rows):
        raise ScoringInputError(
            "test_row_losses",
            f"expected the same n >= 2 held-out rows at every complexity, got "
            f"{[r.size for r in rows]}",
        )
    losses = np.stack(rows)
    test_loss = losses.mean(axis=1)
    test_se = losses.std(axis=1, ddof=1) / math.sqrt(n)

    best = int(np.argmin(test_loss))
    band = float(test_loss[best] + test_se[best])
    within = test_loss <= band
    one_se = int(np.argmax(within))  # first True; ``best`` is always within
    regions = np.where(within, "optimal", "neutral").astype(object)
    regions[:one_se] = "underfit"
    regions[(np.arange(len(ordered)) > best) & ~within] = "overfit"

    out = [
        SweepPoint(
            complexity=float(complexity[i]),
            test_loss=float(test_loss[i]),
            test_loss_se=float(test_se[i]),
            train_loss=None if p.train_loss is None else _finite(p.train_loss, "train_loss"),
            bias=_finite(p.bias, "bias"),
            variance=_finite(p.variance, "variance"),
            region=str(regions[i]),
        )
        for i, p in enumerate(ordered)
    ]
    return SweepResult(loss, out, float(complexity[best]), float(complexity[one_se]))


SweepEntry = tuple[float, ArrayLike, ArrayLike | None, ArrayLike | None]


def _squared_point(
    y: NDArray[np.float64], entry: SweepEntry
) -> SweepInput:
    complexity, predictions, train_y, train_predictions = entry
    p = as_seed_predictions(predictions, y.size)
    errors = p - y
    row_losses = np.mean(errors * errors, axis=0)
    decomposition = squared_loss_decomposition(y, p)
    train_loss = None
    if (train_y is None) != (train_predictions is None):
        raise ScoringInputError(
            "train_predictions",
            f"at complexity {complexity!r}: give both the training targets and the training "
            "predictions, or neither",
        )
    if train_y is not None:
        ty = as_targets(train_y, name="train_y")
        tp = as_seed_predictions(train_predictions, ty.size, name="train_predictions")
        train_loss = float(np.mean((tp - ty) ** 2))
    return SweepInput(
        float(complexity), row_losses, decomposition.bias, decomposition.variance, train_loss
    )


def sweep_from_predictions(
    y_true: ArrayLike,
    entries: Sequence[SweepEntry],
    *,
    loss: str = "squared",
) -> SweepResult:
    """Build a complexity sweep from raw regression predictions (squared loss).

    Parameters
    ----------
    y_true : array-like of shape (n,)
        Held-out targets.
    entries : sequence of (complexity, predictions, train_y, train_predictions)
        ``predictions`` (K, n): one row per seed on the held-out rows; ``train_y`` (m,) and
        ``train_predictions`` (K, m) on the training rows, or both None.

    Returns
    -------
    SweepResult
        As ``complexity_sweep``; at each point the row loss is the squared error averaged
        over seeds, ``bias`` = mean (pbar - y)^2 (noise included) and ``variance`` = mean
        over rows of the variance over seeds (ddof=0), from
        ``decomposition.squared_loss_decomposition``; ``train_loss`` = mean squared error
        over seeds and training rows.
    """
    if loss != "squared":
        raise ValueError(f"sweep_from_predictions supports loss='squared' only, got {loss!r}")
    y = as_targets(y_true)
    return complexity_sweep([_squared_point(y, e) for e in entries], loss=loss)


__all__ = ["SweepEntry", "SweepInput", "complexity_sweep", "sweep_from_predictions"]
