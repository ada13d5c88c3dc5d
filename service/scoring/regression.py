"""Regression metrics across seeds: one fused pass, intervals, bias-variance, flags.

Naming law (as in ``sklearn.metrics``): ``*_score`` is higher-is-better, ``*_error`` and
``*_loss`` lower-is-better. Our metric keys are short and fixed (``METRICS``):

=========================  ==============================================  ==========
key                        scikit-learn reference                          direction
=========================  ==============================================  ==========
``mse``                    ``mean_squared_error``                          lower
``rmse``                   ``root_mean_squared_error``                     lower
``mae``                    ``mean_absolute_error``                         lower
``median_absolute_error``  ``median_absolute_error``                       lower
``max_error``              ``max_error``                                   lower
``r2``                     ``r2_score`` (``force_finite=True``)            higher
``explained_variance``     ``explained_variance_score`` (``force_finite``)  higher
``mape``                   ``mean_absolute_percentage_error``              lower
=========================  ==============================================  ==========

Each metric agrees with scikit-learn to about 1e-12 relative, including its edge cases:

- constant targets: R^2 and explained variance are 1.0 for perfect predictions and 0.0
  otherwise (scikit-learn's ``force_finite=True``);
- a single row: R^2 is NaN (scikit-learn warns and returns NaN; we return NaN silently and
  say so in ``Report.details["notes"]``);
- zero targets: MAPE divides by ``max(|y|, eps)`` with eps the float64 machine epsilon
  (about 2.2e-16), so one zero target with a non-zero error makes MAPE astronomically large
  (about 4.5e15 times the error). We match that and report the count of zero targets in
  ``details["mape_zero_targets"]``;
- weights: as ``sample_weight`` in scikit-learn; the weighted median is scikit-learn's
  ``_weighted_percentile(..., average=True)`` (the averaged inverted CDF).

Where we differ (documented and tested): scikit-learn's ``max_error`` takes no weights;
with weights we take the maximum over rows of positive weight (a zero weight excludes a
row from every metric, consistently).

Shapes: ``y_true`` (n,); ``predictions`` (K, n) for K seeds, or (n,) for one.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ._checks import (
    ScoringInputError,
    as_seed_predictions,
    as_targets,
    as_weights,
    require_finite,
)
from .intervals import (
    delta_ratio_from_sums,
    delta_ratio_interval,
    monotone_interval,
    no_interval,
    normal_interval_from_moments,
    order_statistic_ranks,
    sd_from_sum_of_squares,
    seed_mean_interval,
    select_order_statistics,
    z_value,
)
from .options import ScoringOptions
from .results import Decomposition, Interval, Report, Spread

METRICS: tuple[str, ...] = (
    "mse",
    "rmse",
    "mae",
    "median_absolute_error",
    "max_error",
    "r2",
    "explained_variance",
    "mape",
)
"""The regression metric keys, in report order."""

MAPE_EPSILON: float = float(np.finfo(np.float64).eps)
"""MAPE's denominator floor, ``max(|y|, MAPE_EPSILON)``, as in scikit-learn."""

_BLOCK_VALUES = 1 << 17
"""Values per block of the fused pass (1 MiB of float64 over all seeds): in cache."""

_MIN_BLOCK_ROWS = 1024
"""Lower bound on rows per block, so many seeds do not shrink blocks to a few rows."""

_ALIGN_BYTES = 64
"""Scratch buffers start on a cache line, and so does each seed's row of a block: binary
ufuncs writing to a misaligned output ran about half as fast (measured, AVX-512)."""

_BRACKET_MIN_ROWS = 1 << 16
"""From this many rows on, the median is selected through a sampled bracket."""

_SAMPLE_SIZE = 1 << 14
"""Rows sampled to place each seed's bracket around its median."""

_SAMPLE_SEED = 1_202_2026
"""Fixed seed of the bracket's row sample: the same input always takes the same path."""

_BRACKET_Z = 3.0
"""Bracket margin in binomial standard deviations of the sample rank. A miss (chance about
3e-3 per seed) costs one exact selection for that seed; a wider margin costs every seed a
denser scan (5 standard deviations kept twice as many values and made the scan, whose cost
grows with the share kept, about twice as slow)."""

_EV_SHORTCUT_TOLERANCE = 1e-3
"""The explained variance interval takes its one-pass form when that moves the half-width
by at most this share (see ``_explained_variance_interval``)."""

_EV_EXACT_SHARE = 0.5
"""Explained variance's numerator is var(r) = mean(r^2) - mean(r)^2; when mean(r)^2 is at
least this share of mean(r^2) the subtraction could lose digits, so that seed is recomputed
with scikit-learn's two-pass formula instead."""

_UNIT_ROUNDOFF = float(np.finfo(np.float64).eps) / 2
"""Unit roundoff u of float64 (relative error of one rounded operation)."""

_OVERFLOW_MESSAGE = (
    "squared errors overflow float64: some predictions and targets differ by "
    "more than about 1e154; rescale the targets"
)


