"""Bias-variance decompositions and the Brier partition against their published identities.

Every expected value is computed here, independently of the code under test, by a
reference library (scikit-learn, scipy, numpy), by exact rational arithmetic, or from the
paper's definition written out directly; each check names its source.
"""

from __future__ import annotations

import decimal
import functools
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special, stats
from sklearn.metrics import brier_score_loss, log_loss, mean_squared_error, zero_one_loss

from service.scoring import ScoringInputError
from service.scoring.decomposition import (
    brier_partition,
    log_loss_decomposition,
    squared_loss_decomposition,
    zero_one_decomposition,
)
from service.scoring.results import Decomposition

EPS = np.finfo(np.float64).eps
TIGHT = 1e-12  # relative tolerance of the identity checks (the brief asks for 1e-9 or better)
# pytest.approx without its default absolute tolerance of 1e-12, which would hide errors in
# small terms (variances near 0.01, a log loss of 1e-16); checks near 0 pass abs explicitly
approx = functools.partial(pytest.approx, abs=0.0)
PROPERTY = settings(max_examples=25, derandomize=True, deadline=None)


# ------------------------------------------------------------------------------ helpers


def _regression(seed: int, n: int, k: int, offset: float = 0.0):
    rng = np.random.default_rng(seed)
    y = offset + rng.normal(size=n)
    p = y + 0.3 + rng.normal(scale=0.7, size=(k, n))
    return y, p


def _labels(seed: int, n: int, k: int, n_classes: int):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, n_classes, size=n)
    # seeds agree with the truth more often than chance, so biased and unbiased rows both occur
    lab = np.where(rng.random((k, n)) < 0.55, y, rng.integers(0, n_classes, size=(k, n)))
    return y, lab


def _probabilities(seed: int, n: int, k: int, n_classes: int):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, n_classes, size=n)
    p = rng.dirichlet(np.ones(n_classes), size=(k, n))
    return y, p


def _assert_same(a: Decomposition, b: Decomposition, rel: float = TIGHT, abs_: float = 1e-15):
    assert a.loss == b.loss
    for name in ("expected_loss", "bias", "variance", "variance_share", "ensemble_loss"):
        assert getattr(a, name) == approx(getattr(b, name), rel=rel, abs=abs_), name
    assert (a.noise is None) == (b.noise is None)
    assert a.extra.keys() == b.extra.keys()
    for name in a.extra:
        assert a.extra[name] == approx(b.extra[name], rel=rel, abs=abs_), name


# ----------------------------------------------------------------------- squared loss


@pytest.mark.parametrize("weighted", [False, True])
def test_squared_terms_and_identity(weighted: bool) -> None:
    y, p = _regression(0, n=200, k=7)
    w = np.random.default_rng(1).uniform(0.1, 3.0, size=y.size) if weighted else None
    d = squared_loss_decomposition(y, p, sample_weight=w)
    # reference: sklearn.metrics.mean_squared_error, per seed then averaged over seeds
    expected = np.mean([mean_squared_error(y, pk, sample_weight=w) for pk in p])
    # reference: sklearn.metrics.mean_squared_error of the seed mean (ESL 7.3: the bias term)
    bias = mean_squared_error(y, p.mean(axis=0), sample_weight=w)
    # reference: numpy.var (ddof=0) over seeds, averaged over rows (Geman et al. 1992)
    variance = np.average(np.var(p, axis=0), weights=w)
    assert d.loss == "squared"
    assert d.expected_loss == approx(expected, rel=TIGHT)
    assert d.bias == approx(bias, rel=TIGHT)
    assert d.ensemble_loss == approx(bias, rel=TIGHT)
    assert d.variance == approx(variance, rel=TIGHT)
    # identity (Geman, Bienenstock & Doursat 1992): expected = bias + variance, exactly
    assert expected == approx(bias + variance, rel=TIGHT)
    assert d.expected_loss == approx(d.bias + d.variance, rel=TIGHT)
    assert d.variance_share == approx(variance / expected, rel=TIGHT)
    assert d.noise is None


def test_squared_with_known_noise_variance() -> None:
    y, p = _regression(2, n=150, k=5)
    sigma2 = 0.25
    d = squared_loss_decomposition(y, p, noise_variance=sigma2)
    # reference: sklearn.metrics.mean_squared_error; ESL 7.3: error = noise + bias^2 + variance
    expected = np.mean([mean_squared_error(y, pk) for pk in p])
    ensemble = mean_squared_error(y, p.mean(axis=0))
    assert d.noise == sigma2
    assert d.bias == approx(ensemble - sigma2, rel=TIGHT)
    assert d.ensemble_loss == approx(ensemble, rel=TIGHT)
    assert d.expected_loss == approx(d.bias + d.noise + d.variance, rel=TIGHT)
    assert d.expected_loss == approx(expected, rel=TIGHT)


