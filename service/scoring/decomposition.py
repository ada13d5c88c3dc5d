"""Bias-variance decompositions of a loss across K seeds, and Murphy's Brier partition.

A submission may carry K prediction sets for the same rows (seeds, bootstrap draws, folds).
Each decomposition splits the expected loss of one seed into what the seeds share (bias:
the loss of their combined "main" prediction) and what they disagree on (variance):

- squared loss (Geman, Bienenstock & Doursat 1992; Hastie, Tibshirani & Friedman, ESL 2nd
  ed., section 7.3), also for class probabilities summed over classes (Brier's multiclass
  form): ``squared_loss_decomposition``;
- zero-one loss (Domingos 2000, AAAI and ICML): ``zero_one_decomposition``;
- log loss (Heskes 1998, Neural Computation 10(6)): ``log_loss_decomposition``;
- the Brier score's partition into reliability, resolution and uncertainty (Murphy 1973,
  Journal of Applied Meteorology 12): ``brier_partition``.

Every function takes ``y_true`` then the seeds' predictions, then keyword options ending in
``sample_weight=None``, and averages over rows with the (optional) weights. Rows are
processed in blocks of a few thousand so that every seed's slice of a block stays in cache:
the computation reads the (K, n) input from memory once (the shared input checks read it
once more), allocates no (K, n) temporaries, and loops in Python over blocks, never rows.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ._checks import (
    ScoringInputError,
    as_class_indices,
    as_seed_predictions,
    as_seed_probabilities,
    as_targets,
    as_weights,
)
from .results import Decomposition

__all__ = [
    "brier_partition",
    "log_loss_decomposition",
    "squared_loss_decomposition",
    "zero_one_decomposition",
]

_EPS = float(np.finfo(np.float64).eps)
"""Probability clip of ``sklearn.metrics.log_loss`` (1.9) for float64: into [eps, 1 - eps]."""

_BLOCK_ELEMENTS = 1 << 16
"""Values per block (512 KiB of float64): a block of K seeds' slices fits in L2 cache."""

_MIN_BLOCK_ROWS = 1024
"""Lower bound on rows per block, so a huge K does not turn the block loop into a row loop."""


