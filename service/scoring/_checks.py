"""Input validation shared by every scoring function.

One place turns caller input into the canonical shapes the metrics assume:
``y_true`` (n,), seed predictions (K, n), seed probabilities (K, n, C), weights (n,).
Errors name the parameter and say what was expected, in the manner of scikit-learn.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

PROBABILITY_SUM_TOLERANCE = 1e-6
"""A probability row may sum to 1 within this absolute tolerance."""


class ScoringInputError(ValueError):
    """The arrays given to the scoring core do not fit together; ``field`` names the bad one."""

    def __init__(self, field: str, message: str, examples: list[Any] | None = None) -> None:
        super().__init__(f"{field}: {message}")
        self.field = field
        self.message = message
        self.examples = examples or []


def as_targets(y_true: ArrayLike, *, name: str = "y_true") -> NDArray[np.float64]:
    """Return finite regression targets as a 1-d float64 array of at least one row."""
    y = np.asarray(y_true, dtype=np.float64)
    if y.ndim != 1:
        raise ScoringInputError(name, f"expected shape (n,), got {y.shape}")
    if y.size == 0:
        raise ScoringInputError(name, "needs at least one row")
    require_finite(y, name)
    return y


def as_seed_predictions(
    predictions: ArrayLike, n_rows: int, *, name: str = "predictions", check_finite: bool = True
) -> NDArray[np.float64]:
    """Return predictions as a (K, n) float64 array; a 1-d input is one seed.

    ``check_finite=False`` skips the elementwise NaN/infinity check (a full read of the
    array) for callers that take sums over every value anyway: a NaN or infinite input makes
    such a sum non-finite, and only then need they call ``require_finite`` to raise the
    same error this function would.
    """
    p = np.asarray(predictions, dtype=np.float64)
    if p.ndim == 1:
        p = p[np.newaxis, :]
    if p.ndim != 2 or p.shape[1] != n_rows:
        raise ScoringInputError(
            name, f"expected shape (n,) or (K, n) with n={n_rows}, got {p.shape}"
        )
    if p.shape[0] == 0:
        raise ScoringInputError(name, "needs at least one seed")
    if check_finite:
        require_finite(p, name)
    return p


def require_finite(values: NDArray[np.float64], name: str) -> None:
    """Raise ``ScoringInputError(name, ...)`` if any value is NaN or infinite."""
    if not np.isfinite(values).all():
        raise ScoringInputError(name, "contains NaN or infinity")


def as_class_indices(
    labels: ArrayLike, n_classes: int, *, name: str = "y_true"
) -> NDArray[np.intp]:
    """Return class labels already encoded as indices 0..C-1 (any leading shape)."""
    a = np.asarray(labels)
    if a.size == 0:
        raise ScoringInputError(name, "needs at least one row")
    if not np.issubdtype(a.dtype, np.integer):
        raise ScoringInputError(name, f"expected class indices (integers), got dtype {a.dtype}")
    if a.min() < 0 or a.max() >= n_classes:
        raise ScoringInputError(name, f"class indices must lie in [0, {n_classes - 1}]")
    return a.astype(np.intp, copy=False)


def as_seed_probabilities(
    probabilities: ArrayLike, n_rows: int, n_classes: int, *, name: str = "probabilities"
) -> NDArray[np.float64]:
    """Return probabilities as (K, n, C) float64; (n, C) is one seed.

    Each row must lie in [0, 1] and sum to 1 within ``PROBABILITY_SUM_TOLERANCE``.
    """
    q = np.asarray(probabilities, dtype=np.float64)
    if q.ndim == 2:
        q = q[np.newaxis]
    if q.ndim != 3 or q.shape[1:] != (n_rows, n_classes):
        raise ScoringInputError(
            name,
            f"expected shape (n, C) or (K, n, C) with n={n_rows}, C={n_classes}, got {q.shape}",
        )
    low, high = float(q.min()), float(q.max())  # NaN propagates; two reductions, no temporaries
    if not (np.isfinite(low) and np.isfinite(high)):
        raise ScoringInputError(name, "contains NaN or infinity")
    if low < 0 or high > 1:
        raise ScoringInputError(name, "values must lie in [0, 1]")
    row_sums = np.einsum("knc->kn", q)  # much faster than q.sum(axis=2) over a short last axis
    if np.abs(row_sums - 1.0).max() > PROBABILITY_SUM_TOLERANCE:
        raise ScoringInputError(
            name, f"each row must sum to 1 within {PROBABILITY_SUM_TOLERANCE:g}"
        )
    return q


def as_weights(sample_weight: ArrayLike | None, n_rows: int) -> NDArray[np.float64] | None:
    """Return non-negative finite weights (n,) with a positive sum, or None."""
    if sample_weight is None:
        return None
    w = np.asarray(sample_weight, dtype=np.float64)
    if w.shape != (n_rows,):
        raise ScoringInputError("sample_weight", f"expected shape ({n_rows},), got {w.shape}")
    if not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
        raise ScoringInputError("sample_weight", "must be finite, non-negative and not all zero")
    return w