def test_squared_bias_can_be_negative_with_large_noise() -> None:
    y, p = _regression(3, n=50, k=4)
    ensemble = mean_squared_error(y, p.mean(axis=0))  # reference: sklearn
    d = squared_loss_decomposition(y, p, noise_variance=ensemble + 1.0)
    assert d.bias == approx(-1.0, rel=TIGHT)
    assert d.expected_loss == approx(d.bias + d.noise + d.variance, rel=TIGHT)


@pytest.mark.parametrize("weighted", [False, True])
def test_squared_on_class_probabilities_is_multiclass_brier(weighted: bool) -> None:
    y, probs = _probabilities(4, n=120, k=6, n_classes=4)
    onehot = np.eye(4)[y]
    w = np.random.default_rng(5).uniform(0.5, 2.0, size=y.size) if weighted else None
    d = squared_loss_decomposition(onehot, probs, sample_weight=w)
    labels = np.arange(4)
    # reference: sklearn.metrics.brier_score_loss, original multiclass form (sum over classes)
    expected = np.mean(
        [
            brier_score_loss(y, pk, labels=labels, scale_by_half=False, sample_weight=w)
            for pk in probs
        ]
    )
    ensemble = brier_score_loss(
        y, probs.mean(axis=0), labels=labels, scale_by_half=False, sample_weight=w
    )
    # reference: numpy.var over seeds, summed over classes, averaged over rows
    variance = np.average(np.var(probs, axis=0).sum(axis=1), weights=w)
    assert d.expected_loss == approx(expected, rel=TIGHT)
    assert d.ensemble_loss == approx(ensemble, rel=TIGHT)
    assert d.bias == approx(ensemble, rel=TIGHT)
    assert d.variance == approx(variance, rel=TIGHT)
    assert expected == approx(ensemble + variance, rel=TIGHT)


def test_squared_single_seed_matrix_inputs() -> None:
    # (n,) predictions and (n, C) probabilities are one seed
    y, p = _regression(6, n=30, k=1)
    d = squared_loss_decomposition(y, p[0])
    assert d.variance == 0.0
    assert d.expected_loss == approx(mean_squared_error(y, p[0]), rel=TIGHT)  # sklearn
    yc, probs = _probabilities(7, n=30, k=1, n_classes=3)
    d = squared_loss_decomposition(np.eye(3)[yc], probs[0])
    # reference: sklearn.metrics.brier_score_loss (sum over classes)
    ref = brier_score_loss(yc, probs[0], labels=np.arange(3), scale_by_half=False)
    assert d.expected_loss == approx(ref, rel=TIGHT)
    assert d.variance == 0.0


# -------------------------------------------------------------- NIST StRD NumAcc seed sets


def _numacc(name: str) -> tuple[list[str], Fraction, Fraction]:
    """NIST StRD univariate NumAcc data and certified (mean, sample SD): from memory."""
    if name == "NumAcc1":
        return ["10000001", "10000003", "10000002"], Fraction(10000002), Fraction(1)
    offset = {"NumAcc3": "1000000", "NumAcc4": "10000000"}[name]
    values = [offset + ".2"] + [offset + ".1", offset + ".3"] * 500
    return values, Fraction(offset + ".2"), Fraction(1, 10)


@pytest.mark.parametrize("name", ["NumAcc1", "NumAcc3", "NumAcc4"])
def test_numacc_seed_sets(name: str) -> None:
    values, cert_mean, cert_sd = _numacc(name)
    exact = [Fraction(v) for v in values]
    k = len(exact)
    # The certified values are from memory (REFERENCES.md); they follow from the data by
    # construction, which exact rational arithmetic confirms here (reference: fractions).
    mean = sum(exact) / k
    assert mean == cert_mean
    assert sum((x - mean) ** 2 for x in exact) / (k - 1) == cert_sd**2
    certified_population_variance = cert_sd**2 * (k - 1) / k  # ddof = 0

    seeds = np.array([float(v) for v in values])
    n_rows = 4
    predictions = np.tile(seeds[:, np.newaxis], (1, n_rows))  # K seeds, each row the same
    d = squared_loss_decomposition(np.full(n_rows, float(cert_mean)), predictions)

    # 1. Against the exact population variance of the float64 values we pass (fractions):
    #    tests our arithmetic alone, to 1e-12 relative.
    floats = [Fraction(x) for x in seeds.tolist()]
    float_mean = sum(floats) / k
    float_variance = sum((x - float_mean) ** 2 for x in floats) / k
    assert d.variance == approx(float(float_variance), rel=1e-12)

    # 2. Against the certified SD^2 (K-1)/K (NIST StRD, from memory). The decimal data are not
    #    exactly representable in float64: each value (and so each deviation from the mean)
    #    is off by up to half a unit in the last place of the offset, which bounds the relative
    #    error of the variance by 2 * spacing(offset) / SD (0 for the integers of NumAcc1,
    #    2.3e-9 at 1e6, 3.7e-8 at 1e7). Tolerance: that bound (1e-12 when it is 0).
    representation = 2.0 * float(np.spacing(float(cert_mean))) / float(cert_sd)
    tolerance = 1e-12 if all(float(v) == Fraction(v) for v in values) else representation
    assert d.variance == approx(float(certified_population_variance), rel=tolerance)
    assert d.expected_loss == approx(d.bias + d.variance, rel=TIGHT)

    # The sets bite: the one-pass textbook formula E[x^2] - E[x]^2 misses the certified value
    # by far more than our tolerance (common practice: why NIST publishes these sets).
    naive = float(np.mean(seeds**2) - np.mean(seeds) ** 2)
    assert abs(naive - float(certified_population_variance)) > 1e3 * tolerance * float(
        certified_population_variance
    )


