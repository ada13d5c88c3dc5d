"""The seeded split of a holdout's rows into the feedback slice and the sealed reserve.

Submitters see scores computed on the feedback slice only; the reserve stays sealed until
the holdout is closed. The split is drawn once, at registration, and the service stores
the resulting mask: the stored mask is the guarantee that the split never changes.
Recomputing the same mask from the same seed is a convenience (for audits and tests), not
the guarantee.

Reproducibility: the only randomness used is the raw 64-bit output stream of numpy's
``PCG64`` bit generator, which numpy keeps stable across versions (NEP 19 promises stream
compatibility for bit generators, not for ``Generator`` methods such as ``permutation``).
Each row gets one raw 64-bit key, in row order; within each class the rows with the
smallest keys (ties, which have probability about n^2 / 2^65, broken by row index) form
the feedback slice.

How many rows of each class go to the feedback slice (``feedback_counts``):

1. target total = ``floor(feedback_fraction * n_rows + 1/2)`` (round half up);
2. each class c of n_c rows gets ``floor(feedback_fraction * n_c)`` or
   ``ceil(feedback_fraction * n_c)`` rows (so within one row of its exact share), with a
   product within 1e-9 of an integer treated as that integer (so 0.3 * 10 is 3, not
   3.0000000000000004 or 2.9999999999999996);
3. a class of at least two rows keeps at least one row on each side: where its floor is
   0 the count is raised to 1, where its ceil is n_c the count is lowered to n_c - 1
   (both stay within one row of the exact share);
4. starting from each class's lower count, the remaining rows up to the target total go
   one each to the classes with the largest fractional share ``feedback_fraction * n_c
   - floor(...)`` that can still take one (largest-remainder rounding), ties between
   classes broken by a seeded random key;
5. the total equals the target unless step 3 forces more or fewer rows; then it is the
   closest total the per-class bounds allow.
"""

from __future__ import annotations

import math
import operator

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ._checks import ScoringInputError

__all__ = ["feedback_counts", "feedback_mask"]

_INTEGER_SNAP = 1e-9
"""A share ``fraction * n`` within this (relative, at least absolute) distance of an
integer is that integer; it absorbs the binary representation error of fractions like 0.3."""


def _check_fraction(feedback_fraction: float) -> float:
    try:
        f = float(feedback_fraction)
    except (TypeError, ValueError):
        raise ScoringInputError(
            "feedback_fraction", f"expected a number in (0, 1), got {feedback_fraction!r}"
        ) from None
    if not (math.isfinite(f) and 0.0 < f < 1.0):
        raise ScoringInputError(
            "feedback_fraction", f"must lie strictly between 0 and 1, got {feedback_fraction!r}"
        )
    return f


def _check_count(value: int, field: str, minimum: int) -> int:
    if isinstance(value, (bool, np.bool_)):
        raise ScoringInputError(field, f"expected an integer, got {value!r}")
    try:
        v = operator.index(value)
    except TypeError:
        raise ScoringInputError(field, f"expected an integer, got {value!r}") from None
    if v < minimum:
        raise ScoringInputError(field, f"must be at least {minimum}, got {v}")
    return v


def _floor_ceil(share: float) -> tuple[int, int]:
    nearest = round(share)
    if abs(share - nearest) <= _INTEGER_SNAP * max(1.0, abs(share)):
        return int(nearest), int(nearest)
    return math.floor(share), math.ceil(share)