def _block_rows(values_per_row: int) -> int:
    return max(_MIN_BLOCK_ROWS, _BLOCK_ELEMENTS // max(values_per_row, 1))


def _share(variance: float, expected_loss: float) -> float:
    """variance / expected loss, defined as 0.0 when the expected loss is 0 (a perfect fit)."""
    return variance / expected_loss if expected_loss != 0.0 else 0.0


# --------------------------------------------------------------------------- squared loss


def _as_squared_inputs(
    y_true: ArrayLike, predictions: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return y as (n, C) and predictions as (K, n, C); C = 1 for plain regression."""
    y_arr = np.asarray(y_true)
    if y_arr.ndim != 2:
        y = as_targets(y_arr)
        p = as_seed_predictions(predictions, y.size)
        return y[:, np.newaxis], p[:, :, np.newaxis]
    y = np.asarray(y_arr, dtype=np.float64)
    n, n_cols = y.shape
    if y.size == 0:
        raise ScoringInputError("y_true", f"needs at least one row and one column, got {y.shape}")
    if not np.isfinite(y).all():
        raise ScoringInputError("y_true", "contains NaN or infinity")
    p = np.asarray(predictions, dtype=np.float64)
    if p.ndim == 2:
        p = p[np.newaxis]
    if p.ndim != 3 or p.shape[1:] != (n, n_cols):
        raise ScoringInputError(
            "predictions",
            f"with y_true of shape (n, C) = ({n}, {n_cols}) expected shape (n, C) or (K, n, C), "
            f"got {p.shape}",
        )
    flat = as_seed_predictions(p.reshape(p.shape[0], n * n_cols), n * n_cols)
    return y, flat.reshape(p.shape)


def _as_noise_variance(noise_variance: float | None) -> float | None:
    if noise_variance is None:
        return None
    try:
        sigma2 = float(noise_variance)
    except (TypeError, ValueError):
        raise ScoringInputError(
            "noise_variance", f"expected a number, got {noise_variance!r}"
        ) from None
    if not math.isfinite(sigma2) or sigma2 < 0:
        raise ScoringInputError(
            "noise_variance", f"must be finite and non-negative, got {noise_variance!r}"
        )
    return sigma2


def squared_loss_decomposition(
    y_true: ArrayLike,
    predictions: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
    noise_variance: float | None = None,
) -> Decomposition:
    """Split the expected squared error of one seed into bias and variance across seeds.

    Tells whether averaging the seeds would help (variance) or a better model is needed
    (bias). Geman, Bienenstock & Doursat (1992); ESL 2nd ed., section 7.3.

    Parameters
    ----------
    y_true : array-like of shape (n,) or (n, C)
        Targets; (n, C) for one-hot labels or target probabilities.
    predictions : array-like of shape (K, n) or (K, n, C)
        One prediction set per seed; (n,) or (n, C) is a single seed. With C columns the
        loss of a row is summed over them (Brier's multiclass form).
    sample_weight : array-like of shape (n,), optional
        Row weights for every mean over rows.
    noise_variance : float, optional
        Known irreducible noise variance sigma^2 of the targets.

    Returns
    -------
    Decomposition
        ``loss="squared"``. ``expected_loss`` = mean over seeds and (weighted) rows of
        ``sum_c (p - y)^2``; ``ensemble_loss`` = that loss of the seed mean ``pbar``;
        ``variance`` = (weighted) mean over rows of the population variance over seeds
        (ddof=0, summed over columns); ``bias`` = ``ensemble_loss`` (which then holds the
        noise), or ``ensemble_loss - noise_variance`` with ``noise = noise_variance`` when
        that is given: an estimate that can be negative on a finite sample.
        ``expected_loss = bias [+ noise] + variance`` exactly; ``variance_share`` =
        variance / expected_loss, and 0.0 when the expected loss is 0.

    Notes
    -----
    The variance is computed in two passes on shifted data (subtract seed 0, take the mean
    of the differences, centre, then sum squares), so a large common offset of the
    predictions (values near 1e7 spread by 0.1) costs no accuracy, and identical seeds give
    a variance of exactly 0. ``expected_loss`` is formed as ``ensemble_loss + variance``:
    equal to the direct mean of ``(p - y)^2`` because the cross term
    ``sum_k (p_k - pbar)`` vanishes.
    """
    y, p = _as_squared_inputs(y_true, predictions)
    w = as_weights(sample_weight, y.shape[0])
    sigma2 = _as_noise_variance(noise_variance)
    return _squared_loss_checked(y, p, w, sigma2)


def _squared_loss_checked(
    y: NDArray[np.float64],
    p: NDArray[np.float64],
    w: NDArray[np.float64] | None,
    sigma2: float | None,
) -> Decomposition:
    """``squared_loss_decomposition`` on validated arrays, by the direct two-pass method.

    ``y`` (n, C), ``p`` (K, n, C), ``w`` (n,) or None, all finite; ``sigma2`` checked by
    ``_as_noise_variance``. For callers that have validated their input already.
    """
    n, n_cols = y.shape
    n_seeds = p.shape[0]
    flat_p = p.reshape(n_seeds, n * n_cols)
    flat_y = y.reshape(n * n_cols)
    block = _block_rows(n_seeds * n_cols)
    width = min(block, n) * n_cols
    centred_buf = np.empty((n_seeds, width))
    mean_buf = np.empty(width)
    err_buf = np.empty(width)
    sq_buf = np.empty(width)

    # Sums by einsum and ufunc reductions, not BLAS (np.dot / np.vdot): a BLAS call per
    # block stalls when its threads compete for a busy machine's cores.
    spread_sum = 0.0  # sum over rows (weighted) of sum over seeds and columns of (p - pbar)^2
    error_sum = 0.0  # sum over rows (weighted) of sum over columns of (pbar - y)^2
    for start in range(0, n, block):
        stop = min(start + block, n)
        lo, hi = start * n_cols, stop * n_cols
        m = hi - lo
        values = flat_p[:, lo:hi]
        centred = centred_buf[:, :m]
        mean = mean_buf[:m]
        err = err_buf[:m]
        first = values[0]
        np.subtract(values, first, out=centred)
        np.add.reduce(centred, axis=0, out=mean)
        mean /= n_seeds
        centred -= mean
        mean += first
        np.subtract(mean, flat_y[lo:hi], out=err)
        if w is None:
            spread_sum += float(np.einsum("km,km->", centred, centred))
            error_sum += float(np.einsum("m,m->", err, err))
            continue
        weights = w[start:stop]
        np.square(centred, out=centred)
        spread = np.add.reduce(centred, axis=0, out=sq_buf[:m])
        np.square(err, out=err)
        if n_cols > 1:
            spread = spread.reshape(-1, n_cols).sum(axis=1)
            err = err.reshape(-1, n_cols).sum(axis=1)
        spread_sum += float(np.einsum("i,i->", spread, weights))
        error_sum += float(np.einsum("i,i->", err, weights))

    total_weight = float(n) if w is None else float(w.sum())
    variance = spread_sum / (n_seeds * total_weight)
    ensemble_loss = error_sum / total_weight
    return _squared_result(ensemble_loss, variance, sigma2)


def _squared_result(ensemble_loss: float, variance: float, sigma2: float | None) -> Decomposition:
    expected_loss = ensemble_loss + variance
    bias = ensemble_loss if sigma2 is None else ensemble_loss - sigma2
    return Decomposition(
        loss="squared",
        expected_loss=expected_loss,
        bias=bias,
        variance=variance,
        variance_share=_share(variance, expected_loss),
        ensemble_loss=ensemble_loss,
        noise=sigma2,
    )


IDENTITY_TOLERANCE = 1e-10
"""Largest relative error allowed for the variance taken as a difference of two losses."""


def _squared_loss_from_losses(
    mean_seed_loss: float,
    ensemble_loss: float,
    sigma2: float | None,
    *,
    n_seeds: int,
    loss_relative_error: float,
    residual_error: float,
) -> Decomposition | None:
    """The squared-loss decomposition from losses already computed, or None if inaccurate.

    The variance over seeds equals, exactly in real arithmetic, the mean over seeds of the
    loss minus the loss of the seed mean (Geman et al. 1992: the cross term vanishes), so a
    caller that has both losses gets the decomposition without another pass over the (K, n)
    predictions. In floating point the difference cancels, so this returns None, and the
    caller must use the direct two-pass method (``_squared_loss_checked``), unless the
    difference is provably accurate to ``IDENTITY_TOLERANCE``:

    Let A = ``mean_seed_loss`` and B = ``ensemble_loss`` as computed, V = A - B.
    ``loss_relative_error`` (g) bounds the relative error of A and of B from forming the
    residuals, squaring and summing (each is a sum of non-negative terms, so a relative
    bound holds: about (log2(block) + number of blocks + a few) units of roundoff for
    blockwise pairwise sums). ``residual_error`` (h) bounds the absolute error of each row's
    ensemble residual e_i as the caller formed it: about K units of roundoff times the
    largest |residual| when e is the mean of the seeds' residuals, but times the largest
    |prediction| when e = pbar - y (that error scales with the predictions' offset, not
    with the residual). By Cauchy-Schwarz, sum_i w_i |e_i| h <= W h sqrt(B), so

        |error of V| <= g (A + B) + 2 h sqrt(B) + h^2 + eps |V|.

    The identity is used when twice that bound is at most ``IDENTITY_TOLERANCE`` times V.
    This is stricter than a plain V >= 1e-6 A rule, which it implies (g >= 20 eps gives
    V >= 4e-5 A): with g about 1e-14 (a million rows) a variance of 1e-6 A could carry a
    relative error near 1e-8 in the worst case, so such small variances go to the direct
    method, as do large offsets when e carries their rounding.
    With one seed (``n_seeds == 1``) the variance is 0 and the ensemble is that seed.
    """
    a, b = mean_seed_loss, ensemble_loss
    if n_seeds == 1:  # one seed: no spread, and the direct method's variance is exactly 0
        return _squared_result(b, 0.0, sigma2) if math.isfinite(b) else None
    variance = a - b
    if not (math.isfinite(a) and math.isfinite(b) and variance > 0.0):
        return None
    bound = (
        loss_relative_error * (a + b)
        + 2.0 * residual_error * math.sqrt(b)
        + residual_error * residual_error
        + _EPS * variance
    )
    if not 2.0 * bound <= IDENTITY_TOLERANCE * variance:
        return None
    return _squared_result(b, variance, sigma2)


# ----------------------------------------------------------------------------- zero-one


def _as_n_classes(n_classes: int) -> int:
    if isinstance(n_classes, bool) or not isinstance(n_classes, (int, np.integer)):
        raise ScoringInputError("n_classes", f"expected an integer, got {n_classes!r}")
    if n_classes < 1:
        raise ScoringInputError("n_classes", f"must be at least 1, got {n_classes!r}")
    return int(n_classes)


def _as_label_inputs(
    y_true: ArrayLike, labels: ArrayLike, n_classes: int
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    y = as_class_indices(y_true, n_classes, name="y_true")
    if y.ndim != 1:
        raise ScoringInputError("y_true", f"expected shape (n,), got {y.shape}")
    lab = as_class_indices(labels, n_classes, name="labels")
    if lab.ndim == 1:
        lab = lab[np.newaxis]
    if lab.ndim != 2 or lab.shape[1] != y.size:
        raise ScoringInputError(
            "labels", f"expected shape (n,) or (K, n) with n={y.size}, got {lab.shape}"
        )
    return y, lab


def _main_prediction(
    labels: NDArray[np.intp], y: NDArray[np.intp], n_classes: int
) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.intp]]:
    """Per row of a (K, m) block: most frequent label (smallest on ties), its count, and
    the count of seeds predicting ``y``.

    With few classes (C <= K), one ``np.bincount`` of (class, row) pairs; with many, a
    sort of each row's K labels and a count of the runs, so memory is O(K m), not O(C m).
    """
    n_seeds, m = labels.shape
    rows = np.arange(m, dtype=np.intp)
    if n_classes <= n_seeds:
        # counts laid out (C, m): the count of class c on row j sits at c * m + j
        counts = np.bincount((labels * m + rows).reshape(-1), minlength=n_classes * m)
        by_class = counts.reshape(n_classes, m)
        main = by_class.argmax(axis=0)  # first maximum: ties go to the smallest label
        return main, by_class.max(axis=0), counts[y * m + rows]
    ordered = np.sort(labels.T, axis=1)  # (m, K), each row ascending
    starts = np.ones_like(ordered, dtype=bool)
    np.not_equal(ordered[:, 1:], ordered[:, :-1], out=starts[:, 1:])
    run = np.cumsum(starts, axis=1) - 1 + (rows * n_seeds)[:, np.newaxis]
    run_length = np.bincount(run.reshape(-1), minlength=m * n_seeds)
    per_seed = run_length[run]  # (m, K): size of the run each label belongs to
    first = per_seed.argmax(axis=1)  # first maximum: the smallest label among ties
    main = ordered[rows, first]
    count_true = np.count_nonzero(labels == y, axis=0)
    return main, per_seed[rows, first], count_true


def zero_one_decomposition(
    y_true: ArrayLike,
    labels: ArrayLike,
    *,
    n_classes: int,
    sample_weight: ArrayLike | None = None,
) -> Decomposition:
    """Domingos' (2000) decomposition of the expected zero-one loss across seeds.

    Says whether the seeds err together (bias) or disagree (variance), and whether their
    disagreement helps (on rows the majority gets wrong) or hurts (where it gets them right).

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True class indices in [0, n_classes).
    labels : array-like of int, shape (K, n)
        Predicted class indices per seed; (n,) is a single seed.
    n_classes : int
        Number of classes C.
    sample_weight : array-like of shape (n,), optional

    Returns
    -------
    Decomposition
        ``loss="zero_one"``. The main prediction ``m[i]`` is the most frequent label over
        seeds, ties to the smallest label (as ``mlxtend.evaluate.bias_variance_decomp``).
        ``bias`` = mean of ``[m[i] != y[i]]``; ``variance`` = mean share of seeds with
        ``p != m`` (total variance, as mlxtend); ``ensemble_loss`` = zero-one loss of ``m``
        (equal to ``bias``). ``extra``: ``unbiased_variance`` (mean of variance[i] on rows
        with ``m == y``, zero elsewhere), ``biased_variance`` (mean of ``-c[i] *
        variance[i]`` on rows with ``m != y``, where ``c[i] = -P(p = y | p != m)``, which is
        -1 for two classes; reported as a non-negative number) and ``net_variance`` =
        unbiased - biased, so that ``expected_loss = bias + net_variance`` exactly
        (noise-free).
    """
    n_cls = _as_n_classes(n_classes)
    y, lab = _as_label_inputs(y_true, labels, n_cls)
    n = y.size
    n_seeds = lab.shape[0]
    w = as_weights(sample_weight, n)

    block = _block_rows(n_seeds)
    # Sums over rows of: seeds wrong, [m != y], seeds != m, seeds != m where m == y,
    # seeds == y where m != y. Integers (exact) without weights, floats with.
    sums = np.zeros(5, dtype=np.int64 if w is None else np.float64)
    for start in range(0, n, block):
        stop = min(start + block, n)
        yb = y[start:stop]
        main, count_main, count_true = _main_prediction(lab[:, start:stop], yb, n_cls)
        biased = main != yb
        wrong = n_seeds - count_true
        off_main = n_seeds - count_main
        terms = np.stack(
            [
                wrong,
                biased,
                off_main,
                np.where(biased, 0, off_main),
                np.where(biased, count_true, 0),
            ]
        )
        sums += terms.sum(axis=1) if w is None else terms @ w[start:stop]

    total_weight = float(n) if w is None else float(w.sum())
    seed_weight = n_seeds * total_weight
    expected_loss = float(sums[0]) / seed_weight
    bias = float(sums[1]) / total_weight
    variance = float(sums[2]) / seed_weight
    unbiased_variance = float(sums[3]) / seed_weight
    biased_variance = float(sums[4]) / seed_weight
    return Decomposition(
        loss="zero_one",
        expected_loss=expected_loss,
        bias=bias,
        variance=variance,
        variance_share=_share(variance, expected_loss),
        ensemble_loss=bias,
        extra={
            "unbiased_variance": unbiased_variance,
            "biased_variance": biased_variance,
            "net_variance": unbiased_variance - biased_variance,
        },
    )


# ------------------------------------------------------------------------------ log loss


def _as_probability_inputs(
    y_true: ArrayLike, probabilities: ArrayLike
) -> tuple[NDArray[np.intp], NDArray[np.float64]]:
    y_arr = np.asarray(y_true)
    if y_arr.ndim != 1:
        raise ScoringInputError("y_true", f"expected shape (n,), got {y_arr.shape}")
    q = np.asarray(probabilities, dtype=np.float64)
    if q.ndim not in (2, 3):
        raise ScoringInputError(
            "probabilities", f"expected shape (n, C) or (K, n, C), got {q.shape}"
        )
    n_cls = q.shape[-1]
    if n_cls < 1:
        raise ScoringInputError("probabilities", "needs at least one class column")
    y = as_class_indices(y_arr, n_cls, name="y_true")
    return y, as_seed_probabilities(q, y.size, n_cls)


def log_loss_decomposition(
    y_true: ArrayLike,
    probabilities: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
) -> Decomposition:
    """Heskes' (1998) decomposition of the expected log loss across seeds.

    The log-loss analogue of bias and variance: the main prediction is the normalized
    geometric mean of the seeds' probabilities, and the variance is how far each seed sits
    from it in Kullback-Leibler divergence.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True class indices in [0, C).
    probabilities : array-like of shape (K, n, C)
        Class probabilities per seed; (n, C) is a single seed. Rows must sum to 1 (within
        ``PROBABILITY_SUM_TOLERANCE``). Every value is clipped into ``[eps, 1 - eps]``
        (``eps = np.finfo(np.float64).eps``) exactly as ``sklearn.metrics.log_loss`` 1.9
        clips float64 input, without renormalizing.
    sample_weight : array-like of shape (n,), optional

    Returns
    -------
    Decomposition
        ``loss="log"``. With clipped ``p_k``, ``g[i, c] = mean_k log p_k[i, c]``,
        ``Z[i] = sum_c exp(g[i, c])`` and ``q = exp(g) / Z``:
        ``expected_loss`` = mean over seeds of the log loss; ``bias`` = log loss of ``q``;
        ``variance`` = mean over rows of ``-log Z[i]`` = mean over seeds of
        ``KL(q || p_k)``; ``expected_loss = bias + variance`` exactly (in floats, to
        rounding: each term is computed on its own, ``bias`` per row without cancellation,
        so a small bias under a large variance keeps its digits). ``q`` is not clipped
        again: it is positive by construction.
        ``ensemble_loss`` is the log loss of the arithmetic mean of the (unclipped)
        probabilities, the ensemble a user would deploy; it differs from ``bias``, the loss
        of the geometric-mean prediction.

    Notes
    -----
    ``-log Z >= 0`` when every seed's row sums to exactly 1 (arithmetic-geometric mean
    inequality). Clipping and the sum tolerance can push a row's sum slightly above 1, so
    the variance can come out negative by that order (about 1e-16, or up to the 1e-6 sum
    tolerance), e.g. a single seed whose rows sum to 1 + 1e-7.
    """
    y, q = _as_probability_inputs(y_true, probabilities)
    n_seeds, n, n_cls = q.shape
    w = as_weights(sample_weight, n)

    block = _block_rows(n_seeds * n_cls)
    rows = np.arange(min(block, n), dtype=np.intp)
    log_buf = np.empty((n_seeds, rows.size, n_cls))
    mean_log_buf = np.empty((rows.size, n_cls))
    # per row: -mean_k log p_k[y], -log Z, -log mean_k p_k[y], -log q[y]
    per_row = np.empty((4, n))
    for start in range(0, n, block):
        stop = min(start + block, n)
        size = stop - start
        r = rows[:size]
        yb = y[start:stop]
        values = q[:, start:stop, :]
        logs = log_buf[:, :size, :]
        np.clip(values, _EPS, 1.0 - _EPS, out=logs)
        np.log(logs, out=logs)
        mean_log = np.add.reduce(logs, axis=0, out=mean_log_buf[:size])
        mean_log /= n_seeds
        np.negative(mean_log[r, yb], out=per_row[0, start:stop])
        np.exp(mean_log, out=mean_log)
        z = np.add.reduce(mean_log, axis=1)
        mean_log[r, yb] = 0.0
        rest = np.add.reduce(mean_log, axis=1)
        rest /= z  # 1 - q[y], summed over the other classes
        np.log(z, out=z)
        np.negative(z, out=per_row[1, start:stop])
        # -log q[y] = log Z - g[y], or -log1p(-(1 - q[y])) where q[y] > 1/2: either way no
        # cancellation (the first loses digits when q[y] is near 1, the second near 0)
        bias_row = per_row[3, start:stop]
        np.add(z, per_row[0, start:stop], out=bias_row)
        near_one = rest < 0.5
        bias_row[near_one] = -np.log1p(-rest[near_one])
        mean_true = np.add.reduce(values[:, r, yb], axis=0, out=per_row[2, start:stop])
        mean_true /= n_seeds
        np.clip(mean_true, _EPS, 1.0 - _EPS, out=mean_true)
        np.log(mean_true, out=mean_true)
        np.negative(mean_true, out=mean_true)

    totals = per_row.mean(axis=1) if w is None else per_row @ w / float(w.sum())
    expected_loss, variance, ensemble_loss, bias = (float(v) for v in totals)
    return Decomposition(
        loss="log",
        expected_loss=expected_loss,
        bias=bias,
        variance=variance,
        variance_share=_share(variance, expected_loss),
        ensemble_loss=ensemble_loss,
    )


# ------------------------------------------------------------------------ Brier partition


def _as_binary_forecasts(probabilities: NDArray[np.float64], n: int) -> NDArray[np.float64]:
    if probabilities.shape != (n,):
        raise ScoringInputError(
            "probabilities", f"expected shape ({n},) or ({n}, C), got {probabilities.shape}"
        )
    if not np.isfinite(probabilities).all():
        raise ScoringInputError("probabilities", "contains NaN or infinity")
    if (probabilities < 0).any() or (probabilities > 1).any():
        raise ScoringInputError("probabilities", "values must lie in [0, 1]")
    return probabilities


def _group_rows(
    forecasts: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.intp]]:
    """Distinct rows of (n, D) forecasts and each row's group index.

    Groups by the first column with a 1-d ``np.unique``; that is already the row grouping
    whenever every row equals its group's first row (always so for continuous forecasts,
    and for one column). Otherwise the columns' ``np.unique`` codes are combined into one
    integer key, re-compacted after each column so it stays below n^2. Both are several
    times faster than ``np.unique(axis=0)``, which sorts rows as byte strings.
    """
    n = forecasts.shape[0]
    first, key = np.unique(forecasts[:, 0], return_index=True, return_inverse=True)[1:]
    key = key.reshape(-1)
    if forecasts.shape[1] > 1 and not np.array_equal(forecasts[first[key]], forecasts):
        for col in range(1, forecasts.shape[1]):
            codes = np.unique(forecasts[:, col], return_inverse=True)[1].reshape(-1)
            first, key = np.unique(key * n + codes, return_index=True, return_inverse=True)[1:]
            key = key.reshape(-1)
    return forecasts[first], key.astype(np.intp, copy=False)


def brier_partition(
    y_true: ArrayLike,
    probabilities: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
) -> dict[str, float]:
    """Murphy's (1973) partition of the Brier score: reliability, resolution, uncertainty.

    Separates miscalibration (reliability, lower is better) from the ability to sort rows
    into groups with different outcome rates (resolution, higher is better) and from how
    hard the labels are in the first place (uncertainty, fixed by the labels).

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        Binary 0/1 labels with ``probabilities`` of shape (n,), or class indices in [0, C)
        with ``probabilities`` of shape (n, C).
    probabilities : array-like of shape (n,) or (n, C)
        Probability of class 1, or one probability vector per row (rows sum to 1).
    sample_weight : array-like of shape (n,), optional

    Returns
    -------
    dict
        ``reliability``, ``resolution``, ``uncertainty`` and ``brier`` (the score itself,
        computed directly as a mean of squared errors) with
        ``brier = reliability - resolution + uncertainty`` (exact in exact arithmetic;
        equal up to rounding in floats). Forecasts are grouped by their distinct values
        (identical probability vectors), which makes the partition exact.

        Scaling: with (n,) probabilities the score is the binary form
        ``mean (p - y)^2``, as ``sklearn.metrics.brier_score_loss`` reports it for binary
        labels (range [0, 1]). With (n, C) it is the sum over classes
        ``mean sum_c (p_c - [y = c])^2`` (Brier 1950; range [0, 2]), which is
        ``brier_score_loss(..., scale_by_half=False)``; for C = 2 that is twice the binary
        form.
    """
    p_arr = np.asarray(probabilities, dtype=np.float64)
    if p_arr.ndim not in (1, 2):
        raise ScoringInputError(
            "probabilities", f"expected shape (n,) or (n, C), got {p_arr.shape}"
        )
    binary = p_arr.ndim == 1
    n_cls = 2 if binary else p_arr.shape[1]
    y = as_class_indices(y_true, max(n_cls, 1), name="y_true")
    if y.ndim != 1:
        raise ScoringInputError("y_true", f"expected shape (n,), got {y.shape}")
    n = y.size
    w = as_weights(sample_weight, n)
    row_weight = np.ones(n) if w is None else w
    total_weight = float(row_weight.sum())

    if binary:
        # one component: the probability of class 1 against the indicator [y = 1]
        forecasts = _as_binary_forecasts(p_arr, n)[:, np.newaxis]
        squared_errors = np.square(forecasts[:, 0] - y)
        distinct, group = _group_rows(forecasts)
        n_groups = distinct.shape[0]
        group_hits = np.bincount(group, weights=row_weight * y, minlength=n_groups)[:, None]
        climate = np.array([float(row_weight @ y)]) / total_weight
    else:
        forecasts = as_seed_probabilities(p_arr, n, n_cls)[0]
        diff = forecasts.copy()
        diff[np.arange(n), y] -= 1.0
        squared_errors = np.einsum("ij,ij->i", diff, diff)
        distinct, group = _group_rows(forecasts)
        n_groups = distinct.shape[0]
        group_hits = np.bincount(
            group * n_cls + y, weights=row_weight, minlength=n_groups * n_cls
        ).reshape(n_groups, n_cls)
        climate = np.bincount(y, weights=row_weight, minlength=n_cls) / total_weight

    group_weight = np.bincount(group, weights=row_weight, minlength=n_groups)
    present = group_weight > 0
    observed = np.zeros_like(group_hits)
    np.divide(group_hits, group_weight[:, np.newaxis], out=observed, where=present[:, np.newaxis])
    # groups of zero weight have observed = 0 and contribute 0 to both sums below
    miscalibration = distinct - observed
    spread = observed - climate
    reliability = (
        float(group_weight @ np.einsum("ij,ij->i", miscalibration, miscalibration)) / total_weight
    )
    resolution = float(group_weight @ np.einsum("ij,ij->i", spread, spread)) / total_weight
    uncertainty = float(np.sum(climate * (1.0 - climate)))
    brier = float(row_weight @ squared_errors) / total_weight
    return {
        "reliability": reliability,
        "resolution": resolution,
        "uncertainty": uncertainty,
        "brier": brier,
    }