# ----------------------------------------------------------------------------- zero-one


def _domingos_rows(y: np.ndarray, lab: np.ndarray) -> dict[str, np.ndarray]:
    """Per-row terms of Domingos (2000), written out from the paper's definitions."""
    # reference: scipy.stats.mode (most frequent value, the smallest one on ties, as mlxtend)
    main = stats.mode(lab, axis=0).mode
    loss = (lab != y).mean(axis=0)
    bias = (main != y).astype(float)
    variance = (lab != main).mean(axis=0)
    off_main = (lab != main).sum(axis=0)
    hits = (lab == y).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        p_true_given_off = np.where(off_main > 0, hits / off_main, 0.0)
    c = np.where(bias == 1, -p_true_given_off, 1.0)
    return {"main": main, "loss": loss, "bias": bias, "variance": variance, "c": c}


@pytest.mark.parametrize("n_classes", [2, 3, 5, 40])  # 40 > K: the sort-based mode
@pytest.mark.parametrize("weighted", [False, True])
def test_zero_one_terms_and_domingos_identity(n_classes: int, weighted: bool) -> None:
    y, lab = _labels(10 + n_classes, n=300, k=9, n_classes=n_classes)
    w = np.random.default_rng(11).uniform(0.1, 2.0, size=y.size) if weighted else None
    d = zero_one_decomposition(y, lab, n_classes=n_classes, sample_weight=w)
    rows = _domingos_rows(y, lab)
    # Domingos (2000): per row, loss = bias + c * variance (noise-free), exactly
    np.testing.assert_allclose(
        rows["loss"], rows["bias"] + rows["c"] * rows["variance"], rtol=TIGHT, atol=1e-15
    )
    if n_classes == 2:  # Domingos (2000): c = -1 on biased rows for two classes
        biased = (rows["bias"] == 1) & (rows["variance"] > 0)
        assert biased.any()
        assert np.all(rows["c"][biased] == -1.0)
    avg = lambda v: np.average(v, weights=w)  # noqa: E731
    unbiased_var = avg(np.where(rows["bias"] == 0, rows["variance"], 0.0))
    biased_var = avg(np.where(rows["bias"] == 1, -rows["c"] * rows["variance"], 0.0))
    # reference: sklearn.metrics.zero_one_loss per seed, averaged over seeds
    expected = np.mean([zero_one_loss(y, lk, sample_weight=w) for lk in lab])
    # reference: sklearn.metrics.zero_one_loss of the main prediction (scipy.stats.mode)
    bias = zero_one_loss(y, rows["main"], sample_weight=w)
    assert d.loss == "zero_one"
    assert d.expected_loss == approx(expected, rel=TIGHT)
    assert d.bias == approx(bias, rel=TIGHT)
    assert d.ensemble_loss == approx(bias, rel=TIGHT)
    assert d.variance == approx(avg(rows["variance"]), rel=TIGHT)
    assert d.extra["unbiased_variance"] == approx(unbiased_var, rel=TIGHT)
    assert d.extra["biased_variance"] == approx(biased_var, rel=TIGHT)
    assert d.extra["net_variance"] == approx(unbiased_var - biased_var, rel=TIGHT, abs=1e-15)
    assert d.expected_loss == approx(d.bias + d.extra["net_variance"], rel=TIGHT)
    assert expected == approx(bias + unbiased_var - biased_var, rel=TIGHT)


@pytest.mark.parametrize(
    "lab",
    [
        np.array([[2, 1, 0, 1], [1, 2, 2, 0]]),  # K = 2 < C = 3: sort-based mode
        np.array([[2, 1, 0, 1], [1, 2, 2, 0], [2, 1, 0, 1], [1, 2, 2, 0]]),  # K >= C: counts
    ],
)
def test_zero_one_ties_go_to_the_smallest_label(lab: np.ndarray) -> None:
    # the seeds split evenly between two labels on every row
    y = np.array([2, 2, 0, 1])
    d = zero_one_decomposition(y, lab, n_classes=3)
    main = stats.mode(lab, axis=0).mode  # reference: scipy.stats.mode (smallest on ties)
    assert np.array_equal(main, np.minimum(lab[0], lab[1]))
    assert d.bias == approx(zero_one_loss(y, main), rel=TIGHT)  # reference: sklearn