def _aligned_empty(size: int) -> NDArray[np.float64]:
    """An uninitialised float64 buffer of ``size`` values starting on ``_ALIGN_BYTES``."""
    raw = np.empty(size + _ALIGN_BYTES // 8)
    skip = (-raw.ctypes.data % _ALIGN_BYTES) // 8
    return raw[skip : skip + size]


# --------------------------------------------------------------------------------------
# Fused pass
# --------------------------------------------------------------------------------------


_TARGET_BLOCK = 1 << 14
"""Rows per block when the targets are summarized: the block's temporaries stay in cache."""


@dataclass
class _TargetStats:
    """What the metrics need from the targets alone, computed once per set of rows.

    Per-row quantities ((y - mean)^2 and 1 / max(|y|, eps)) are not stored: they are formed
    block by block where they are used (``centred_sq``, ``inverse_scale``), which is cheaper
    than a fresh (n,) array (its page faults alone cost as much as a few passes over it).
    """

    y: NDArray[np.float64]
    weights: NDArray[np.float64] | None
    weight_sum: float
    mean: float
    r2_denominator: float  # sum w (y - mean)^2, as in r2_score
    ev_denominator: float  # weighted mean of (y - mean)^2, as in explained_variance_score
    positive: NDArray[np.bool_] | None  # rows of positive weight (weights only)
    zero_targets: int
    block_rows: int | None = None  # the blocks of ``block_centred_sq``
    block_centred_sq: list[float] | None = None  # per block: sum w (y - mean)^2

    def centred_sq(self, rows: slice, out: NDArray[np.float64]) -> NDArray[np.float64]:
        """(y - mean)^2 on ``rows``, written to ``out`` (of the rows' length)."""
        np.subtract(self.y[rows], self.mean, out=out)
        return np.multiply(out, out, out=out)

    def inverse_scale(
        self, rows: slice, out: NDArray[np.float64], *, weighted: bool = False
    ) -> NDArray[np.float64]:
        """MAPE's 1 / max(|y|, eps) on ``rows`` (times the weight with ``weighted``)."""
        np.abs(self.y[rows], out=out)
        np.maximum(out, MAPE_EPSILON, out=out)
        if weighted and self.weights is not None:
            return np.divide(self.weights[rows], out, out=out)
        return np.divide(1.0, out, out=out)


def _target_stats(
    y: NDArray[np.float64], w: NDArray[np.float64] | None, block_rows: int | None = None
) -> _TargetStats:
    """Summarize the targets; with ``block_rows`` (the fused pass's block length) also keep
    each block's sum of w (y - mean)^2, which the interval co-moments use."""
    mean = float(np.average(y, weights=w))
    n = y.size
    step = min(n, block_rows or _TARGET_BLOCK)
    buf = _aligned_empty(step)
    r2_den = 0.0
    zero_targets = 0
    block_sums = []
    for start in range(0, n, step):
        stop = min(start + step, n)
        sl = slice(start, stop)
        t = buf[: stop - start]
        zero_targets += int(np.count_nonzero(y[sl] == 0.0))
        np.subtract(y[sl], mean, out=t)
        if w is None:
            block = float(np.einsum("i,i->", t, t))
        else:
            np.multiply(t, t, out=t)
            block = float(np.einsum("i,i->", t, w[sl]))
        r2_den += block
        block_sums.append(block)
    weight_sum = float(n) if w is None else float(w.sum())
    return _TargetStats(
        y=y,
        weights=w,
        weight_sum=weight_sum,
        mean=mean,
        r2_denominator=r2_den,
        ev_denominator=r2_den / weight_sum,
        positive=None if w is None else w > 0,
        zero_targets=zero_targets,
        block_rows=step if block_rows else None,
        block_centred_sq=block_sums if block_rows else None,
    )


@dataclass
class _PassResult:
    """Sums of one fused pass, one entry per prediction row: the K seeds, then (when asked)
    the seed-averaged prediction. Sums are weighted when weights are given."""

    sum_residual: NDArray[np.float64]  # sum w r
    sum_squared: NDArray[np.float64]  # sum w r^2
    sum_absolute: NDArray[np.float64]  # sum w |r|
    sum_percentage: NDArray[np.float64]  # sum w |r| / max(|y|, eps)
    max_absolute: NDArray[np.float64]  # max |r| (over rows of positive weight)
    median: NDArray[np.float64] | None  # median |r| (weighted: scikit-learn's rule)
    median_low: NDArray[np.float64] | None  # order-statistic interval of the median
    median_high: NDArray[np.float64] | None
    row_loss: NDArray[np.float64] | None  # (n,) mean over the K seeds of r^2
    moments: dict[str, float] | None  # co-moments of the per-row values (``_RowMoments``)
    squared_relative_error: float  # bound on the relative rounding error of sum_squared


def _pass_step(n: int, n_rows: int) -> int:
    """Rows per block of the fused pass over ``n_rows`` prediction rows of n values."""
    step = min(n, max(_MIN_BLOCK_ROWS, _BLOCK_VALUES // n_rows))
    return min(n, -(-step // 8) * 8)  # whole cache lines per row of a block


def _fused_pass(
    ts: _TargetStats,
    predictions: NDArray[np.float64],
    *,
    name: str = "predictions",
    ensemble: bool = False,
    median: bool = True,
    median_interval_level: float | None = None,
    row_loss: bool = False,
    moments: bool = False,
) -> _PassResult:
    """Every sum the metrics need, in one sweep over blocks of rows, all seeds at once.

    For each block of rows, the residuals r = p - y of every seed (and, with ``ensemble``,
    those of the seed-averaged prediction, e = sum_k r_k / K) are made once into one small
    2-d buffer that stays in cache while it is turned into |r| and then r^2 in place:
    every sum, the per-row accumulations over seeds and the median's candidates are taken
    from it. The (K, n) predictions are read once; no temporary of n rows per seed is made.

    The ensemble's residual is the mean of the seeds' residuals, equal in exact arithmetic
    to pbar - y (pbar = ``predictions.mean(axis=0)``, as scikit-learn would be given) and
    more accurate in floating point: it carries no rounding at the scale of the predictions
    themselves, only of the residuals (so a large common offset costs nothing).

    ``predictions`` need not have been checked for NaN or infinity: any such value makes
    its seed's sum of squares non-finite, and only then is the input checked elementwise
    (``ScoringInputError`` on ``name``). Non-finite sums of finite input (overflow) are
    returned as they are, for the caller to judge.

    ``moments`` (with ``ensemble`` and ``row_loss``) also accumulates the co-moments of the
    per-row values that the intervals need (``_RowMoments``), from the same blocks.
    """
    y, w = ts.y, ts.weights
    n_seeds, n = predictions.shape
    n_rows = n_seeds + int(ensemble)
    step = _pass_step(n, n_rows)
    storage = _aligned_empty(n_rows * step)
    scale = _aligned_empty(step)  # the block's (weighted) inverse scale for MAPE
    s_r = np.zeros(n_rows)
    s_sq = np.zeros(n_rows)
    s_abs = np.zeros(n_rows)
    s_pct = np.zeros(n_rows)
    block_sums = np.empty((3, n_rows))  # the block's sums of |r|, |r| / |y| and r^2
    m_abs = np.full(n_rows, -np.inf if w is None else 0.0)
    rows_sq = _aligned_empty(n) if row_loss else None
    row_moments = None
    if moments:
        assert ensemble and row_loss
        ratios = n >= 2 and ts.r2_denominator != 0.0
        row_moments = _RowMoments(ts, n_seeds, step, ratios)

    half = n // 2
    median_ranks = (half - 1, half) if n % 2 == 0 else (half,)
    ci_ranks = None
    if median and w is None and median_interval_level is not None:
        ci_ranks = order_statistic_ranks(n, 0.5, median_interval_level)
    selector = (
        _BracketSelector(ts, predictions, ensemble, median_ranks + (ci_ranks or ()), step)
        if median and w is None
        else None
    )

    n_blocks = 0
    for start in range(0, n, step):
        n_blocks += 1
        stop = min(start + step, n)
        sl = slice(start, stop)
        a = storage[: n_rows * (stop - start)].reshape(n_rows, stop - start)
        np.subtract(predictions[:, sl], y[sl], out=a[:n_seeds])
        if ensemble:  # the same operations as _ensemble_residual
            e = np.add.reduce(a[:n_seeds], axis=0, out=a[n_seeds])
            e /= n_seeds
        # einsum's row sums run about twice as fast as np.add.reduce(a, axis=1); only the
        # sums of squares, whose error bound the decomposition relies on, stay pairwise
        if w is None:
            inc_r = np.einsum("kc->k", a)
        else:
            inc_r = np.einsum("kc,c->k", a, w[sl])
        s_r += inc_r
        if row_moments is not None:
            row_moments.start_block(sl, a[n_seeds], float(inc_r[n_seeds]))
        np.abs(a, out=a)  # a = |r| from here
        if w is None:
            inc_abs = np.einsum("kc->k", a, out=block_sums[0])
            np.maximum(m_abs, np.maximum.reduce(a, axis=1), out=m_abs)
        else:
            inc_abs = np.einsum("kc,c->k", a, w[sl], out=block_sums[0])
            np.maximum(m_abs, np.max(a, axis=1, where=ts.positive[sl], initial=0.0), out=m_abs)
        s_abs += inc_abs
        inv = ts.inverse_scale(sl, scale[: stop - start], weighted=True)
        s_pct += np.einsum("kc,c->k", a, inv, out=block_sums[1])
        if row_moments is not None:
            np.add.reduce(a[:n_seeds], axis=0, out=row_moments.abs_sum(stop - start))
        if selector is not None:
            selector.add_block(a)
        np.multiply(a, a, out=a)  # a = r^2 from here (|r|^2 is r^2 to the bit)
        if rows_sq is not None:
            np.add.reduce(a[:n_seeds], axis=0, out=rows_sq[sl])
            rows_sq[sl] /= n_seeds
        if w is not None:
            a *= w[sl]
        s_sq += np.add.reduce(a, axis=1, out=block_sums[2])  # pairwise: squared_relative_error
        if row_moments is not None:
            assert rows_sq is not None
            row_moments.end_block(
                sl,
                rows_sq[sl],
                inv if w is None else None,
                np.add.reduce(block_sums[:, :n_seeds], axis=1),
            )

    if not np.isfinite(s_sq).all():
        require_finite(predictions, name)  # NaN or infinity in the input: the named error

    residual_row = _residual_rows(predictions, y, ensemble)
    med = med_low = med_high = None
    if median:
        med = np.empty(n_rows)
        med_low = np.full(n_rows, np.nan)
        med_high = np.full(n_rows, np.nan)
        for k in range(n_rows):
            if selector is not None:
                found = selector.finish_row(k, lambda k=k: np.abs(residual_row(k)))
                med[k] = found[half] if n % 2 else (found[half - 1] + found[half]) / 2
                if ci_ranks is not None:
                    med_low[k], med_high[k] = found[ci_ranks[0]], found[ci_ranks[1]]
            else:
                assert w is not None
                scratch = np.abs(residual_row(k))
                med[k], med_low[k], med_high[k] = _weighted_median(
                    scratch, w, median_interval_level
                )
    # Each sum of squares: r = p - y and r^2 (and w r^2) round once each (4 u), numpy's
    # pairwise sum of a block's row errs by at most about (log2(step) + 16) u (16 terms
    # summed serially per accumulator, then pairwise), and the block sums are added
    # serially (n_blocks u); a few u more for the means formed from them.
    squared_relative_error = (
        math.ceil(math.log2(max(step, 2))) + n_blocks + n_rows + 24
    ) * _UNIT_ROUNDOFF
    return _PassResult(
        sum_residual=s_r,
        sum_squared=s_sq,
        sum_absolute=s_abs,
        sum_percentage=s_pct,
        max_absolute=m_abs,
        median=med,
        median_low=med_low,
        median_high=med_high,
        row_loss=rows_sq,
        moments=None if row_moments is None else row_moments.finish(),
        squared_relative_error=squared_relative_error,
    )


_PAIRS = ("vv", "qq", "uu", "ee", "bb", "ub", "eb", "ue")
"""Co-moments ``_RowMoments`` keeps, in the order it computes them (``vv`` to ``bb``: the
squares of its buffer's rows v, q, u, e, b; then the cross products). v mean |r| over seeds,
q the MAPE term, u the row loss, e the ensemble's residual, b (y - mean)^2; e and b only
for the r2 and explained variance intervals."""


class _RowMoments:
    """Sums of squared deviations and cross-products of the per-row values the intervals
    use, accumulated block by block inside the fused pass (no (n,) array of them is kept).

    Per row i, with weight w_i: u = mean over seeds of r^2 (the row loss), v = mean over
    seeds of |r|, q = v / max(|y|, eps), b = (y - mean y)^2 and e = the ensemble's residual.
    Within a block the values are centred at the block's own weighted means, which the
    pass's per-block sums give for free (b's comes from ``_target_stats`` summarizing the
    targets in the same blocks), and their products summed: the
    accuracy of the two-pass formula, with no E[x^2] - E[x]^2 cancellation. Blocks combine
    exactly by the pairwise formula of Chan, Golub & LeVeque (1979, "Updating formulae and a
    pairwise algorithm for computing sample variances"):
    C_xy = sum_j C_xy,j + sum_j W_j (xbar_j - xbar)(ybar_j - ybar).

    The centred values are written to the rows of one (5, step) buffer, so that three
    einsum calls give all eight products (2-d einsums cost less per product than 1-d ones).
    The pass calls ``start_block`` while the block still holds r (for e), writes the sum of
    |r| over seeds to ``abs_sum(m)``, then calls ``end_block``.
    """

    def __init__(
        self, ts: _TargetStats, n_seeds: int, step: int, ratios: bool
    ) -> None:
        if ratios and (ts.block_rows != step or ts.block_centred_sq is None):
            raise ValueError("the targets must be summarized in the pass's blocks")
        self.ts = ts
        self.n_seeds = n_seeds
        self.ratios = ratios  # also e and b (the r2 and explained variance intervals)
        self.step = step
        self.rows = 5 if ratios else 3
        self.centred = _aligned_empty(5 * step).reshape(5, step)  # v, q, u, e, b
        self.weighted = (
            None if ts.weights is None else _aligned_empty(5 * step).reshape(5, step)
        )
        n_blocks = -(-ts.y.size // step)
        # per block: its weight, means (K v, K q, K u, e, b) and products (``_PAIRS``),
        # summed pairwise at the end
        self.block_weights = np.zeros(n_blocks)
        self.block_means = np.zeros((n_blocks, 5))
        self.products = np.zeros((n_blocks, len(_PAIRS)))

    def start_block(self, rows: slice, residual: NDArray[np.float64], sum_e: float) -> None:
        """The block's ensemble residuals e (before the pass overwrites them) and sum w e."""
        w = self.ts.weights
        m = residual.size
        j = rows.start // self.step
        weight = float(m) if w is None else float(np.einsum("i->", w[rows]))
        self.block_weights[j] = weight
        if self.ratios and weight > 0.0:
            mean_e = sum_e / weight
            self.block_means[j, 3] = mean_e
            np.subtract(residual, mean_e, out=self.centred[3, :m])

    def abs_sum(self, m: int) -> NDArray[np.float64]:
        """Where the pass writes the block's sum over seeds of |r| (K v)."""
        return self.centred[0, :m]

    def end_block(
        self,
        rows: slice,
        row_loss: NDArray[np.float64],
        inverse_scale: NDArray[np.float64] | None,
        sums: NDArray[np.float64],
    ) -> None:
        """The block's row losses u, 1 / max(|y|, eps) (None: formed here) and its weighted
        sums of K v, K q and K u from the pass; K v is in ``abs_sum(m)`` already."""
        j = rows.start // self.step
        weight = self.block_weights[j]
        if not weight > 0.0:  # every weight of the block is zero: it adds nothing
            return
        ts = self.ts
        m = row_loss.size
        c = self.centred[:, :m]
        means = np.divide(sums, weight, out=self.block_means[j, :3])  # K v, K q, K u
        if inverse_scale is None:
            inverse_scale = ts.inverse_scale(rows, c[2])
        np.multiply(c[0], inverse_scale, out=c[1])  # K q = K v / max(|y|, eps)
        c[:2] -= means[:2, np.newaxis]  # centred K v, K q: 1 / K^2 applied in ``finish``
        np.subtract(row_loss, means[2] / self.n_seeds, out=c[2])
        products = self.products[j]
        used = c[: self.rows]
        weighted = used
        if ts.weights is not None:  # weight one factor of each product (b's once formed)
            assert self.weighted is not None
            weighted = self.weighted[: self.rows, :m]
            ready = min(self.rows, 4)
            np.multiply(c[:ready], ts.weights[rows], out=weighted[:ready])
        if self.ratios:
            b = np.subtract(ts.y[rows], ts.mean, out=c[4])
            np.multiply(b, b, out=b)  # (y - mean y)^2
            assert ts.block_centred_sq is not None  # summed by _target_stats, same blocks
            mean_b = ts.block_centred_sq[j] / weight
            self.block_means[j, 4] = mean_b
            b -= mean_b
            if ts.weights is not None:
                np.multiply(b, ts.weights[rows], out=weighted[4])
            np.einsum("km,m->k", weighted[2:4], c[4], out=products[5:7])  # ub, eb
            np.einsum("km,km->k", weighted[2:3], c[3:4], out=products[7:8])  # ue
        np.einsum("km,km->k", weighted, used, out=products[: self.rows])

    def finish(self) -> dict[str, float]:
        """The co-moments about the overall weighted means: sum_i w_i (x_i - xbar)(y_i - ybar)."""
        weights = self.block_weights
        means = self.block_means
        k = float(self.n_seeds)
        means[:, :3] /= k  # the block means of K v, K q and K u
        total = float(weights.sum())
        overall = np.einsum("j,jx->x", weights, means) / total if total > 0 else 0.0
        centred = means - overall
        index = {"v": 0, "q": 1, "u": 2, "e": 3, "b": 4}
        scale = {"vv": 1.0 / k**2, "qq": 1.0 / k**2}  # their centred values were K v, K q
        within = self.products.sum(axis=0)
        out = {}
        for j, name in enumerate(_PAIRS):
            x, y = centred[:, index[name[0]]], centred[:, index[name[1]]]
            between = float(np.einsum("j,j,j->", weights, x, y))
            out[name] = float(within[j]) * scale.get(name, 1.0) + between
        return out


class _BracketSelector:
    """Exact order statistics of each prediction row's |r| at a few ranks, fed block by block.

    A fixed random sample of rows (``_SAMPLE_SIZE``, drawn with a fixed seed, the same rows
    for every seed) gives each seed a bracket [lo, hi] that holds the wanted ranks with high
    probability (``_BRACKET_Z`` binomial standard deviations of margin). Each block then
    only counts its values below lo and keeps those inside [lo, hi] (a few percent of the
    rows), from which the ranks are selected at the end. The counts verify the bracket;
    should it miss (probability about 3e-3 per seed), that seed's |r| is recomputed and
    partitioned exactly (``select_order_statistics``). Either way the result is exact; only
    time differs. Below ``_BRACKET_MIN_ROWS`` rows the bracket is the whole line: every
    value is kept.

    Counting uses a (rows, step) uint8 tally of the "below" masks, added up every 255
    blocks, and the kept values are found with one ``flatnonzero`` per block: both much
    cheaper than ``count_nonzero(..., axis=1)`` and boolean indexing of a 2-d block.
    """

    def __init__(
        self,
        ts: _TargetStats,
        predictions: NDArray[np.float64],
        ensemble: bool,
        ranks: tuple[int, ...],
        step: int,
    ) -> None:
        n_seeds, n = predictions.shape
        n_rows = n_seeds + int(ensemble)
        self.ranks = tuple(sorted(set(ranks)))
        lo = np.full(n_rows, -np.inf)
        hi = np.full(n_rows, np.inf)
        if n >= _BRACKET_MIN_ROWS:
            rows = np.sort(np.random.default_rng(_SAMPLE_SEED).integers(0, n, _SAMPLE_SIZE))
            picked = np.empty((n_rows, _SAMPLE_SIZE))
            np.take(predictions, rows, axis=1, out=picked[:n_seeds])
            picked[:n_seeds] -= ts.y[rows]
            if ensemble:  # as the pass forms it
                np.add.reduce(picked[:n_seeds], axis=0, out=picked[n_seeds])
                picked[n_seeds] /= n_seeds
            np.abs(picked, out=picked)
            margin = _BRACKET_Z * 0.5 * math.sqrt(_SAMPLE_SIZE)
            j_lo = math.floor(self.ranks[0] / n * _SAMPLE_SIZE - margin)
            j_hi = math.ceil((self.ranks[-1] + 1) / n * _SAMPLE_SIZE + margin)
            for k, row in enumerate(picked):
                # single-pivot partitions (much faster in numpy than a sort, or than one
                # partition with two pivots); the second only above the first
                if j_lo >= 0:
                    row.partition(j_lo)
                    lo[k] = row[j_lo]
                if j_hi < _SAMPLE_SIZE:
                    above = max(j_lo, 0)
                    row[above:].partition(j_hi - above)
                    hi[k] = row[j_hi]
        self.lo = lo[:, np.newaxis]
        self.hi = hi[:, np.newaxis]
        self.below = np.zeros(n_rows, dtype=np.int64)
        self.tally = np.zeros((n_rows, step), dtype=np.uint8)
        self.tallied = 0  # blocks in the tally since it was last added up
        self.below_mask = np.empty(n_rows * step, dtype=bool)
        self.keep_mask = np.empty(n_rows * step, dtype=bool)
        self.step = step
        self.row_numbers = np.arange(n_rows + 1)
        self.row_starts = self.row_numbers * step  # flat offset of each row in a full block
        self.parts: list[tuple[NDArray[np.float64], NDArray[np.intp]]] = []

    def add_block(self, a: NDArray[np.float64]) -> None:
        """Take in one block of |r|, shape (rows, m), C-contiguous."""
        n_rows, m = a.shape
        below = np.less(a, self.lo, out=self.below_mask[: n_rows * m].reshape(n_rows, m))
        tally = self.tally[:, :m]
        np.add(tally, below.view(np.uint8), out=tally)
        self.tallied += 1
        if self.tallied == 255:  # a uint8 count holds 255 blocks
            self._add_up_tally()
        keep = np.less_equal(a, self.hi, out=self.keep_mask[: n_rows * m].reshape(n_rows, m))
        np.not_equal(keep, below, out=keep)  # lo <= a <= hi (a < lo implies a <= hi)
        where = np.flatnonzero(keep)
        starts = self.row_starts if m == self.step else self.row_numbers * m
        self.parts.append((a.reshape(-1)[where], where.searchsorted(starts)))

    def _add_up_tally(self) -> None:
        self.below += self.tally.sum(axis=1, dtype=np.int64)
        self.tally.fill(0)
        self.tallied = 0

    def finish_row(
        self, k: int, exact_values: Callable[[], NDArray[np.float64]]
    ) -> dict[int, float]:
        if self.tallied:
            self._add_up_tally()
        below = int(self.below[k])
        kept = np.concatenate([vals[off[k] : off[k + 1]] for vals, off in self.parts])
        if below <= self.ranks[0] and below + kept.size > self.ranks[-1]:
            found = select_order_statistics(kept, [r - below for r in self.ranks])
            return {r: found[r - below] for r in self.ranks}
        return select_order_statistics(exact_values(), self.ranks)


def _weighted_median(
    values: NDArray[np.float64], w: NDArray[np.float64], level: float | None
) -> tuple[float, float, float]:
    """scikit-learn's weighted median, plus Woodruff's interval bounds when ``level`` is set.

    A port of ``sklearn.utils.stats._weighted_percentile(values, w, 50, average=True)``
    (the averaged inverted CDF: the mean of the two middle values when the cumulative weight
    lands exactly on one half). The interval: weighted quantiles at 1/2 -/+
    z * sqrt(1/4 / n_eff), n_eff Kish's effective n (Woodruff 1952, JASA 47).
    """
    n = values.size
    order = np.argsort(values)  # the same (non-stable) sort scikit-learn uses
    sorted_w = w[order]
    cdf = np.cumsum(sorted_w)
    target = 0.5 * cdf[-1]
    idx = min(int(np.searchsorted(cdf, target)), n - 1)
    value = float(values[order[idx]])
    if cdf[idx] - target <= np.finfo(np.float64).eps:
        nxt = min(idx + 1, n - 1)
        if sorted_w[nxt] == 0:
            nxt = int(np.searchsorted(cdf, cdf[idx], side="right"))
            if nxt > n - 1:
                nxt = idx
        value = (value + float(values[order[nxt]])) / 2
    if level is None:
        return value, math.nan, math.nan
    wsum = float(cdf[-1])
    n_eff = wsum * wsum / float(np.einsum("i,i->", w, w))
    half = z_value(level) * math.sqrt(0.25 / n_eff)
    if half >= 0.5:
        return value, math.nan, math.nan
    bounds = []
    for q in (0.5 - half, 0.5 + half):
        j = min(int(np.searchsorted(cdf, q * wsum, side="left")), n - 1)
        bounds.append(float(values[order[j]]))
    return value, bounds[0], bounds[1]


def _explained_variance_numerator(
    ts: _TargetStats,
    residual_row: Callable[[int], NDArray[np.float64]],
    k: int,
    sum_residual: float,
    sum_squared: float,
) -> float:
    """Weighted variance of the residuals of one seed, as explained_variance_score's numerator."""
    mean_r = sum_residual / ts.weight_sum
    mean_sq = sum_squared / ts.weight_sum
    if mean_r * mean_r < _EV_EXACT_SHARE * mean_sq:
        return mean_sq - mean_r * mean_r
    # scikit-learn's own two-pass formula on its y - p, which is exactly -(p - y): negating
    # every value changes neither the centred squares nor, bit for bit, their mean
    diff = residual_row(k)
    diff_mean = np.average(diff, weights=ts.weights)
    diff -= diff_mean
    np.multiply(diff, diff, out=diff)
    return float(np.average(diff, weights=ts.weights))


def _fraction_explained(numerator: float, denominator: float) -> float:
    """1 - numerator / denominator with scikit-learn's force_finite conventions."""
    if numerator == 0.0:
        return 1.0
    if denominator == 0.0:
        return 0.0
    return 1.0 - numerator / denominator


def _metrics_from_pass(
    ts: _TargetStats,
    res: _PassResult,
    residual_row: Callable[[int], NDArray[np.float64]],
    rows: slice = slice(None),
) -> dict[str, NDArray[np.float64]]:
    """Metric values, one per prediction row of ``res`` selected by ``rows``.

    ``residual_row(k)`` returns row k's residuals (a fresh array), needed only for the
    explained variance's two-pass fallback.
    """
    indices = range(res.sum_squared.size)[rows]
    n = ts.y.size
    sum_sq = res.sum_squared[rows]
    mse = sum_sq / ts.weight_sum
    r2 = np.empty(len(indices))
    ev = np.empty(len(indices))
    for j, k in enumerate(indices):
        r2[j] = math.nan if n < 2 else _fraction_explained(sum_sq[j], ts.r2_denominator)
        ev_num = _explained_variance_numerator(
            ts, residual_row, k, float(res.sum_residual[k]), float(res.sum_squared[k])
        )
        ev[j] = _fraction_explained(ev_num, ts.ev_denominator)
    assert res.median is not None
    out = {
        "mse": mse,
        "rmse": np.sqrt(mse),
        "mae": res.sum_absolute[rows] / ts.weight_sum,
        "median_absolute_error": res.median[rows].copy(),
        "max_error": res.max_absolute[rows].copy(),
        "r2": r2,
        "explained_variance": ev,
        "mape": res.sum_percentage[rows] / ts.weight_sum,
    }
    return {name: out[name] for name in METRICS}


def _ensemble_residual(
    predictions: NDArray[np.float64], y: NDArray[np.float64]
) -> NDArray[np.float64]:
    """The ensemble's residual e = (sum_k (p_k - y)) / K, shape (n,), by the very operations
    of the fused pass (so to the bit what it used), in blocks without a (K, n) temporary.

    Only needed when a fallback looks at e row by row (a missed median bracket, the
    explained variance's two-pass formula); the pass itself keeps no (n,) copy of e.
    """
    n_seeds, n = predictions.shape
    out = np.empty(n)
    step = min(n, max(_MIN_BLOCK_ROWS, _BLOCK_VALUES // n_seeds))
    buf = np.empty((n_seeds, step))
    for start in range(0, n, step):
        stop = min(start + step, n)
        r = np.subtract(predictions[:, start:stop], y[start:stop], out=buf[:, : stop - start])
        e = np.add.reduce(r, axis=0, out=out[start:stop])
        e /= n_seeds
    return out


def _residual_rows(
    predictions: NDArray[np.float64], y: NDArray[np.float64], ensemble: bool
) -> Callable[[int], NDArray[np.float64]]:
    """Row k's residuals as a fresh (n,) array: p_k - y for the seeds, then (with
    ``ensemble``) the ensemble's."""

    def residual_row(k: int) -> NDArray[np.float64]:
        if k < predictions.shape[0]:
            return np.subtract(predictions[k], y)
        assert ensemble
        return _ensemble_residual(predictions, y)

    return residual_row


def _rows_of(
    predictions: NDArray[np.float64], res: _PassResult, y: NDArray[np.float64]
) -> Callable[[int], NDArray[np.float64]]:
    """``residual_row`` for ``_metrics_from_pass``: the seeds, then the ensemble row."""
    return _residual_rows(predictions, y, res.sum_squared.size > predictions.shape[0])


# --------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------


def regression_metrics(
    y_true: ArrayLike, predictions: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> dict[str, NDArray[np.float64]]:
    """Every regression metric for each seed, computed in one fused pass.

    Parameters
    ----------
    y_true : array-like of shape (n,)
        Held-out targets.
    predictions : array-like of shape (K, n) or (n,)
        One row of predictions per seed.
    sample_weight : array-like of shape (n,), optional
        Non-negative row weights.

    Returns
    -------
    dict
        ``METRICS`` keys, each an array of shape (K,) with the value per seed; each matches
        the scikit-learn function of the module table on that seed (best values: 0 for the
        errors, 1 for ``r2`` and ``explained_variance``).
    """
    y = as_targets(y_true)
    p = as_seed_predictions(predictions, y.size, check_finite=False)  # the pass checks
    w = as_weights(sample_weight, y.size)
    with np.errstate(over="ignore", invalid="ignore"):  # overflowing residuals give inf
        ts = _target_stats(y, w)
        res = _fused_pass(ts, p)
        return _metrics_from_pass(ts, res, _rows_of(p, res, y))


def regression_row_losses(y_true: ArrayLike, predictions: ArrayLike) -> NDArray[np.float64]:
    """Squared error of each row averaged over seeds: the expected per-row loss, shape (n,).

    Its mean is the mean over seeds of the MSE; paired comparisons, overfitting flags and
    storage work on these per-row values.
    """
    y = as_targets(y_true)
    p = as_seed_predictions(predictions, y.size, check_finite=False)  # the pass checks
    with np.errstate(over="ignore", invalid="ignore"):
        ts = _target_stats(y, None)
        res = _fused_pass(ts, p, median=False, row_loss=True)
    assert res.row_loss is not None
    return res.row_loss


def ensemble_prediction(predictions: ArrayLike) -> NDArray[np.float64]:
    """The seed-averaged prediction, shape (n,): the mean over seeds of (K, n) predictions.

    Its MSE is the bias term of the squared-loss decomposition (lower than the mean MSE over
    seeds by exactly the variance term).
    """
    p = np.asarray(predictions, dtype=np.float64)
    if p.ndim not in (1, 2):
        raise ScoringInputError("predictions", f"expected shape (n,) or (K, n), got {p.shape}")
    return as_seed_predictions(p, p.shape[-1]).mean(axis=0)


def _spread(values: NDArray[np.float64]) -> Spread:
    sd = float(values.std(ddof=1)) if values.size > 1 else 0.0
    return Spread(
        mean=float(values.mean()), sd=sd, min=float(values.min()), max=float(values.max())
    )


def _headline(per_seed: dict[str, NDArray[np.float64]]) -> dict[str, float]:
    scores = {name: float(values.mean()) for name, values in per_seed.items()}
    scores["rmse"] = math.sqrt(scores["mse"])
    return scores


def regression_report(
    y_true: ArrayLike,
    predictions: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
    train_y_true: ArrayLike | None = None,
    train_predictions: ArrayLike | None = None,
    noise_variance: float | None = None,
    options: ScoringOptions = ScoringOptions(),  # noqa: B008 (frozen, immutable)
) -> Report:
    """Everything the service says about a regression submission on the held-out rows.

    Parameters
    ----------
    y_true : array-like of shape (n,)
        Held-out targets.
    predictions : array-like of shape (K, n) or (n,)
        Predictions of K seeds (retrainings) on the held-out rows.
    sample_weight : array-like of shape (n,), optional
        Row weights of the held-out rows.
    train_y_true, train_predictions : array-like of shapes (m,) and (K', m), optional
        The same model's targets and predictions on its training rows (both or neither):
        adds ``train_scores`` and the generalization-gap evidence in ``flags``.
    noise_variance : float, optional
        Known irreducible noise variance, reported apart from the bias term.
    options : ScoringOptions
        Interval level, bootstrap settings and flag thresholds.

    Returns
    -------
    Report
        ``scores``: the mean over seeds of each metric, except ``rmse`` = sqrt(``mse``);
        ``seed_spread``: each metric's spread over seeds; ``ensemble``: the metrics of the
        seed-averaged prediction; ``bias_variance["squared"]``: the squared-loss
        decomposition (for K = 1 too, with variance 0); ``intervals``: one per headline
        metric (see ``_intervals``); ``details``: ``mape_zero_targets``, per-seed values,
        and notes on any convention that was applied.
    """
    report, _ = _regression_report(
        y_true,
        predictions,
        sample_weight=sample_weight,
        train_y_true=train_y_true,
        train_predictions=train_predictions,
        noise_variance=noise_variance,
        options=options,
        with_intervals=True,
    )
    return report


def regression_report_with_row_losses(
    y_true: ArrayLike,
    predictions: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
    train_y_true: ArrayLike | None = None,
    train_predictions: ArrayLike | None = None,
    noise_variance: float | None = None,
    options: ScoringOptions = ScoringOptions(),  # noqa: B008 (frozen, immutable)
) -> tuple[Report, NDArray[np.float64]]:
    """``regression_report`` and ``regression_row_losses`` from one pass, for the service.

    The service stores the per-row losses and returns the report; the report computes the
    row losses anyway, so this saves a second pass over the predictions. The row losses,
    shape (n,), are exactly (to the bit) what ``regression_row_losses(y_true, predictions)``
    returns. They are kept out of ``Report`` on purpose: a report goes to users, who must
    never see per-row values of the held-out rows.
    """
    return _regression_report(
        y_true,
        predictions,
        sample_weight=sample_weight,
        train_y_true=train_y_true,
        train_predictions=train_predictions,
        noise_variance=noise_variance,
        options=options,
        with_intervals=True,
    )


def _regression_report(
    y_true: ArrayLike,
    predictions: ArrayLike,
    *,
    sample_weight: ArrayLike | None,
    train_y_true: ArrayLike | None,
    train_predictions: ArrayLike | None,
    noise_variance: float | None,
    options: ScoringOptions,
    with_intervals: bool,
) -> tuple[Report, NDArray[np.float64]]:
    """``regression_report_with_row_losses`` with a switch to leave out the intervals (for
    the benchmark).

    Residuals too large for float64 give infinite metrics (as in scikit-learn) without
    floating-point warnings.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        return _report(
            y_true,
            predictions,
            sample_weight=sample_weight,
            train_y_true=train_y_true,
            train_predictions=train_predictions,
            noise_variance=noise_variance,
            options=options,
            with_intervals=with_intervals,
        )


def _decomposition(
    ts: _TargetStats,
    predictions: NDArray[np.float64],
    res: _PassResult,
    sigma2: float | None,
) -> Decomposition:
    """The squared-loss decomposition from the pass's sums when that is provably accurate
    (``decomposition._squared_loss_from_losses``), else by the direct two-pass method."""
    from .decomposition import _squared_loss_checked, _squared_loss_from_losses

    n_seeds = predictions.shape[0]
    wsum = ts.weight_sum
    mean_seed_loss = float(res.sum_squared[:n_seeds].sum()) / (n_seeds * wsum)
    ensemble_loss = float(res.sum_squared[n_seeds]) / wsum
    # the ensemble's residual e = (sum_k r_k) / K (serial sum, one division) errs by at most
    # K u max|r| per row, plus u max|r| from rounding the residuals r = p - y themselves
    largest = float(res.max_absolute[:n_seeds].max()) * (1.0 + 1e-12)
    found = _squared_loss_from_losses(
        mean_seed_loss,
        ensemble_loss,
        sigma2,
        n_seeds=n_seeds,
        loss_relative_error=res.squared_relative_error,
        residual_error=(n_seeds + 1) * _UNIT_ROUNDOFF * largest,
    )
    if found is not None:
        return found
    return _squared_loss_checked(
        ts.y[:, np.newaxis], predictions[:, :, np.newaxis], ts.weights, sigma2
    )


def _report(
    y_true: ArrayLike,
    predictions: ArrayLike,
    *,
    sample_weight: ArrayLike | None,
    train_y_true: ArrayLike | None,
    train_predictions: ArrayLike | None,
    noise_variance: float | None,
    options: ScoringOptions,
    with_intervals: bool,
) -> tuple[Report, NDArray[np.float64]]:
    from .decomposition import _as_noise_variance
    from .flags import overfitting_flags

    y = as_targets(y_true)
    n = y.size
    p = as_seed_predictions(predictions, n, check_finite=False)  # _fused_pass checks
    w = as_weights(sample_weight, n)
    if (train_y_true is None) != (train_predictions is None):
        missing = "train_predictions" if train_predictions is None else "train_y_true"
        raise ScoringInputError(missing, "train_y_true and train_predictions go together")
    sigma2 = _as_noise_variance(noise_variance)
    n_seeds = p.shape[0]
    level = options.level
    ts = _target_stats(y, w, _pass_step(n, n_seeds + 1) if with_intervals else None)

    with np.errstate(over="ignore", invalid="ignore"):
        res = _fused_pass(
            ts,
            p,
            ensemble=True,
            median_interval_level=level if with_intervals else None,
            row_loss=True,
            moments=with_intervals,
        )
        if not np.isfinite(res.sum_squared).all():  # finite input (the pass checked it)
            raise ScoringInputError("predictions", _OVERFLOW_MESSAGE)
        rows = _rows_of(p, res, y)
        per_seed = _metrics_from_pass(ts, res, rows, slice(0, n_seeds))
        ensemble = {
            name: float(v[0])
            for name, v in _metrics_from_pass(ts, res, rows, slice(n_seeds, None)).items()
        }
        assert res.row_loss is not None
        row_losses = res.row_loss

        train_scores = None
        train_row_losses = None
        baseline_train_loss = None
        baseline_centre = ts.mean
        if train_y_true is not None:
            ty = as_targets(train_y_true, name="train_y_true")
            tp = as_seed_predictions(
                train_predictions, ty.size, name="train_predictions", check_finite=False
            )
            tts = _target_stats(ty, None)
            tres = _fused_pass(tts, tp, name="train_predictions", row_loss=True)
            if not np.isfinite(tres.sum_squared).all():
                raise ScoringInputError("train_predictions", _OVERFLOW_MESSAGE)
            train_scores = _headline(_metrics_from_pass(tts, tres, _rows_of(tp, tres, ty)))
            assert tres.row_loss is not None
            train_row_losses = tres.row_loss
            baseline_centre = tts.mean
            baseline_train_loss = tts.ev_denominator  # mean of (ty - mean ty)^2
        if train_y_true is None:
            baseline_test_loss = ts.ev_denominator  # weighted mean of (y - mean y)^2
        else:
            dev = y - baseline_centre
            baseline_test_loss = float(np.average(dev * dev, weights=w))

    scores = _headline(per_seed)
    decomposition = _decomposition(ts, p, res, sigma2)
    flags = overfitting_flags(
        loss="mse",
        test_row_losses=row_losses,
        train_row_losses=train_row_losses,
        baseline_test_loss=baseline_test_loss,
        baseline_train_loss=baseline_train_loss,
        decomposition=decomposition,
        seed_losses=per_seed["mse"],
        sample_weight=w,
        train_sample_weight=None,
        thresholds=options.thresholds,
    )

    intervals: dict[str, Interval] = {}
    if with_intervals:
        with np.errstate(over="ignore", invalid="ignore"):
            intervals = _intervals(ts, p, res, level)

    notes = []
    if n < 2:
        notes.append("r2 is undefined with a single row (NaN), as in scikit-learn")
    if ts.r2_denominator == 0.0:
        notes.append(
            "constant targets: r2 and explained_variance are 1 for perfect predictions "
            "and 0 otherwise (scikit-learn's force_finite convention)"
        )
    if ts.zero_targets:
        notes.append(
            f"{ts.zero_targets} zero target(s): mape divides their error by machine "
            "epsilon (as scikit-learn), so it is huge unless those predictions are exact"
        )
    if w is not None:
        notes.append("max_error is taken over rows of positive weight")
    details = {
        "mape_zero_targets": ts.zero_targets,
        "per_seed": {name: values.tolist() for name, values in per_seed.items()},
        "notes": notes,
    }
    report = Report(
        task="regression",
        n_rows=n,
        n_seeds=n_seeds,
        scores=scores,
        intervals=intervals,
        seed_spread={name: _spread(values) for name, values in per_seed.items()},
        ensemble=ensemble,
        bias_variance={"squared": decomposition},
        flags=flags,
        train_scores=train_scores,
        details=details,
    )
    return report, row_losses


# --------------------------------------------------------------------------------------
# Intervals
# --------------------------------------------------------------------------------------

def _intervals(
    ts: _TargetStats,
    predictions: NDArray[np.float64],
    res: _PassResult,
    level: float,
) -> dict[str, Interval]:
    """One interval per headline metric (each the mean over seeds of a per-seed metric).

    - ``mse``, ``mae``, ``mape``: normal interval of the per-row losses averaged over seeds,
      whose mean is exactly the mean over seeds of the metric (so the interval is for it);
    - ``rmse``: the square root of the ``mse`` interval's endpoints (a monotone map);
    - ``r2``: delta method for 1 - mean(a) / mean(b), a = per-row squared error averaged
      over seeds, b = (y - mean y)^2; the mean over seeds of R^2 is exactly that, because
      every seed shares the denominator;
    - ``explained_variance``: the same with a_i = mean over seeds of (r_ki - mean_i r_ki)^2;
    - ``median_absolute_error``: per seed, the distribution-free order-statistic interval
      (binomial ranks; Woodruff's with weights), combined by ``seed_mean_interval``;
    - ``max_error``: none (an extreme order statistic has no useful large-sample interval).

    The means come from the fused pass's sums and every sum of squared deviations from the
    co-moments it accumulated (``_RowMoments``); the formulas are those of
    ``normal_interval`` and ``delta_ratio_interval``. With R = mean(a) / mean(b), the delta
    method's sum of squares sum w (a - R b - c)^2 is C_aa - 2 R C_ab + R^2 C_bb, with the
    co-moments C; for the explained variance's one-pass form a' = u - 2 rho e + const it
    expands over u, e and b likewise.
    """
    w = ts.weights
    n_seeds, n = predictions.shape
    wsum = ts.weight_sum
    weighted = w is not None
    n_eff = float(n) if w is None else wsum * wsum / float(np.einsum("i,i->", w, w))
    seed_total = n_seeds * wsum
    centres = {
        "mse": float(res.sum_squared[:n_seeds].sum()) / seed_total,
        "mae": float(res.sum_absolute[:n_seeds].sum()) / seed_total,
        "mape": float(res.sum_percentage[:n_seeds].sum()) / seed_total,
    }
    b_mean = ts.ev_denominator  # weighted mean of (y - mean y)^2
    ratios = n >= 2 and ts.r2_denominator != 0.0 and b_mean > 0.0
    assert res.moments is not None
    c = res.moments
    ev: _ExplainedVarianceShortcut | None = None
    r2_ssd = ev_ssd = math.nan
    if ratios:
        r = centres["mse"] / b_mean
        r2_ssd = max(0.0, c["uu"] - 2.0 * r * c["ub"] + r * r * c["bb"])
        ev = _explained_variance_shortcut(ts, res, n_seeds, centres["mse"])
        r, t = ev.mean / b_mean, -2.0 * ev.rho  # a' - R b = u + t e - R b + const
        ev_ssd = max(
            0.0,
            c["uu"] + t * t * c["ee"] + r * r * c["bb"]
            + 2.0 * t * c["ue"] - 2.0 * r * c["ub"] - 2.0 * t * r * c["eb"],
        )

    def normal(mean: float, ssd: float) -> Interval:
        sd = sd_from_sum_of_squares(ssd, wsum, n_eff, weighted)
        return normal_interval_from_moments(mean, sd, n_eff, level, weighted=weighted)

    out: dict[str, Interval] = {}
    out["mse"] = normal(centres["mse"], c["uu"])
    out["rmse"] = monotone_interval(
        out["mse"],
        lambda v: math.sqrt(max(v, 0.0)),
        note="square root of the mse interval's endpoints",
    )
    out["mae"] = normal(centres["mae"], c["vv"])
    if n < 2:
        out["r2"] = no_interval(level, "r2 is undefined with a single row")
    elif ts.r2_denominator == 0.0:
        out["r2"] = no_interval(level, "constant targets: r2 is set by convention")
    else:
        ratio = delta_ratio_from_sums(
            centres["mse"], b_mean, r2_ssd, wsum, n_eff, weighted, level
        )
        out["r2"] = monotone_interval(ratio, lambda v: 1.0 - v, decreasing=True)
    out["explained_variance"] = _explained_variance_interval(
        ts, predictions, res, level, ev, ev_ssd, n_eff
    )
    assert res.median_low is not None and res.median_high is not None
    lows, highs = res.median_low[:n_seeds], res.median_high[:n_seeds]  # not the ensemble row
    if np.isfinite(lows).all() and np.isfinite(highs).all():
        per_seed = [
            Interval(float(lo), float(hi), level, "order_statistic")
            for lo, hi in zip(lows, highs, strict=True)
        ]
        out["median_absolute_error"] = seed_mean_interval(per_seed, level)
    else:
        out["median_absolute_error"] = no_interval(
            level, f"too few rows for a {level:g} order-statistic interval"
        )
    out["max_error"] = no_interval(
        level, "the maximum is an extreme order statistic: no useful large-sample interval"
    )
    out["mape"] = normal(centres["mape"], c["qq"])
    return {name: out[name] for name in METRICS}


@dataclass
class _ExplainedVarianceShortcut:
    """The one-pass form a'_i = u_i - 2 rho e_i + constant of ``_explained_variance_interval``."""

    rho: float  # mean over seeds of each seed's mean residual
    constant: float  # 2 rho^2 - mean over seeds of (mean residual)^2
    mean: float  # weighted mean of a'
    bound: float  # Cauchy-Schwarz bound on the root mean square of the dropped term
    mean_residuals: NDArray[np.float64]  # (K,) each seed's mean residual rbar_k
    mean_sq_residuals: float  # mean over seeds of rbar_k^2


def _explained_variance_shortcut(
    ts: _TargetStats, res: _PassResult, n_seeds: int, mean_row_loss: float
) -> _ExplainedVarianceShortcut:
    wsum = ts.weight_sum
    rbar = res.sum_residual[:n_seeds] / wsum  # the seeds, not the ensemble row
    rho = float(rbar.mean())
    mean_sq_rbar = float(np.mean(rbar * rbar))
    spread = float(np.sqrt(np.sum((rbar - rho) ** 2)))
    variance_term = max(
        0.0, float(res.sum_squared[:n_seeds].mean()) / wsum - float(res.sum_squared[n_seeds]) / wsum
    )
    constant = 2.0 * rho * rho - mean_sq_rbar
    ensemble_mean_residual = float(res.sum_residual[n_seeds]) / wsum
    return _ExplainedVarianceShortcut(
        rho=rho,
        constant=constant,
        mean=mean_row_loss - 2.0 * rho * ensemble_mean_residual + constant,
        bound=2.0 / math.sqrt(n_seeds) * spread * math.sqrt(variance_term),
        mean_residuals=rbar,
        mean_sq_residuals=mean_sq_rbar,
    )


def _explained_variance_interval(
    ts: _TargetStats,
    predictions: NDArray[np.float64],
    res: _PassResult,
    level: float,
    shortcut: _ExplainedVarianceShortcut | None,
    shortcut_ssd: float,
    n_eff: float,
) -> Interval:
    """Delta method for 1 - mean(a) / mean(b) with a_i = mean_k (r_ki - rbar_k)^2.

    Exactly, a_i = u_i - (2 / K) c_i + mean_k rbar_k^2 with u_i the row loss averaged over
    seeds and c_i = sum_k rbar_k r_ki, a weighted sum over the K seeds (a pass over the
    (K, n) predictions). Writing rbar_k = rho + delta_k (rho their mean), c_i = K rho e_i +
    t_i, with e_i the seed-averaged prediction's residual and t_i = sum_k delta_k (p_ki -
    pbar_i). Dropping t_i leaves a'_i = u_i - 2 rho e_i + const (const chosen so that
    mean(a') = mean(a)), needing only co-moments of u, e and b (``_RowMoments``). By Cauchy-Schwarz
    the root mean square of (2 / K) t_i is at most (2 / sqrt(K)) |delta| sqrt(V), V the
    variance term (mean MSE over seeds minus the ensemble's MSE), and the interval's
    standard error moves by at most that much over mean(b) sqrt(n_eff). When that bound is
    below ``_EV_SHORTCUT_TOLERANCE`` of the half-width (seeds with nearly equal mean
    residuals, typical at large n), a' is used; otherwise the exact a.
    """
    n_seeds, n = predictions.shape
    if ts.ev_denominator == 0.0:
        return no_interval(level, "constant targets: explained_variance is set by convention")
    if n < 2:
        return no_interval(level, "needs at least two rows")
    assert shortcut is not None and res.row_loss is not None
    weighted = ts.weights is not None
    wsum = ts.weight_sum
    ratio = delta_ratio_from_sums(
        shortcut.mean, ts.ev_denominator, shortcut_ssd, wsum, n_eff, weighted, level
    )
    if shortcut.bound > 0.0 and ratio.method != "none":
        half = (ratio.high - ratio.low) / 2.0
        shift = z_value(level) * shortcut.bound / (ts.ev_denominator * math.sqrt(n_eff - 1.0))
        if not shift <= _EV_SHORTCUT_TOLERANCE * half:
            rbar = shortcut.mean_residuals
            total = float(rbar.sum())
            a = np.empty(n)
            step = min(n, max(_MIN_BLOCK_ROWS, _BLOCK_VALUES // n_seeds))
            tmp = np.empty(step)
            for start in range(0, n, step):  # exact: a_i = u_i - (2/K) c_i + mean(rbar^2)
                stop = min(start + step, n)
                sl = slice(start, stop)
                c = np.einsum("k,kc->c", rbar, predictions[:, sl], out=a[sl])
                c -= np.multiply(ts.y[sl], total, out=tmp[: stop - start])
                c *= -2.0 / n_seeds
                c += res.row_loss[sl]  # the per-row losses averaged over seeds
                c += shortcut.mean_sq_residuals
            centred_sq = ts.centred_sq(slice(None), np.empty(n))
            ratio = delta_ratio_interval(a, centred_sq, ts.weights, level)
    return monotone_interval(ratio, lambda v: 1.0 - v, decreasing=True)


__all__ = [
    "MAPE_EPSILON",
    "METRICS",
    "ensemble_prediction",
    "regression_metrics",
    "regression_report",
    "regression_row_losses",
]
