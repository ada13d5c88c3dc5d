"""The feedback/reserve split: proportions, stratification, determinism, validation."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.model_selection import train_test_split

from service.scoring import ScoringInputError
from service.scoring.split import feedback_counts, feedback_mask

SETTINGS = settings(max_examples=60, derandomize=True, deadline=None)

fractions_ = st.floats(min_value=0.01, max_value=0.99, allow_nan=False)


@SETTINGS
@given(n=st.integers(1, 500), f=fractions_, seed=st.integers(0, 2**32))
def test_unstratified_size_is_rounded_share(n: int, f: float, seed: int) -> None:
    mask = feedback_mask(n, feedback_fraction=f, seed=seed)
    assert mask.dtype == np.bool_ and mask.shape == (n,)
    share = f * n
    # common practice: the count is the exact share rounded, so within half a row of it
    # (or the nearest count that leaves a row on each side once n >= 2).
    if n >= 2:
        assert 1 <= mask.sum() <= n - 1
        if 1 <= share <= n - 1:
            assert abs(mask.sum() - share) <= 0.5 + 1e-9
    else:
        assert abs(mask.sum() - share) <= 0.5 + 1e-9


@SETTINGS
@given(
    f=st.sampled_from([0.1, 0.2, 0.25, 0.3, 0.4, 0.5, 0.6, 0.7, 0.75, 0.8, 0.9]),
    multiple=st.integers(1, 40),
    seed=st.integers(0, 1000),
)
def test_exact_decimal_shares_are_hit_exactly(f: float, multiple: int, seed: int) -> None:
    # The exact share of a decimal fraction, by exact decimal arithmetic (common practice):
    # 0.3 of 10 rows is 3 rows, although 0.3 * 10 == 3.0000000000000004 in binary.
    n = Fraction(str(f)).denominator * multiple
    exact = Fraction(str(f)) * n
    assert exact.denominator == 1
    mask = feedback_mask(n, feedback_fraction=f, seed=seed)
    assert mask.sum() == exact


@st.composite
def class_arrays(draw: st.DrawFn) -> np.ndarray:
    n_classes = draw(st.integers(1, 6))
    sizes = draw(st.lists(st.integers(1, 60), min_size=n_classes, max_size=n_classes))
    labels = np.repeat(np.arange(n_classes), sizes)
    perm = np.random.default_rng(draw(st.integers(0, 2**16))).permutation(labels.size)
    return labels[perm]


@SETTINGS
@given(strata=class_arrays(), f=fractions_, seed=st.integers(0, 2**32))
def test_stratified_per_class_counts(strata: np.ndarray, f: float, seed: int) -> None:
    mask = feedback_mask(strata.size, feedback_fraction=f, seed=seed, strata=strata)
    for c in np.unique(strata):
        rows = strata == c
        n_c = int(rows.sum())
        k_c = int(mask[rows].sum())
        # reference: the per-class proportions of
        # sklearn.model_selection.train_test_split(stratify=...): each class's count within
        # one row of its exact share
        assert abs(k_c - f * n_c) <= 1 + 1e-9
        if n_c >= 2:
            assert 1 <= k_c <= n_c - 1


def test_stratified_counts_match_sklearn_train_test_split() -> None:
    # reference: sklearn.model_selection.train_test_split(test_size=f, stratify=y); its
    # test side plays our feedback slice. sklearn rounds the train side first and can land
    # slightly more than one row from a class's exact share, so the criterion is the exact
    # share (within one row) and agreement with sklearn within one row per class.
    rng = np.random.default_rng(20_150_216)
    checked = 0
    for case in range(400):
        n = int(rng.integers(6, 300))
        n_classes = int(rng.integers(2, 7))
        f = float(rng.uniform(0.05, 0.95))
        y = rng.integers(0, n_classes, n)
        sizes = np.bincount(y, minlength=n_classes)
        if (sizes < 2).any() or math.ceil(f * n) < n_classes or n - math.ceil(f * n) < n_classes:
            continue  # sklearn refuses these splits
        _, test_rows = train_test_split(np.arange(n), test_size=f, stratify=y, random_state=case)
        theirs = np.bincount(y[test_rows], minlength=n_classes)
        mask = feedback_mask(n, feedback_fraction=f, seed=case, strata=y)
        ours = np.bincount(y[mask], minlength=n_classes)
        assert np.all(np.abs(ours - f * sizes) <= 1 + 1e-9), (sizes, f, ours)
        assert np.all(np.abs(ours - theirs) <= 1), (sizes, f, ours, theirs)
        assert abs(int(ours.sum()) - len(test_rows)) <= 1
        checked += 1
    assert checked > 200


def test_counts_total_is_closest_to_target_when_every_class_needs_a_row() -> None:
    # Ten classes of two rows at 10 %: the target total is 2 rows, but every class keeps a
    # row on each side, so each class gets exactly one (module docstring, step 5).
    counts = feedback_counts(np.full(10, 2), feedback_fraction=0.1)
    assert counts.tolist() == [1] * 10


@SETTINGS
@given(strata=class_arrays(), f=fractions_, seed=st.integers(0, 2**32))
def test_same_arguments_same_mask(strata: np.ndarray, f: float, seed: int) -> None:
    a = feedback_mask(strata.size, feedback_fraction=f, seed=seed, strata=strata)
    b = feedback_mask(strata.size, feedback_fraction=f, seed=seed, strata=strata.tolist())
    np.testing.assert_array_equal(a, b)


def test_different_seeds_give_different_masks() -> None:
    masks = {feedback_mask(1000, feedback_fraction=0.3, seed=s).tobytes() for s in range(20)}
    # 20 draws from C(1000, 300) masks: a collision has negligible probability.
    assert len(masks) == 20


def test_string_labels_stratify_like_their_indices() -> None:
    rng = np.random.default_rng(7)
    idx = rng.integers(0, 3, 200)
    names = np.array(["cat", "dog", "eel"])[idx]
    a = feedback_mask(200, feedback_fraction=0.3, seed=11, strata=idx)
    b = feedback_mask(200, feedback_fraction=0.3, seed=11, strata=names)
    np.testing.assert_array_equal(a, b)


def test_every_row_equally_likely_in_the_feedback_slice() -> None:
    # Over many seeds each of 10 rows should be in the feedback slice equally often.
    # reference: scipy.stats.chisquare against equal expected counts
    n, seeds = 10, 3000
    hits = np.zeros(n)
    for seed in range(seeds):
        hits += feedback_mask(n, feedback_fraction=0.3, seed=seed)
    assert hits.sum() == 3 * seeds
    result = stats.chisquare(hits)
    assert result.pvalue > 1e-4


def test_stratified_rows_uniform_within_class() -> None:
    # reference: scipy.stats.chisquare; within each class every row is equally likely.
    strata = np.array([0] * 6 + [1] * 4)
    hits = np.zeros(10)
    for seed in range(3000):
        hits += feedback_mask(10, feedback_fraction=0.5, seed=seed, strata=strata)
    assert stats.chisquare(hits[:6]).pvalue > 1e-4
    assert stats.chisquare(hits[6:]).pvalue > 1e-4


@pytest.mark.parametrize("bad", [0.0, 1.0, -0.1, 1.5, math.nan, math.inf, "0.3x", None])
def test_fraction_outside_open_unit_interval_is_refused(bad: object) -> None:
    with pytest.raises(ScoringInputError) as err:
        feedback_mask(10, feedback_fraction=bad, seed=0)  # type: ignore[arg-type]
    assert err.value.field == "feedback_fraction"


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"n_rows": 0}, "n_rows"),
        ({"n_rows": 2.5}, "n_rows"),
        ({"n_rows": True}, "n_rows"),
        ({"seed": -1}, "seed"),
        ({"strata": np.zeros(9, dtype=int)}, "strata"),
        ({"strata": np.array([0.0] * 9 + [math.nan])}, "strata"),
    ],
)
def test_bad_arguments_name_the_field(kwargs: dict[str, object], field: str) -> None:
    args: dict[str, object] = {"n_rows": 10, "feedback_fraction": 0.3, "seed": 0}
    args.update(kwargs)
    with pytest.raises(ScoringInputError) as err:
        feedback_mask(**args)  # type: ignore[arg-type]
    assert err.value.field == field