@PROPERTY
@given(
    st.tuples(
        st.integers(min_value=0, max_value=2**32 - 1),  # data seed
        st.integers(min_value=1, max_value=40),  # rows
        st.integers(min_value=1, max_value=8),  # seeds
        st.integers(min_value=2, max_value=8),  # classes
    )
)
def test_property_unused_classes_change_nothing(shape) -> None:
    # a larger n_classes (unused classes) moves the mode from class counts (C <= K) to the
    # sort-based path (C > K); Domingos' terms depend only on the labels that occur
    seed, n, k, c = shape
    y, lab = _labels(seed, n, k, c)
    _assert_same(
        zero_one_decomposition(y, lab, n_classes=c),
        zero_one_decomposition(y, lab, n_classes=c + k + 3),
        rel=0.0,
        abs_=0.0,
    )


# ----------------------------------------------------------------------------- log loss


def _heskes_reference(y, probs, w=None):
    """Heskes (1998) terms from scipy and scikit-learn, without the code under test."""
    labels = np.arange(probs.shape[-1])
    clipped = np.clip(probs, EPS, 1 - EPS)  # as sklearn.metrics.log_loss (1.9) clips
    geometric = stats.gmean(clipped, axis=0)  # reference: scipy.stats.gmean over seeds
    z = geometric.sum(axis=1)
    q = geometric / z[:, np.newaxis]
    # reference: sklearn.metrics.log_loss per seed, averaged over seeds
    expected = np.mean([log_loss(y, pk, labels=labels, sample_weight=w) for pk in probs])
    bias = log_loss(y, q, labels=labels, sample_weight=w)  # reference: sklearn, loss of q
    # reference: scipy.special.rel_entr, KL(q || p_k) summed over classes, mean over seeds
    kl = np.mean([special.rel_entr(q, pk).sum(axis=1) for pk in clipped], axis=0)
    ensemble = log_loss(y, probs.mean(axis=0), labels=labels, sample_weight=w)
    return {
        "expected": expected,
        "bias": bias,
        "kl": np.average(kl, weights=w),
        "minus_log_z": np.average(-np.log(z), weights=w),
        "ensemble": ensemble,
    }


@pytest.mark.parametrize("n_classes", [2, 4])
@pytest.mark.parametrize("weighted", [False, True])
def test_log_loss_terms_and_heskes_identity(n_classes: int, weighted: bool) -> None:
    y, probs = _probabilities(20 + n_classes, n=250, k=8, n_classes=n_classes)
    w = np.random.default_rng(21).uniform(0.1, 2.0, size=y.size) if weighted else None
    d = log_loss_decomposition(y, probs, sample_weight=w)
    ref = _heskes_reference(y, probs, w)
    assert d.loss == "log"
    assert d.expected_loss == approx(ref["expected"], rel=TIGHT)
    assert d.bias == approx(ref["bias"], rel=TIGHT)
    assert d.variance == approx(ref["kl"], rel=1e-10)
    assert d.variance == approx(ref["minus_log_z"], rel=1e-10)
    assert d.ensemble_loss == approx(ref["ensemble"], rel=TIGHT)
    # Heskes (1998): mean seed log loss = log loss of q + mean KL(q || p_k), exactly
    assert ref["expected"] == approx(ref["bias"] + ref["kl"], rel=TIGHT)
    assert d.expected_loss == approx(d.bias + d.variance, rel=TIGHT)
    assert d.variance > 0
    # arithmetic-mean ensemble is at least as good as one seed on average (Jensen; common
    # practice), and its loss is not the geometric-mean loss reported as bias
    assert d.ensemble_loss <= d.expected_loss


def test_log_loss_exact_zeros_are_clipped_like_sklearn() -> None:
    y = np.array([0, 1, 2, 1])
    probs = np.array(
        [
            [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.5, 0.5, 0.0], [0.2, 0.0, 0.8]],
            [[0.0, 1.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [0.0, 0.3, 0.7]],
        ]
    )
    d = log_loss_decomposition(y, probs)  # filterwarnings=error: no warning may escape
    for value in (d.expected_loss, d.bias, d.variance, d.ensemble_loss, d.variance_share):
        assert math.isfinite(value)
    ref = _heskes_reference(y, probs)
    assert d.expected_loss == approx(ref["expected"], rel=TIGHT)  # reference: sklearn
    assert d.bias == approx(ref["bias"], rel=TIGHT)
    assert d.variance == approx(ref["kl"], rel=1e-10)
    assert d.ensemble_loss == approx(ref["ensemble"], rel=TIGHT)
    # reference: sklearn.metrics.log_loss of a single seed with zeros, clipped at eps
    single = log_loss_decomposition(y, probs[0])
    assert single.expected_loss == approx(log_loss(y, probs[0], labels=np.arange(3)), rel=TIGHT)
    assert single.ensemble_loss == approx(single.expected_loss, rel=TIGHT)


