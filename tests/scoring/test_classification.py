"""Classification metrics, intervals and report, checked against outside references.

References: scikit-learn (metrics, calibration_curve, bundled datasets), scipy (bootstrap,
pearsonr, mode, norm), statsmodels (proportion_confint), DeLong, DeLong & Clarke-Pearson
(1988) for the definition of the AUC's structural components, Hanley & McNeil (1982) for a
published data set. Each check names its source beside it.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn import metrics
from sklearn.calibration import calibration_curve
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.exceptions import UndefinedMetricWarning
from sklearn.linear_model import LogisticRegression
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.proportion import proportion_confint

from service.scoring import ScoringInputError, ScoringOptions
from service.scoring._binary_curves import ranking_stats, roc_auc_placements
from service.scoring.classification import (
    ECE_BINS,
    LOWER_IS_BETTER,
    _ap_interval,
    _bca_weighted_jackknife,
    _confidence_bins,
    classification_report,
    classification_row_losses,
    confusion_matrices,
    count_bootstrap_intervals,
    expected_calibration_error,
    metrics_from_confusion,
    predicted_labels,
    seed_metrics,
)
from service.scoring.flags import FLAG_CODES
from service.scoring.intervals import bca_interval

RTOL = 1e-12


# ----------------------------------------------------------------------------- helpers


def _random_task(rng, n, k, n_classes, *, ties=False, weights=False):
    probs = rng.dirichlet(np.ones(n_classes), size=(k, n))
    if ties:  # coarse probabilities: many tied scores (rows still sum to 1)
        probs[..., 0] = np.round(probs[..., 0], 1)
        probs[..., 1:] = probs[..., 1:] / probs[..., 1:].sum(axis=2, keepdims=True) * (
            1.0 - probs[..., :1]
        )
    y = rng.integers(0, n_classes, n)
    w = rng.random(n) * 2.0 if weights else None
    return y, probs, w


def _sklearn_seed(y, lab, prob, w, n_classes):
    """The reference value of every metric for one seed, from sklearn.metrics."""
    ref = {
        "accuracy": metrics.accuracy_score(y, lab, sample_weight=w),
        "balanced_accuracy": metrics.balanced_accuracy_score(y, lab, sample_weight=w),
        "mcc": metrics.matthews_corrcoef(y, lab, sample_weight=w),
        "cohen_kappa": metrics.cohen_kappa_score(y, lab, sample_weight=w),
    }
    averages = ["macro", "weighted"] + (["binary"] if n_classes == 2 else [])
    for avg in averages:
        suffix = "" if avg == "binary" else "_" + avg
        ref["precision" + suffix] = metrics.precision_score(y, lab, average=avg, sample_weight=w)
        ref["recall" + suffix] = metrics.recall_score(y, lab, average=avg, sample_weight=w)
        ref["f1" + suffix] = metrics.f1_score(y, lab, average=avg, sample_weight=w)
    if prob is not None:
        classes = list(range(n_classes))
        ref["log_loss"] = metrics.log_loss(y, prob, sample_weight=w, labels=classes)
        if n_classes == 2:
            ref["brier"] = metrics.brier_score_loss(y, prob[:, 1], sample_weight=w)
            ref["roc_auc"] = metrics.roc_auc_score(y, prob[:, 1], sample_weight=w)
            ref["average_precision"] = metrics.average_precision_score(
                y, prob[:, 1], sample_weight=w
            )
        else:
            ref["brier"] = metrics.brier_score_loss(y, prob, sample_weight=w, labels=classes)
            ref["roc_auc"] = metrics.roc_auc_score(
                y, prob, multi_class="ovr", average="macro", sample_weight=w, labels=classes
            )
            ref["average_precision"] = metrics.average_precision_score(
                y, prob, average="macro", sample_weight=w
            )
    return ref


def _assert_metrics_match(ours, y, labels, probs, w, n_classes, rtol=RTOL):
    for k in range(labels.shape[0]):
        prob = None if probs is None else probs[k]
        ref = _sklearn_seed(y, labels[k], prob, w, n_classes)
        for name, value in ref.items():
            # reference: sklearn.metrics (function of the same name, see _sklearn_seed)
            np.testing.assert_allclose(
                ours[name][k], value, rtol=rtol, atol=1e-15, err_msg=f"{name} seed {k}"
            )


def _ece_reference(y, prob, n_bins=ECE_BINS):
    """ECE from sklearn.calibration.calibration_curve on (correct, top-class confidence)."""
    confidence = prob.max(axis=1)
    correct = (prob.argmax(axis=1) == y).astype(int)
    # reference: sklearn.calibration.calibration_curve (per-bin accuracy and confidence)
    acc, conf = calibration_curve(correct, confidence, n_bins=n_bins, strategy="uniform")
    # bin shares: np.histogram; its [a, b) bins agree with calibration_curve's (a, b] bins
    # except on an exact edge, which continuous random confidences never hit
    counts = np.histogram(confidence, bins=np.linspace(0.0, 1.0, n_bins + 1))[0]
    shares = counts[counts > 0] / y.size
    return float(np.sum(shares * np.abs(acc - conf)))


# ------------------------------------------------------------- per-seed metrics vs sklearn


@pytest.mark.parametrize("n_classes", [2, 3, 5])
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("ties", [False, True])
def test_seed_metrics_match_sklearn_from_probabilities(n_classes, weighted, ties):
    rng = np.random.default_rng(100 * n_classes + 10 * weighted + ties)
    y, probs, w = _random_task(rng, 400, 3, n_classes, ties=ties, weights=weighted)
    ours = seed_metrics(y, n_classes, probabilities=probs, sample_weight=w)
    labels = probs.argmax(axis=2)  # reference: np.argmax (first maximum)
    _assert_metrics_match(ours, y, labels, probs, w, n_classes)


@pytest.mark.parametrize("n_classes", [2, 4])
def test_seed_metrics_match_sklearn_with_given_labels(n_classes):
    rng = np.random.default_rng(7 + n_classes)
    y, probs, w = _random_task(rng, 300, 4, n_classes, weights=True)
    labels = rng.integers(0, n_classes, size=(4, 300))  # labels unrelated to probabilities
    ours = seed_metrics(y, n_classes, labels=labels, probabilities=probs, sample_weight=w)
    _assert_metrics_match(ours, y, labels, probs, w, n_classes)
    labels_only = seed_metrics(y, n_classes, labels=labels)
    assert "log_loss" not in labels_only
    _assert_metrics_match(labels_only, y, labels, None, None, n_classes)


def test_macro_average_skips_classes_absent_from_truth_and_labels():
    # class 3 of 4 is neither in y_true nor predicted: sklearn's default labels=None skip it
    rng = np.random.default_rng(3)
    y = rng.integers(0, 3, 200)
    labels = rng.integers(0, 3, size=(2, 200))
    labels[1, :5] = 3  # ... but seed 1 predicts it on five rows
    ours = seed_metrics(y, 4, labels=labels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UndefinedMetricWarning)  # class 3: 0/0 recall
        warnings.filterwarnings("ignore", "y_pred contains classes not in y_true", UserWarning)
        _assert_metrics_match(ours, y, labels, None, None, 4)


def test_edge_constant_predictions_and_zero_division():
    y = np.array([0, 1, 1, 0, 1, 0, 0])
    labels = np.zeros((1, y.size), dtype=int)  # never predicts the positive class
    ours = seed_metrics(y, 2, labels=labels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UndefinedMetricWarning)  # zero_division="warn" -> 0
        _assert_metrics_match(ours, y, labels, None, None, 2)
    assert ours["precision"][0] == 0.0  # reference: sklearn's zero_division default value 0


def test_edge_single_row():
    y = np.array([1])
    probs = np.array([[[0.3, 0.7]]])
    ours = seed_metrics(y, 2, probabilities=probs)
    labels = np.array([[1]])
    with warnings.catch_warnings():
        # sklearn warns: kappa and AUC undefined, single label in confusion matrix
        warnings.simplefilter("ignore", UndefinedMetricWarning)
        warnings.simplefilter("ignore", UserWarning)
        ref_kappa = metrics.cohen_kappa_score(y, labels[0])
        ref_auc = metrics.roc_auc_score(y, probs[0, :, 1])
        ref = {
            "accuracy": metrics.accuracy_score(y, labels[0]),
            "f1": metrics.f1_score(y, labels[0]),
            "mcc": metrics.matthews_corrcoef(y, labels[0]),
            "log_loss": metrics.log_loss(y, probs[0], labels=[0, 1]),
            "brier": metrics.brier_score_loss(y, probs[0, :, 1]),
            "average_precision": metrics.average_precision_score(y, probs[0, :, 1]),
        }
    for name, value in ref.items():
        # reference: sklearn.metrics on one row
        np.testing.assert_allclose(ours[name][0], value, rtol=RTOL)
    assert math.isnan(ref_kappa) and math.isnan(ours["cohen_kappa"][0])
    assert math.isnan(ref_auc) and math.isnan(ours["roc_auc"][0])


def test_one_class_in_truth_auc_is_nan_as_sklearn_and_noted():
    rng = np.random.default_rng(11)
    y = np.ones(50, dtype=int)
    p = rng.random(50)
    probs = np.stack([1 - p, p], axis=1)
    # reference: sklearn.metrics.roc_auc_score warns and returns NaN
    with pytest.warns(UndefinedMetricWarning, match="Only one class"):
        ref = metrics.roc_auc_score(y, p)
    assert math.isnan(ref)
    report = classification_report(y, 2, probabilities=probs)
    assert math.isnan(report.scores["roc_auc"])
    assert any("roc_auc is undefined" in note for note in report.details["notes"])
    assert report.intervals["roc_auc"].method == "none"
    # all rows positive: average precision 1.0 (reference: sklearn.metrics)
    assert report.scores["average_precision"] == metrics.average_precision_score(y, p) == 1.0


def test_no_positive_rows_average_precision_nan_where_sklearn_gives_zero():
    rng = np.random.default_rng(12)
    y = np.zeros(40, dtype=int)
    p = rng.random(40)
    # reference: sklearn.metrics.average_precision_score returns 0.0 with a warning; we
    # return NaN by design (documented in the module docstring)
    with pytest.warns(UserWarning, match="No positive class"):
        assert metrics.average_precision_score(y, p) == 0.0
    ours = seed_metrics(y, 2, probabilities=np.stack([1 - p, p], axis=1))
    assert math.isnan(ours["average_precision"][0])


def test_multiclass_auc_nan_when_a_class_is_missing_like_sklearn():
    rng = np.random.default_rng(13)
    probs = rng.dirichlet(np.ones(3), size=60)
    y = rng.integers(0, 2, 60)  # class 2 never occurs
    with pytest.warns(UndefinedMetricWarning):
        ref = metrics.roc_auc_score(y, probs, multi_class="ovr", labels=[0, 1, 2])
    assert math.isnan(ref)  # reference: sklearn.metrics.roc_auc_score
    assert math.isnan(seed_metrics(y, 3, probabilities=probs)["roc_auc"][0])


def test_zero_weight_rows_are_ignored_like_sklearn():
    rng = np.random.default_rng(14)
    y, probs, _ = _random_task(rng, 200, 2, 3, ties=True)
    w = rng.integers(0, 3, 200).astype(float)  # a third of the rows weigh nothing
    ours = seed_metrics(y, 3, probabilities=probs, sample_weight=w)
    _assert_metrics_match(ours, y, probs.argmax(axis=2), probs, w, 3)


def test_integer_weights_equal_repeated_rows():
    # reference: sklearn.metrics with repeated rows (integer weights mean repetition)
    rng = np.random.default_rng(15)
    y, probs, _ = _random_task(rng, 150, 2, 2, ties=True)
    w = rng.integers(1, 4, 150)
    ours = seed_metrics(y, 2, probabilities=probs, sample_weight=w.astype(float))
    rep = np.repeat(np.arange(150), w)
    _assert_metrics_match(ours, y[rep], probs.argmax(axis=2)[:, rep], probs[:, rep], None, 2)
    ece_rep = expected_calibration_error(y[rep], probs[:, rep])
    np.testing.assert_allclose(ours["ece"], ece_rep, rtol=1e-12)


# ---------------------------------------------------------------- confusion and overflow


def test_confusion_matrices_match_sklearn():
    rng = np.random.default_rng(20)
    y = rng.integers(0, 4, 500)
    labels = rng.integers(0, 4, size=(3, 500))
    w = rng.random(500)
    counts = confusion_matrices(y, labels, 4)
    weighted = confusion_matrices(y, labels, 4, sample_weight=w)
    assert counts.dtype == np.int64
    for k in range(3):
        # reference: sklearn.metrics.confusion_matrix
        np.testing.assert_array_equal(
            counts[k], metrics.confusion_matrix(y, labels[k], labels=[0, 1, 2, 3])
        )
        np.testing.assert_allclose(
            weighted[k],
            metrics.confusion_matrix(y, labels[k], labels=[0, 1, 2, 3], sample_weight=w),
            rtol=RTOL,
        )


def test_mcc_and_kappa_do_not_overflow_at_a_million_rows():
    # cells near 1e6: MCC's product of covariances is ~1e24 in exact integers, past 2**63
    cells = np.array([[600_000, 400_000], [300_000, 700_000]], dtype=np.int64)
    t_sum, p_sum, n = cells.sum(axis=1), cells.sum(axis=0), int(cells.sum())
    exact = (n * n - int(np.dot(p_sum, p_sum))) * (n * n - int(np.dot(t_sum, t_sum)))
    assert exact > 2**63  # the trap: int64 arithmetic would wrap around
    with np.errstate(over="ignore"):
        wrapped = (n * n - np.dot(p_sum, p_sum)) * (n * n - np.dot(t_sum, t_sum))
    assert int(wrapped) != exact

    y = np.repeat([0, 0, 1, 1], cells.reshape(-1))
    pred = np.repeat([0, 1, 0, 1], cells.reshape(-1))
    from_counts = metrics_from_confusion(cells)
    from_rows = seed_metrics(y, 2, labels=pred)
    ref_mcc = metrics.matthews_corrcoef(y, pred)  # reference: sklearn.metrics
    ref_phi = stats.pearsonr(y, pred).statistic  # reference: scipy (MCC = phi = Pearson r)
    ref_kappa = metrics.cohen_kappa_score(y, pred)  # reference: sklearn.metrics
    for ours in (from_counts, from_rows):
        np.testing.assert_allclose(float(np.squeeze(ours["mcc"])), ref_mcc, rtol=RTOL)
        np.testing.assert_allclose(float(np.squeeze(ours["mcc"])), ref_phi, rtol=1e-10)
        np.testing.assert_allclose(float(np.squeeze(ours["cohen_kappa"])), ref_kappa, rtol=RTOL)
    assert -1.0 <= float(from_counts["mcc"]) <= 1.0


def test_metrics_from_confusion_vectorizes_over_leading_axes():
    rng = np.random.default_rng(21)
    tables = rng.integers(0, 50, size=(4, 5, 3, 3))
    stacked = metrics_from_confusion(tables)
    for i in range(4):
        for j in range(5):
            one = metrics_from_confusion(tables[i, j])
            for name, value in one.items():
                np.testing.assert_allclose(stacked[name][i, j], value, rtol=1e-15)


# ------------------------------------------------------------------- labels and losses


def test_predicted_labels_ties_go_to_the_smaller_index():
    probs = np.array(
        [[0.5, 0.5, 0.0], [0.2, 0.4, 0.4], [0.1, 0.3, 0.6], [1 / 3, 1 / 3, 1 / 3]]
    )
    # reference: np.argmax returns the first maximum
    np.testing.assert_array_equal(predicted_labels(probs), np.argmax(probs, axis=1))
    binary = np.array([[0.5, 0.5], [0.4, 0.6], [0.7, 0.3]])
    np.testing.assert_array_equal(predicted_labels(binary), np.argmax(binary, axis=1))


@pytest.mark.parametrize("n_classes", [2, 3])
def test_row_losses_match_sklearn_row_by_row(n_classes):
    rng = np.random.default_rng(30 + n_classes)
    y, probs, _ = _random_task(rng, 40, 3, n_classes)
    probs[0, 0] = np.eye(n_classes)[(y[0] + 1) % n_classes]  # a zero on the truth: clipped
    log_rows = classification_row_losses(y, probabilities=probs, loss="log")
    brier_rows = classification_row_losses(y, probabilities=probs, loss="brier")
    zero_one_rows = classification_row_losses(y, probabilities=probs, loss="zero_one")
    classes = list(range(n_classes))
    for i in range(y.size):
        seeds = range(probs.shape[0])
        # reference: sklearn.metrics.log_loss / brier_score_loss / zero_one_loss on one row
        ref_log = np.mean([metrics.log_loss(y[i : i + 1], probs[k, i : i + 1], labels=classes)
                           for k in seeds])
        if n_classes == 2:
            ref_brier = np.mean([
                metrics.brier_score_loss(y[i : i + 1], probs[k, i : i + 1, 1], pos_label=1)
                for k in seeds
            ])
        else:
            ref_brier = np.mean([
                metrics.brier_score_loss(y[i : i + 1], probs[k, i : i + 1], labels=classes)
                for k in seeds
            ])
        ref_zero_one = np.mean([
            metrics.zero_one_loss(y[i : i + 1], probs[k, i : i + 1].argmax(axis=1))
            for k in seeds
        ])
        np.testing.assert_allclose(log_rows[i], ref_log, rtol=RTOL)
        np.testing.assert_allclose(brier_rows[i], ref_brier, rtol=RTOL, atol=1e-16)
        np.testing.assert_allclose(zero_one_rows[i], ref_zero_one, rtol=RTOL)


def test_row_losses_with_labels_and_errors():
    y = np.array([0, 1, 2, 1])
    labels = np.array([[0, 1, 1, 1], [2, 1, 2, 0]])
    rows = classification_row_losses(y, labels=labels, loss="zero_one")
    # reference: sklearn.metrics.zero_one_loss, mean over the two seeds
    assert rows.mean() == pytest.approx(
        np.mean([metrics.zero_one_loss(y, labels[k]) for k in range(2)]), rel=RTOL
    )
    with pytest.raises(ScoringInputError, match="probabilities"):
        classification_row_losses(y, labels=labels, loss="log")
    with pytest.raises(ScoringInputError, match="loss"):
        classification_row_losses(y, labels=labels, loss="hinge")


# ------------------------------------------------------------------------------- ECE


@pytest.mark.parametrize("n_classes", [2, 4])
def test_ece_matches_calibration_curve(n_classes):
    rng = np.random.default_rng(40 + n_classes)
    y, probs, _ = _random_task(rng, 2000, 2, n_classes)
    ours = expected_calibration_error(y, probs)
    for k in range(2):
        np.testing.assert_allclose(ours[k], _ece_reference(y, probs[k]), rtol=1e-12)


def test_confidence_bins_follow_sklearn_binning_on_edges():
    # reference: sklearn.calibration.calibration_curve bins with
    # np.searchsorted(np.linspace(0, 1, n_bins + 1)[1:-1], y_prob) (its source)
    rng = np.random.default_rng(41)
    for n_bins in (1, 3, 10, 15, 20):
        edges = np.linspace(0.0, 1.0, n_bins + 1)
        values = np.concatenate([
            rng.random(1000),
            edges,
            np.clip(np.nextafter(edges, 2.0), 0, 1),
            np.clip(np.nextafter(edges, -1.0), 0, 1),
            [0.2, 0.4, 0.6, 0.8, 1 / 3, 2 / 3, 0.1, 0.7],
        ])
        np.testing.assert_array_equal(
            _confidence_bins(values, n_bins), np.searchsorted(edges[1:-1], values)
        )


# ------------------------------------------------------------------ ranking statistics


def _delong_direct(positive, scores):
    """DeLong et al. (1988): psi kernel, structural components V10 and V01, S10/m + S01/n."""
    x = scores[positive][:, None]
    z = scores[~positive][None, :]
    psi = (x > z) + 0.5 * (x == z)
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    return psi.mean(), v10.var(ddof=1) / v10.size + v01.var(ddof=1) / v01.size


@pytest.mark.parametrize("ties", [False, True])
def test_delong_variance_matches_its_definition(ties):
    rng = np.random.default_rng(50 + ties)
    scores = rng.random(300)
    if ties:
        scores = np.round(scores, 1)
    positive = rng.random(300) < scores
    auc, var = _delong_direct(positive, scores)  # reference: DeLong et al. 1988 definitions
    r = ranking_stats(positive, scores)
    np.testing.assert_allclose(r.roc_auc, auc, rtol=RTOL)
    np.testing.assert_allclose(r.roc_auc_variance, var, rtol=1e-10)
    # constant weights take the weighted path: same numbers (Kish's n equals n)
    rw = ranking_stats(positive, scores, np.full(300, 3.7))
    np.testing.assert_allclose(rw.roc_auc, auc, rtol=RTOL)
    np.testing.assert_allclose(rw.roc_auc_variance, var, rtol=1e-10)
    a, placement = roc_auc_placements(positive, scores)
    np.testing.assert_allclose(a, auc, rtol=RTOL)
    np.testing.assert_allclose(placement[positive].mean(), auc, rtol=1e-12)
    np.testing.assert_allclose(placement[~positive].mean(), auc, rtol=1e-12)


def test_delong_on_hanley_mcneil_ratings():
    # Hanley & McNeil (1982), Radiology 143, 5-point ratings of 109 CT images (from memory:
    # normal 33/6/6/11/2, abnormal 3/2/2/11/33; published AUC 0.893)
    scores = np.repeat([1, 2, 3, 4, 5, 1, 2, 3, 4, 5], [33, 6, 6, 11, 2, 3, 2, 2, 11, 33]) / 5
    positive = np.r_[np.zeros(58, bool), np.ones(51, bool)]
    r = ranking_stats(positive, scores)
    assert r.roc_auc == pytest.approx(metrics.roc_auc_score(positive, scores), rel=RTOL)
    assert r.roc_auc == pytest.approx(0.893, abs=5e-4)  # from memory (published value)
    assert r.roc_auc_variance == pytest.approx(_delong_direct(positive, scores)[1], rel=1e-10)
    # Hanley & McNeil's own SE formula (their equation with Q1 = A/(2-A), Q2 = 2A^2/(1+A))
    # approximates the same variance; stated tolerance 10% of the SE
    a = r.roc_auc
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    hm = (a * (1 - a) + 50 * (q1 - a * a) + 57 * (q2 - a * a)) / (51 * 58)
    assert math.sqrt(r.roc_auc_variance) == pytest.approx(math.sqrt(hm), rel=0.10)


def _auc_vectorized(positive, scores, axis=-1):
    """Mann-Whitney AUC with scipy.stats.rankdata midranks, along ``axis`` (for bootstrap)."""
    positive = np.moveaxis(positive, axis, -1)
    ranks = stats.rankdata(np.moveaxis(scores, axis, -1), axis=-1)
    m = positive.sum(axis=-1)
    n = positive.shape[-1] - m
    return ((ranks * positive).sum(axis=-1) - m * (m + 1) / 2) / (m * n)


def test_delong_variance_against_row_bootstrap():
    rng = np.random.default_rng(52)
    n = 400
    positive = rng.random(n) < 0.4
    scores = 1 / (1 + np.exp(-(rng.normal(size=n) + 1.2 * positive)))
    r = ranking_stats(positive, scores)
    # the vectorized statistic is sklearn's AUC (reference: sklearn.metrics.roc_auc_score)
    assert _auc_vectorized(positive, scores) == pytest.approx(
        metrics.roc_auc_score(positive, scores), rel=RTOL
    )
    # reference: scipy.stats.bootstrap over rows; stated tolerance: bootstrap SD within 10%
    # of DeLong's SD (Monte Carlo error of 4000 resamples is about 1.1%, and the two
    # estimators agree to O(1/n))
    res = stats.bootstrap(
        (positive, scores), _auc_vectorized, paired=True, vectorized=True, n_resamples=4000,
        method="percentile", rng=np.random.default_rng(1),
    )
    assert math.sqrt(r.roc_auc_variance) == pytest.approx(res.standard_error, rel=0.10)


# --------------------------------------------------------------------------- intervals


def test_accuracy_interval_one_seed_is_wilson():
    rng = np.random.default_rng(60)
    y = rng.integers(0, 3, 250)
    labels = np.where(rng.random(250) < 0.7, y, rng.integers(0, 3, 250))
    report = classification_report(y, 3, labels=labels)
    hits = int((labels == y).sum())
    # reference: statsmodels.stats.proportion.proportion_confint(method="wilson")
    low, high = proportion_confint(hits, 250, alpha=0.05, method="wilson")
    iv = report.intervals["accuracy"]
    assert iv.method == "wilson"
    assert (iv.low, iv.high) == pytest.approx((low, high), rel=1e-12)


def test_accuracy_interval_several_seeds_is_normal_on_row_means():
    rng = np.random.default_rng(61)
    y = rng.integers(0, 2, 300)
    labels = np.where(rng.random((4, 300)) < 0.8, y, 1 - y)
    report = classification_report(y, 2, labels=labels)
    row_correct = (labels == y).mean(axis=0)
    # reference: scipy.stats.norm.interval with scipy.stats.sem of the per-row correctness
    low, high = stats.norm.interval(0.95, loc=row_correct.mean(), scale=stats.sem(row_correct))
    iv = report.intervals["accuracy"]
    assert (iv.low, iv.high) == pytest.approx((low, high), rel=1e-12)
    assert report.scores["accuracy"] == pytest.approx(row_correct.mean(), rel=RTOL)


def test_log_loss_and_brier_intervals_are_normal_on_row_losses():
    rng = np.random.default_rng(62)
    y, probs, _ = _random_task(rng, 300, 3, 3)
    report = classification_report(y, 3, probabilities=probs)
    for name, loss in (("log_loss", "log"), ("brier", "brier")):
        rows = classification_row_losses(y, probabilities=probs, loss=loss)
        # reference: scipy.stats.norm.interval with scipy.stats.sem (CLT, common practice);
        # the row losses themselves are checked against sklearn above
        low, high = stats.norm.interval(0.95, loc=rows.mean(), scale=stats.sem(rows))
        iv = report.intervals[name]
        assert (iv.low, iv.high) == pytest.approx((low, high), rel=1e-10)


def test_count_bootstrap_of_f1_against_scipy_row_bootstrap():
    rng = np.random.default_rng(63)
    n = 300
    y = rng.integers(0, 2, n)
    pred = np.where(rng.random(n) < 0.75, y, 1 - y)
    counts = confusion_matrices(y, pred, 2)[0]

    def f1(a, b, axis=-1):
        tp = (a * b).sum(axis=axis)
        return 2.0 * tp / (a.sum(axis=axis) + b.sum(axis=axis))

    # the vectorized statistic is sklearn's F1 (reference: sklearn.metrics.f1_score)
    assert f1(y, pred) == pytest.approx(metrics.f1_score(y, pred), rel=RTOL)
    for method in ("percentile", "bca"):
        options = ScoringOptions(n_resamples=4000, bootstrap_method=method, seed=5)
        ours = count_bootstrap_intervals(counts, options, names=("f1",))["f1"]
        # reference: scipy.stats.bootstrap resampling rows; stated tolerance 0.01 on each
        # endpoint (two independent Monte Carlo runs of 4000 resamples; the interval is
        # about 0.1 wide)
        ref = stats.bootstrap(
            (y, pred), f1, paired=True, vectorized=True, n_resamples=4000,
            method="BCa" if method == "bca" else "percentile", rng=np.random.default_rng(6),
        ).confidence_interval
        assert ours.method == f"bootstrap_{method}"
        assert ours.low == pytest.approx(ref.low, abs=0.01)
        assert ours.high == pytest.approx(ref.high, abs=0.01)


def test_constant_weights_leave_every_interval_unchanged():
    # weights that are all equal carry no information: every interval must equal the
    # unweighted one (the weighted count bootstrap is exact in this case)
    rng = np.random.default_rng(66)
    y, probs, _ = _random_task(rng, 150, 2, 3)
    for method in ("percentile", "bca"):
        options = ScoringOptions(bootstrap_method=method, n_resamples=300)
        plain = classification_report(y, 3, probabilities=probs, options=options)
        weighted = classification_report(
            y, 3, probabilities=probs, sample_weight=np.full(150, 0.25), options=options
        )
        for name, iv in plain.intervals.items():
            other = weighted.intervals[name]
            assert other.method == iv.method, name
            np.testing.assert_allclose([other.low, other.high], [iv.low, iv.high],
                                       rtol=1e-9, equal_nan=True, err_msg=name)


def test_count_jackknife_bca_equals_row_jackknife_bca():
    rng = np.random.default_rng(64)
    replicates = rng.normal(0.6, 0.05, 1000)
    jack = rng.normal(0.6, 0.001, 4)
    mult = np.array([30.0, 5.0, 12.0, 53.0])
    ours = _bca_weighted_jackknife(replicates, 0.61, jack, mult, 0.95)
    # reference: intervals.bca_interval with the jackknife expanded to one value per row
    ref = bca_interval(replicates, 0.61, np.repeat(jack, mult.astype(int)), 0.95)
    assert (ours.low, ours.high) == pytest.approx((ref.low, ref.high), rel=1e-12)


def test_intervals_cover_every_headline_metric_and_use_the_seed():
    rng = np.random.default_rng(65)
    y, probs, w = _random_task(rng, 200, 3, 2, weights=True)
    options = ScoringOptions(seed=123)
    a = classification_report(y, 2, probabilities=probs, sample_weight=w, options=options)
    b = classification_report(y, 2, probabilities=probs, sample_weight=w, options=options)
    c = classification_report(
        y, 2, probabilities=probs, sample_weight=w, options=ScoringOptions(seed=124)
    )
    assert set(a.intervals) == set(a.scores)
    assert a.intervals == b.intervals  # same seed, same intervals
    assert a.intervals["f1"] != c.intervals["f1"]  # the bootstrap follows options.seed
    for name, iv in a.intervals.items():
        if name == "ece":
            assert iv.method == "none" and iv.note
            continue
        assert iv.low <= a.scores[name] <= iv.high or name in {"mcc", "cohen_kappa"}, name


def test_interval_coverage_of_accuracy_and_auc():
    # known truth: negatives score N(0, 1), positives N(1, 1), label 1 when the logistic
    # probability of (score - 0.5) exceeds 0.5. True AUC = Phi(1 / sqrt(2)) and true
    # accuracy = Phi(0.5) (reference: scipy.stats.norm). 1000 draws of 200 rows.
    true_auc = stats.norm.cdf(1 / math.sqrt(2))
    true_accuracy = stats.norm.cdf(0.5)
    rng = np.random.default_rng(2024)
    options = ScoringOptions(n_resamples=100)
    covered = {"accuracy": 0, "roc_auc": 0}
    draws = 1000
    for _ in range(draws):
        y = rng.integers(0, 2, 200)
        score = rng.normal(size=200) + y
        p1 = 1 / (1 + np.exp(-(score - 0.5)))
        report = classification_report(y, 2, probabilities=np.stack([1 - p1, p1], axis=1),
                                       options=options)
        for name, truth in (("accuracy", true_accuracy), ("roc_auc", true_auc)):
            iv = report.intervals[name]
            covered[name] += iv.low <= truth <= iv.high
    for name in covered:
        assert 0.93 <= covered[name] / draws <= 0.97, (name, covered[name] / draws)


def test_average_precision_interval_coverage():
    # The logit interval (Boyd, Eng & Page 2013, formula from memory) checked by simulation:
    # truth = AP of one million rows from the same model (its own error is about 1e-3, a
    # hundredth of the intervals' width). 1000 draws of 300 rows; the interval is slightly
    # conservative here, hence the wider upper bound (stated).
    rng = np.random.default_rng(77)

    def draw(n):
        positive = rng.random(n) < 0.3
        return positive, 1 / (1 + np.exp(-(rng.normal(size=n) + 1.5 * positive)))

    big_pos, big_scores = draw(1_000_000)
    # reference: sklearn.metrics.average_precision_score for the truth
    truth = metrics.average_precision_score(big_pos, big_scores)
    positive, scores = draw(300)
    report = classification_report(
        positive.astype(int), 2, probabilities=np.stack([1 - scores, scores], axis=1),
        options=ScoringOptions(n_resamples=100),
    )
    iv = _ap_interval([ranking_stats(positive, scores)], 0.95)
    assert report.intervals["average_precision"] == iv  # the report uses this interval
    covered = 0
    for _ in range(1000):
        positive, scores = draw(300)
        iv = _ap_interval([ranking_stats(positive, scores)], 0.95)
        covered += iv.low <= truth <= iv.high
    assert 0.93 <= covered / 1000 <= 0.985


# ------------------------------------------------------------------------------ report


def _bootstrap_models(x, y, n_seeds, n_train):
    """Logistic regressions on bootstrap draws of the first n_train rows; test = the rest."""
    scaler = StandardScaler().fit(x[:n_train])
    xs = scaler.transform(x)
    rng = np.random.default_rng(0)
    probs, train_probs = [], []
    for _ in range(n_seeds):
        idx = rng.integers(0, n_train, n_train)
        model = LogisticRegression(C=0.5, max_iter=2000).fit(xs[idx], y[idx])
        probs.append(model.predict_proba(xs[n_train:]))
        train_probs.append(model.predict_proba(xs[:n_train]))
    return np.array(probs), np.array(train_probs)


@pytest.mark.parametrize("loader", [load_breast_cancer, load_wine])
def test_report_on_bundled_dataset_matches_sklearn(loader):
    x, y = loader(return_X_y=True)
    order = np.random.default_rng(1).permutation(y.size)
    x, y = x[order], y[order]
    n_train = int(0.6 * y.size)
    probs, train_probs = _bootstrap_models(x, y, 4, n_train)
    y_test, y_train = y[n_train:], y[:n_train]
    n_classes = int(y.max()) + 1
    report = classification_report(
        y_test, n_classes, probabilities=probs,
        train_y_true=y_train, train_probabilities=train_probs,
    )
    assert report.task == "classification" and report.n_seeds == 4
    labels = probs.argmax(axis=2)
    per_seed = [_sklearn_seed(y_test, labels[k], probs[k], None, n_classes) for k in range(4)]
    for name in per_seed[0]:
        values = np.array([p[name] for p in per_seed])
        # reference: sklearn.metrics, mean and spread over seeds
        assert report.scores[name] == pytest.approx(values.mean(), rel=1e-12), name
        assert report.seed_spread[name].sd == pytest.approx(values.std(ddof=1), rel=1e-9, abs=1e-15)
    mean_probs = probs.mean(axis=0)
    ens_ref = _sklearn_seed(y_test, mean_probs.argmax(axis=1), mean_probs, None, n_classes)
    for name, value in ens_ref.items():
        # reference: sklearn.metrics of the mean probabilities
        assert report.ensemble[name] == pytest.approx(value, rel=1e-12), name
    train_ref = [_sklearn_seed(y_train, train_probs[k].argmax(axis=1), train_probs[k], None,
                               n_classes) for k in range(4)]
    assert report.train_scores["log_loss"] == pytest.approx(
        np.mean([t["log_loss"] for t in train_ref]), rel=1e-12
    )
    # confusion matrix: mean over seeds of sklearn's
    ref_cm = np.mean([metrics.confusion_matrix(y_test, labels[k]) for k in range(4)], axis=0)
    np.testing.assert_allclose(report.details["confusion_matrix"], ref_cm, rtol=RTOL)
    assert set(report.bias_variance) == {"zero_one", "log", "squared"}
    # decompositions are of the same losses as the headline scores
    assert report.bias_variance["log"].expected_loss == pytest.approx(
        report.scores["log_loss"], rel=1e-9)
    assert report.bias_variance["squared"].expected_loss == pytest.approx(
        report.scores["brier"], rel=1e-9)
    assert report.bias_variance["zero_one"].expected_loss == pytest.approx(
        1 - report.scores["accuracy"], rel=1e-12)
    assert all(f.code in FLAG_CODES for f in report.flags)
    if n_classes == 2:
        part = report.details["brier_partition"]
        assert part["brier"] == pytest.approx(report.ensemble["brier"], rel=1e-9)
        assert part["reliability"] - part["resolution"] + part["uncertainty"] == pytest.approx(
            part["brier"], rel=1e-9)


def test_report_one_seed_has_same_shape_and_integer_confusion():
    rng = np.random.default_rng(70)
    y, probs, _ = _random_task(rng, 120, 1, 3)
    report = classification_report(y, 3, probabilities=probs[0])
    assert set(report.bias_variance) == {"zero_one", "log", "squared"}
    for dec in report.bias_variance.values():
        assert dec.variance == pytest.approx(0.0, abs=1e-15)
    cm = report.details["confusion_matrix"]
    # reference: sklearn.metrics.confusion_matrix (integer counts)
    assert cm == metrics.confusion_matrix(y, probs[0].argmax(axis=1)).tolist()
    assert all(isinstance(v, int) for row in cm for v in row)
    assert report.seed_spread["accuracy"].sd == 0.0
    assert report.ensemble == pytest.approx(report.scores, rel=1e-12)


def test_report_with_sample_weights_on_both_sides():
    rng = np.random.default_rng(74)
    y, probs, w = _random_task(rng, 300, 2, 3, weights=True)
    y_tr, probs_tr, w_tr = _random_task(rng, 200, 2, 3, weights=True)
    report = classification_report(
        y, 3, probabilities=probs, sample_weight=w,
        train_y_true=y_tr, train_probabilities=probs_tr, train_sample_weight=w_tr,
    )
    for name, side in (("scores", (y, probs, w)), ("train_scores", (y_tr, probs_tr, w_tr))):
        yy, pp, ww = side
        refs = [_sklearn_seed(yy, pp[k].argmax(axis=1), pp[k], ww, 3) for k in range(2)]
        values = getattr(report, name)
        for metric in refs[0]:
            # reference: sklearn.metrics with sample_weight, mean over seeds
            assert values[metric] == pytest.approx(
                np.mean([r[metric] for r in refs]), rel=1e-12), (name, metric)
    support = np.bincount(y, weights=w, minlength=3)  # reference: numpy weighted counts
    np.testing.assert_allclose(report.details["per_class"]["support_weight"], support, rtol=RTOL)


def test_labels_only_report_majority_vote_ties_to_smallest():
    rng = np.random.default_rng(71)
    y = rng.integers(0, 3, 200)
    labels = rng.integers(0, 3, size=(4, 200))  # four seeds: ties are frequent
    report = classification_report(y, 3, labels=labels)
    # reference: scipy.stats.mode returns the smallest of tied modes
    vote = stats.mode(labels, axis=0).mode
    assert report.ensemble["accuracy"] == pytest.approx(metrics.accuracy_score(y, vote))
    assert report.ensemble["f1_macro"] == pytest.approx(
        metrics.f1_score(y, vote, average="macro"), rel=RTOL)
    assert set(report.bias_variance) == {"zero_one"}
    assert "log_loss" not in report.scores
    assert report.details["label_source"] == "given"


def test_flags_use_the_class_frequency_baseline():
    rng = np.random.default_rng(72)
    y = rng.integers(0, 2, 400)
    y_train = rng.integers(0, 2, 300)
    freq = np.bincount(y_train, minlength=2) / 300
    # a model that only learned the training class frequencies: underfit, critically
    probs = np.tile(freq, (400, 1))
    train_probs = np.tile(freq, (300, 1))
    report = classification_report(
        y, 2, probabilities=probs, train_y_true=y_train, train_probabilities=train_probs
    )
    underfit = [f for f in report.flags if f.code == "underfit"]
    assert underfit and underfit[0].severity == "critical"
    # reference: sklearn.metrics.log_loss of the frequency predictor
    assert underfit[0].evidence["baseline_test_loss"] == pytest.approx(
        metrics.log_loss(y, probs), rel=1e-12)
    # near-perfect on train, coin flips on test: a generalization gap
    p_train = np.where(y_train == 1, 0.99, 0.01)
    p_test = rng.random(400)
    gap = classification_report(
        y, 2, probabilities=np.stack([1 - p_test, p_test], 1),
        train_y_true=y_train, train_probabilities=np.stack([1 - p_train, p_train], 1),
    )
    assert any(f.code == "generalization_gap" for f in gap.flags)


def test_lower_is_better_names_exist_in_reports():
    rng = np.random.default_rng(73)
    y, probs, _ = _random_task(rng, 50, 1, 2)
    report = classification_report(y, 2, probabilities=probs)
    assert LOWER_IS_BETTER <= set(report.scores)


def test_input_errors_name_the_field():
    y = np.array([0, 1, 1])
    with pytest.raises(ScoringInputError, match="labels: give labels"):
        classification_report(y, 2)
    with pytest.raises(ScoringInputError, match="labels"):
        classification_report(y, 2, labels=np.array([0, 1, 2]))
    with pytest.raises(ScoringInputError, match="probabilities"):
        classification_report(y, 2, probabilities=np.array([[0.5, 0.5]] * 2))
    with pytest.raises(ScoringInputError, match="seeds"):
        classification_report(
            y, 2, labels=np.zeros((2, 3), int), probabilities=np.full((3, 3, 2), 0.5)
        )
    with pytest.raises(ScoringInputError, match="n_classes"):
        classification_report(y, 1, labels=y)
    with pytest.raises(ScoringInputError, match="train_sample_weight"):
        classification_report(y, 2, labels=y, train_y_true=y, train_labels=y,
                              train_sample_weight=np.ones(2))
    with pytest.raises(ScoringInputError, match="train_y_true"):
        classification_report(y, 2, labels=y, train_labels=y)


# ------------------------------------------------------------------ property tests


@st.composite
def _tasks(draw):
    n_classes = draw(st.sampled_from([2, 3]))
    n = draw(st.integers(min_value=2, max_value=60))
    k = draw(st.integers(min_value=1, max_value=3))
    seed = draw(st.integers(min_value=0, max_value=2**32 - 1))
    weighted = draw(st.booleans())
    rng = np.random.default_rng(seed)
    probs = rng.dirichlet(np.ones(n_classes), size=(k, n))
    if draw(st.booleans()):
        probs = np.round(probs, 1)
        probs /= probs.sum(axis=2, keepdims=True)
    y = rng.integers(0, n_classes, n)
    w = rng.random(n) + 0.1 if weighted else None
    return y, probs, w, n_classes, rng


def _assert_reports_close(a, b, *, ensemble=True):
    assert a.scores.keys() == b.scores.keys()
    for name in a.scores:
        np.testing.assert_allclose(b.scores[name], a.scores[name], rtol=1e-9, atol=1e-12,
                                   equal_nan=True, err_msg=name)
        ia, ib = a.intervals[name], b.intervals[name]
        assert ia.method == ib.method, name
        np.testing.assert_allclose([ib.low, ib.high], [ia.low, ia.high], rtol=1e-9,
                                   atol=1e-12, equal_nan=True, err_msg=name)
    for name in a.ensemble if ensemble else ():
        np.testing.assert_allclose(b.ensemble[name], a.ensemble[name], rtol=1e-9, atol=1e-12,
                                   equal_nan=True, err_msg=name)
    for name in a.bias_variance:
        np.testing.assert_allclose(b.bias_variance[name].expected_loss,
                                   a.bias_variance[name].expected_loss, rtol=1e-9, atol=1e-12)


_FAST = ScoringOptions(n_resamples=200)


@settings(max_examples=25, derandomize=True, deadline=None)
@given(_tasks())
def test_permuting_rows_changes_nothing(task):
    y, probs, w, n_classes, rng = task
    perm = rng.permutation(y.size)
    base = classification_report(y, n_classes, probabilities=probs, sample_weight=w,
                                 options=_FAST)
    moved = classification_report(
        y[perm], n_classes, probabilities=probs[:, perm],
        sample_weight=None if w is None else w[perm], options=_FAST,
    )
    _assert_reports_close(base, moved)
    np.testing.assert_allclose(
        moved.details["confusion_matrix"], base.details["confusion_matrix"], rtol=1e-12
    )


@settings(max_examples=25, derandomize=True, deadline=None)
@given(_tasks())
def test_reordering_seeds_changes_no_headline_metric(task):
    y, probs, w, n_classes, rng = task
    order = rng.permutation(probs.shape[0])
    base = classification_report(y, n_classes, probabilities=probs, sample_weight=w,
                                 options=_FAST)
    moved = classification_report(y, n_classes, probabilities=probs[order], sample_weight=w,
                                  options=_FAST)
    # Headline metrics only: the ensemble's mean probability is a floating-point sum whose
    # last bit depends on the seed order, and a rank metric of that mean (AUC) turns a tie
    # that holds in exact arithmetic into a one-ulp order either way.
    _assert_reports_close(base, moved, ensemble=False)