def feedback_counts(
    class_sizes: ArrayLike, *, feedback_fraction: float, tie_keys: ArrayLike | None = None
) -> NDArray[np.intp]:
    """Number of feedback rows per class, by the rounding rule in the module docstring.

    Parameters
    ----------
    class_sizes : array-like of shape (C,)
        Rows per class (non-negative integers, at least one row in total).
    feedback_fraction : float
        Share of rows in the feedback slice, strictly between 0 and 1.
    tie_keys : array-like of shape (C,), optional
        Breaks ties between classes with equal fractional shares: the larger key gets the
        extra row first. Default: the smaller class index first.

    Returns
    -------
    ndarray of shape (C,), dtype intp
        Feedback rows per class; each within one row of ``feedback_fraction * n_c``.
    """
    f = _check_fraction(feedback_fraction)
    sizes = np.asarray(class_sizes)
    if sizes.ndim != 1 or sizes.size == 0 or not np.issubdtype(sizes.dtype, np.integer):
        raise ScoringInputError("class_sizes", "expected a 1-d array of integer class sizes")
    if (sizes < 0).any() or sizes.sum() < 1:
        raise ScoringInputError("class_sizes", "sizes must be non-negative with a positive sum")
    n_classes = sizes.size
    if tie_keys is None:
        keys = -np.arange(n_classes, dtype=np.float64)
    else:
        keys = np.asarray(tie_keys)
        if keys.shape != (n_classes,):
            raise ScoringInputError("tie_keys", f"expected shape ({n_classes},), got {keys.shape}")

    lower = np.empty(n_classes, dtype=np.intp)
    upper = np.empty(n_classes, dtype=np.intp)
    remainder = np.empty(n_classes, dtype=np.float64)
    for c, n_c in enumerate(sizes.tolist()):
        share = f * n_c
        lo, hi = _floor_ceil(share)
        remainder[c] = share - lo
        if n_c >= 2:
            lo, hi = max(lo, 1), min(hi, n_c - 1)
        lower[c], upper[c] = lo, hi

    counts = lower.copy()
    target = math.floor(f * int(sizes.sum()) + 0.5)
    missing = target - int(counts.sum())
    if missing > 0:
        # Largest remainder first; among equal remainders the larger tie key first.
        order = np.lexsort((-keys, -remainder))
        for c in order:
            if missing == 0:
                break
            if counts[c] < upper[c]:
                counts[c] += 1
                missing -= 1
    return counts


def feedback_mask(
    n_rows: int,
    *,
    feedback_fraction: float,
    seed: int,
    strata: ArrayLike | None = None,
) -> NDArray[np.bool_]:
    """Seeded random split of rows into the feedback slice (True) and the sealed reserve (False).

    Why: submitters must only ever see scores on the feedback slice, so that the reserve
    gives an unbiased final score however often a group probes the feedback slice.

    Parameters
    ----------
    n_rows : int
        Number of holdout rows (at least 1).
    feedback_fraction : float
        Share of rows in the feedback slice, strictly between 0 and 1 (service default 0.3).
    seed : int
        Non-negative seed of the ``PCG64`` stream; store it with the mask.
    strata : array-like of shape (n_rows,), optional
        Class of each row (class indices or labels). When given, every class is split in
        proportion (module docstring: rounding rule, and at least one row on each side for
        every class of two or more rows).

    Returns
    -------
    ndarray of shape (n_rows,), dtype bool
        True for feedback rows, False for reserve rows. The service stores this mask; the
        same arguments give the same mask (module docstring: reproducibility).
    """
    n = _check_count(n_rows, "n_rows", 1)
    f = _check_fraction(feedback_fraction)
    s = _check_count(seed, "seed", 0)

    if strata is None:
        inverse = np.zeros(n, dtype=np.intp)
        n_classes = 1
    else:
        labels = np.asarray(strata)
        if labels.shape != (n,):
            raise ScoringInputError("strata", f"expected shape ({n},), got {labels.shape}")
        if labels.dtype.kind == "f" and not np.isfinite(labels).all():
            raise ScoringInputError("strata", "contains NaN or infinity")
        if labels.dtype.kind == "O":
            raise ScoringInputError("strata", "expected class indices or labels of one dtype")
        _, inverse = np.unique(labels, return_inverse=True)
        inverse = inverse.reshape(-1).astype(np.intp, copy=False)
        n_classes = int(inverse.max()) + 1

    bit_generator = np.random.PCG64(s)
    row_keys = bit_generator.random_raw(n)
    class_keys = bit_generator.random_raw(n_classes)
    sizes = np.bincount(inverse, minlength=n_classes)
    counts = feedback_counts(sizes, feedback_fraction=f, tie_keys=class_keys)

    # Sort by class, then by key, then by row index (lexsort is stable).
    order = np.lexsort((np.arange(n), row_keys, inverse))
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    rank_in_class = np.arange(n) - starts[inverse[order]]
    mask = np.zeros(n, dtype=np.bool_)
    mask[order] = rank_in_class < counts[inverse[order]]
    return mask