def test_log_loss_terms_to_full_precision_against_decimal_arithmetic() -> None:
    # Row 0: the seeds put their doubt on different wrong classes, so the geometric mean is
    # nearly certain of the truth (bias ~3e-7) while the variance is ~0.69: bias taken as
    # expected - variance would keep only ~6 digits. Row 1: the truth gets q ~ 1e-7.
    delta = 1e-14
    y = np.array([0, 1])
    probs = np.array(
        [
            [[0.5, 0.5 - delta, delta], [0.9, 1e-7, 0.1 - 1e-7]],
            [[0.5, delta, 0.5 - delta], [0.2, 1e-7, 0.8 - 1e-7]],
        ]
    )
    # reference: Python's decimal module at 50 digits (correctly rounded ln and exp), on
    # the exact binary values of the inputs; Heskes (1998) definitions written out
    with decimal.localcontext() as ctx:
        ctx.prec = 50
        terms = {"expected": [], "bias": [], "variance": []}
        for i, t in enumerate(y):
            logs = [[decimal.Decimal(float(v)).ln() for v in probs[k, i]] for k in range(2)]
            g = [(logs[0][c] + logs[1][c]) / 2 for c in range(3)]
            z = sum(gc.exp() for gc in g)
            terms["expected"].append(-g[t])
            terms["variance"].append(-z.ln())
            terms["bias"].append(-(g[t].exp() / z).ln())
        ref = {name: float(sum(v) / 2) for name, v in terms.items()}
    d = log_loss_decomposition(y, probs)
    assert d.expected_loss == approx(ref["expected"], rel=1e-14)
    assert d.variance == approx(ref["variance"], rel=1e-14)
    assert d.bias == approx(ref["bias"], rel=1e-14)
    single = log_loss_decomposition(y[:1], probs[:, :1])
    assert single.bias == approx(float(terms["bias"][0]), rel=1e-12)


def test_log_loss_certain_probabilities_are_clipped_below_one_like_sklearn() -> None:
    # sklearn.metrics.log_loss (1.9) clips into [eps, 1 - eps]: a certain, correct forecast
    # costs -log(1 - eps), about 1.1e-16, not 0
    y = np.array([0, 1, 2, 1])
    onehot = np.eye(3)[y]
    d = log_loss_decomposition(y, np.stack([onehot, onehot]))
    ref = log_loss(y, onehot, labels=np.arange(3))  # reference: sklearn.metrics.log_loss
    assert ref > 0
    assert d.expected_loss == approx(ref, rel=TIGHT)
    assert d.ensemble_loss == approx(ref, rel=TIGHT)


# ----------------------------------------------------------------------- Brier partition


def _murphy_reference(y, forecasts, w=None):
    """Murphy (1973) by a plain loop over distinct forecast vectors (no numpy grouping)."""
    f = np.atleast_2d(np.asarray(forecasts, dtype=float).T).T  # (n, D)
    if f.shape[1] == 1:
        o = (np.asarray(y) == 1).astype(float)[:, np.newaxis]
    else:
        o = np.eye(f.shape[1])[y]
    w = np.ones(len(y)) if w is None else np.asarray(w, dtype=float)
    total = w.sum()
    climate = (w[:, None] * o).sum(axis=0) / total
    groups: dict[tuple[float, ...], list[int]] = {}
    for i, row in enumerate(f):
        groups.setdefault(tuple(row.tolist()), []).append(i)
    rel = res = 0.0
    for key, members in groups.items():
        wg = w[members].sum()
        if wg == 0:
            continue
        og = (w[members, None] * o[members]).sum(axis=0) / wg
        rel += wg * float(np.sum((np.array(key) - og) ** 2))
        res += wg * float(np.sum((og - climate) ** 2))
    return {
        "reliability": rel / total,
        "resolution": res / total,
        "uncertainty": float(np.sum(climate * (1 - climate))),
    }


@pytest.mark.parametrize("weighted", [False, True])
def test_brier_partition_binary(weighted: bool) -> None:
    rng = np.random.default_rng(30)
    n = 400
    p = np.round(rng.random(n), 1)  # eleven distinct forecasts: groups with many rows
    y = (rng.random(n) < 0.2 + 0.6 * p).astype(int)
    w = rng.uniform(0.1, 2.0, size=n) if weighted else None
    part = brier_partition(y, p, sample_weight=w)
    # reference: sklearn.metrics.brier_score_loss (binary form, range [0, 1])
    assert part["brier"] == approx(brier_score_loss(y, p, sample_weight=w), rel=TIGHT)
    ref = _murphy_reference(y, p, w)
    for name in ("reliability", "resolution", "uncertainty"):
        assert part[name] == approx(ref[name], rel=TIGHT), name
    # Murphy (1973): brier = reliability - resolution + uncertainty, exactly; on the
    # independently computed terms against sklearn's score, and on ours
    independent = ref["reliability"] - ref["resolution"] + ref["uncertainty"]
    assert brier_score_loss(y, p, sample_weight=w) == approx(independent, rel=TIGHT)
    brier = part["reliability"] - part["resolution"] + part["uncertainty"]
    assert part["brier"] == approx(brier, rel=TIGHT)
    # uncertainty is base rate * (1 - base rate) (Murphy 1973)
    base = np.average(y, weights=w)
    assert part["uncertainty"] == approx(base * (1 - base), rel=TIGHT)


@pytest.mark.parametrize("weighted", [False, True])
def test_brier_partition_multiclass(weighted: bool) -> None:
    rng = np.random.default_rng(31)
    n, c = 500, 3
    palette = rng.dirichlet(np.ones(c), size=12)
    # palette rows 0 and 1 share their first column, so grouping by the first column alone
    # would merge two different forecasts
    palette[1, 0] = palette[0, 0]
    palette[1, 1:] = (1 - palette[0, 0]) * np.array([0.3, 0.7])
    palette[0, 1:] = (1 - palette[0, 0]) * np.array([0.7, 0.3])
    choice = rng.integers(0, 12, size=n)
    probs = palette[choice]
    y = np.array([rng.choice(c, p=row / row.sum()) for row in probs])
    w = rng.uniform(0.1, 2.0, size=n) if weighted else None
    part = brier_partition(y, probs, sample_weight=w)
    # reference: sklearn.metrics.brier_score_loss, multiclass sum over classes (range [0, 2])
    ref_brier = brier_score_loss(
        y, probs, labels=np.arange(c), scale_by_half=False, sample_weight=w
    )
    assert part["brier"] == approx(ref_brier, rel=TIGHT)
    ref = _murphy_reference(y, probs, w)
    for name in ("reliability", "resolution", "uncertainty"):
        assert part[name] == approx(ref[name], rel=TIGHT), name
    # Murphy (1973), exact: on the independent terms against sklearn's score, and on ours
    independent = ref["reliability"] - ref["resolution"] + ref["uncertainty"]
    assert ref_brier == approx(independent, rel=TIGHT)
    brier = part["reliability"] - part["resolution"] + part["uncertainty"]
    assert part["brier"] == approx(brier, rel=TIGHT)


def test_brier_partition_scaling_two_columns_is_twice_binary() -> None:
    rng = np.random.default_rng(32)
    p = np.round(rng.random(100), 2)
    y = (rng.random(100) < p).astype(int)
    one = brier_partition(y, p)
    two = brier_partition(y, np.column_stack([1 - p, p]))
    # reference: sklearn.metrics.brier_score_loss, scale_by_half=True vs False
    assert one["brier"] == approx(brier_score_loss(y, p), rel=TIGHT)
    assert two["brier"] == approx(
        brier_score_loss(y, np.column_stack([1 - p, p]), scale_by_half=False), rel=TIGHT
    )
    for name in one:
        assert two[name] == approx(2 * one[name], rel=1e-10, abs=1e-15), name


def test_brier_partition_all_distinct_forecasts() -> None:
    # every forecast distinct: each group is one row whose observed frequency is its label,
    # so reliability = brier and resolution = mean (y - base)^2 = uncertainty (Murphy 1973)
    rng = np.random.default_rng(33)
    p = rng.random(300)
    y = (rng.random(300) < p).astype(int)
    part = brier_partition(y, p)
    assert part["resolution"] == approx(part["uncertainty"], rel=TIGHT)
    assert part["reliability"] == approx(brier_score_loss(y, p), rel=TIGHT)  # sklearn


# ------------------------------------------------------------------- property tests


_shapes = st.tuples(
    st.integers(min_value=0, max_value=2**32 - 1),  # data seed
    st.integers(min_value=1, max_value=40),  # rows
    st.integers(min_value=1, max_value=6),  # seeds
    st.integers(min_value=2, max_value=4),  # classes
)


def _all_decompositions(seed: int, n: int, k: int, c: int, w=None, order=None, repeat=None):
    """The three decompositions on data from one seed, with rows reordered or repeated."""
    y_r, p_r = _regression(seed, n, k)
    y_l, lab = _labels(seed, n, k, c)
    y_p, probs = _probabilities(seed, n, k, c)
    take = np.arange(n) if order is None else order
    if repeat is not None:
        take = np.repeat(np.arange(n), repeat)
    return [
        squared_loss_decomposition(y_r[take], p_r[:, take], sample_weight=w),
        zero_one_decomposition(y_l[take], lab[:, take], n_classes=c, sample_weight=w),
        log_loss_decomposition(y_p[take], probs[:, take], sample_weight=w),
        squared_loss_decomposition(np.eye(c)[y_p[take]], probs[:, take], sample_weight=w),
    ]


@PROPERTY
@given(_shapes)
def test_property_row_permutation_changes_nothing(shape) -> None:
    seed, n, k, c = shape
    order = np.random.default_rng(seed).permutation(n)
    w = np.random.default_rng(seed + 1).uniform(0.1, 2.0, size=n)
    for a, b in zip(
        _all_decompositions(seed, n, k, c, w=w),
        _all_decompositions(seed, n, k, c, w=w[order], order=order),
        strict=True,
    ):
        _assert_same(a, b, rel=1e-12)
    y, probs = _probabilities(seed, n, 1, c)
    p = np.round(probs[0], 1)
    p /= p.sum(axis=1, keepdims=True)
    a = brier_partition(y, p, sample_weight=w)
    b = brier_partition(y[order], p[order], sample_weight=w[order])
    assert a == approx(b, rel=1e-12, abs=1e-15)


@PROPERTY
@given(_shapes)
def test_property_one_seed_has_zero_variance(shape) -> None:
    seed, n, _, c = shape
    sq, zo, lg, brier = _all_decompositions(seed, n, 1, c)
    assert sq.variance == 0.0
    assert brier.variance == 0.0
    assert zo.variance == 0.0
    assert zo.extra["net_variance"] == 0.0
    # log: -log sum_c p_c, zero up to the rounding of the row sums (no renormalization)
    assert abs(lg.variance) <= 10 * EPS
    for d in (sq, zo, brier):
        assert d.expected_loss == d.bias + d.variance


@PROPERTY
@given(_shapes)
def test_property_duplicating_every_seed_changes_nothing(shape) -> None:
    seed, n, k, c = shape
    y_r, p_r = _regression(seed, n, k)
    y_l, lab = _labels(seed, n, k, c)
    y_p, probs = _probabilities(seed, n, k, c)
    twice = lambda a: np.concatenate([a, a])  # noqa: E731
    pairs = [
        (squared_loss_decomposition(y_r, p_r), squared_loss_decomposition(y_r, twice(p_r))),
        (
            zero_one_decomposition(y_l, lab, n_classes=c),
            zero_one_decomposition(y_l, twice(lab), n_classes=c),
        ),
        (log_loss_decomposition(y_p, probs), log_loss_decomposition(y_p, twice(probs))),
    ]
    for a, b in pairs:
        _assert_same(a, b, rel=1e-12, abs_=1e-14)


@PROPERTY
@given(_shapes)
def test_property_unit_weights_equal_no_weights(shape) -> None:
    seed, n, k, c = shape
    for a, b in zip(
        _all_decompositions(seed, n, k, c),
        _all_decompositions(seed, n, k, c, w=np.ones(n)),
        strict=True,
    ):
        _assert_same(a, b, rel=1e-12)


@PROPERTY
@given(_shapes)
def test_property_integer_weights_equal_repeated_rows(shape) -> None:
    seed, n, k, c = shape
    counts = np.random.default_rng(seed + 2).integers(0, 4, size=n)
    counts[0] = max(counts[0], 1)
    for a, b in zip(
        _all_decompositions(seed, n, k, c, w=counts.astype(float)),
        _all_decompositions(seed, n, k, c, repeat=counts),
        strict=True,
    ):
        _assert_same(a, b, rel=1e-10, abs_=1e-14)
    y, probs = _probabilities(seed, n, 1, c)
    p = np.round(probs[0], 1)
    p /= p.sum(axis=1, keepdims=True)
    a = brier_partition(y, p, sample_weight=counts)
    rows = np.repeat(np.arange(n), counts)
    b = brier_partition(y[rows], p[rows])
    assert a == approx(b, rel=1e-10, abs=1e-15)


# --------------------------------------------------------------------------- edge cases


def test_one_row() -> None:
    y = np.array([1.5])
    p = np.array([[1.0], [2.0], [4.0]])
    d = squared_loss_decomposition(y, p)
    # reference: numpy.var (ddof=0) and sklearn.metrics.mean_squared_error
    assert d.variance == approx(np.var(p[:, 0]), rel=TIGHT)
    assert d.expected_loss == approx(np.mean([mean_squared_error(y, pk) for pk in p]), rel=TIGHT)
    zo = zero_one_decomposition(np.array([1]), np.array([[1], [0], [0]]), n_classes=2)
    assert zo.bias == 1.0  # Domingos (2000): main prediction 0 is wrong
    assert zo.expected_loss == approx(2 / 3, rel=TIGHT)
    assert zo.expected_loss == approx(zo.bias + zo.extra["net_variance"], rel=TIGHT)
    lg = log_loss_decomposition(np.array([0]), np.array([[[0.9, 0.1]], [[0.6, 0.4]]]))
    ref = _heskes_reference(np.array([0]), np.array([[[0.9, 0.1]], [[0.6, 0.4]]]))
    assert lg.expected_loss == approx(ref["expected"], rel=TIGHT)
    assert lg.variance == approx(ref["kl"], rel=1e-10)
    part = brier_partition(np.array([1]), np.array([0.7]))
    assert part["brier"] == approx(0.09, rel=TIGHT)  # (0.7 - 1)^2, by definition
    assert part["uncertainty"] == 0.0


def test_identical_seeds_have_zero_variance() -> None:
    y, p = _regression(40, n=25, k=1, offset=1e7)
    d = squared_loss_decomposition(y, np.repeat(p, 6, axis=0))
    assert d.variance == 0.0
    assert d.variance_share == 0.0
    assert d.expected_loss == approx(mean_squared_error(y, p[0]), rel=1e-9)  # sklearn
    y_l, lab = _labels(41, n=25, k=1, n_classes=3)
    zo = zero_one_decomposition(y_l, np.repeat(lab, 5, axis=0), n_classes=3)
    assert zo.variance == 0.0
    assert zo.expected_loss == zo.bias == approx(zero_one_loss(y_l, lab[0]), rel=TIGHT)
    y_p, probs = _probabilities(42, n=25, k=1, n_classes=3)
    lg = log_loss_decomposition(y_p, np.repeat(probs, 4, axis=0))
    assert abs(lg.variance) <= 10 * EPS
    # reference: sklearn.metrics.log_loss of the single seed
    assert lg.bias == approx(log_loss(y_p, probs[0], labels=np.arange(3)), rel=1e-12)


def test_perfect_predictions_define_variance_share_as_zero() -> None:
    y = np.arange(5.0)
    d = squared_loss_decomposition(y, np.tile(y, (3, 1)))
    assert d.expected_loss == 0.0
    assert d.variance_share == 0.0
    zo = zero_one_decomposition(np.arange(3), np.tile(np.arange(3), (2, 1)), n_classes=3)
    assert zo.expected_loss == 0.0 and zo.variance_share == 0.0


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: squared_loss_decomposition([1.0, 2.0], [[1.0, 2.0, 3.0]]), "predictions"),
        (lambda: squared_loss_decomposition([1.0, np.nan], [[1.0, 2.0]]), "y_true"),
        (lambda: squared_loss_decomposition([1.0, 2.0], [[1.0, np.inf]]), "predictions"),
        (lambda: squared_loss_decomposition([[1.0, 0.0]], [[[1.0, 0.0, 0.0]]]), "predictions"),
        (lambda: squared_loss_decomposition([1.0], [[1.0]], noise_variance=-1.0), "noise_variance"),
        (lambda: squared_loss_decomposition([1.0], [[1.0]], sample_weight=[0.0]), "sample_weight"),
        (lambda: zero_one_decomposition([0, 3], [[0, 1]], n_classes=3), "y_true"),
        (lambda: zero_one_decomposition([0, 1], [[0, 1, 1]], n_classes=2), "labels"),
        (lambda: zero_one_decomposition([0, 1], [[0.0, 1.0]], n_classes=2), "labels"),
        (lambda: zero_one_decomposition([0, 1], [[0, 1]], n_classes=0), "n_classes"),
        (lambda: log_loss_decomposition([0, 1], [[[0.5, 0.6], [0.5, 0.5]]]), "probabilities"),
        (lambda: log_loss_decomposition([0, 2], [[0.5, 0.5], [0.5, 0.5]]), "y_true"),
        (lambda: log_loss_decomposition([0, 1], [0.5, 0.5]), "probabilities"),
        (lambda: brier_partition([0, 1], [0.5, 1.5]), "probabilities"),
        (lambda: brier_partition([0, 2], [0.5, 0.5]), "y_true"),
    ],
)
def test_bad_input_names_the_field(call, field: str) -> None:
    with pytest.raises(ScoringInputError) as info:
        call()
    assert info.value.field == field


# ------------------------------------------------------- squared loss from computed losses


def test_squared_from_losses_takes_the_identity_only_when_provably_accurate() -> None:
    from service.scoring.decomposition import (
        IDENTITY_TOLERANCE,
        _squared_loss_checked,
        _squared_loss_from_losses,
    )

    y, p = _regression(50, n=400, k=5)
    # reference: sklearn.metrics.mean_squared_error per seed and of the seed mean
    mean_seed = float(np.mean([mean_squared_error(y, pk) for pk in p]))
    ensemble = float(mean_squared_error(y, p.mean(axis=0)))
    u = EPS / 2
    got = _squared_loss_from_losses(
        mean_seed, ensemble, None, n_seeds=5, loss_relative_error=100 * u, residual_error=0.0
    )
    assert got is not None
    direct = _squared_loss_checked(y[:, None], p[:, :, None], None, None)
    _assert_same(got, direct, rel=IDENTITY_TOLERANCE)
    # a loss error bound too large for the difference, a large residual error (an offset),
    # no variance at all, or a non-finite loss: no answer, the caller goes the direct way
    for relative, residual in [(1e-6, 0.0), (100 * u, 1e-6)]:
        assert _squared_loss_from_losses(
            mean_seed, ensemble, None, n_seeds=5,
            loss_relative_error=relative, residual_error=residual,
        ) is None
    for a, b in [(1.0, 1.0), (1.0, 1.5), (math.inf, 1.0), (math.nan, 1.0)]:
        assert _squared_loss_from_losses(
            a, b, None, n_seeds=5, loss_relative_error=u, residual_error=0.0
        ) is None
    # one seed: variance exactly 0 (as the direct method gives) and the ensemble is the seed
    one = _squared_loss_from_losses(
        ensemble, ensemble, 0.5, n_seeds=1, loss_relative_error=u, residual_error=0.0
    )
    assert one is not None and one.variance == 0.0 and one.noise == 0.5
    assert one.bias == approx(ensemble - 0.5, rel=TIGHT)
