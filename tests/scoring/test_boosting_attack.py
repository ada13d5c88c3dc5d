"""Attacks on a reused holdout, run through the guards in pure numpy.

1. The boosting attack of Blum & Hardt 2015 ("The Ladder: A Reliable Leaderboard for
   Machine Learning Competitions", ICML; arXiv 1502.04585), as summarised in
   REFERENCES.md and run in the authors' reference code (mrtzh/Ladder.jl,
   ``examples/attacks.jl``, ``boostingattack``).
2. A one-row probe: change one prediction and watch the reported score.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from service.scoring.guard import (
    LadderState,
    adaptive_overfit_test,
    ladder_step,
    rounded_guard,
)

N_ROWS = 4000  # feedback rows (the paper's holdout size for this figure)
N_QUERIES = 400  # random submissions (the paper's k)
DECIMALS = 5  # unguarded scores reported to 5 decimals, as in the paper's attack
SEEDS = (0, 1, 2, 3, 4)  # five runs, as the paper's "mean of 5 runs"


def _zero_one(pred: np.ndarray, labels: np.ndarray) -> np.ndarray:
    return (pred != labels).astype(np.float64)


def _majority(vectors: np.ndarray) -> np.ndarray:
    # Majority vote of the kept {0,1} vectors, ties to 1 (as the authors' reference code:
    # U * b .>= count / 2). With nothing kept every row votes 1: a chance-level guess.
    return (vectors.sum(axis=0) >= vectors.shape[0] / 2).astype(np.int64)


def _attack(seed: int) -> dict[str, float]:
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, 2, N_ROWS)  # the feedback slice's binary labels
    fresh = rng.integers(0, 2, N_ROWS)  # fresh rows, simulating the sealed reserve
    queries = rng.integers(0, 2, (N_QUERIES, N_ROWS))

    kept_unguarded: list[int] = []
    kept_ladder: list[int] = []
    state, best = LadderState(), None
    for i, pred in enumerate(queries):
        losses = _zero_one(pred, labels)
        # Unguarded: keep a vector whose reported loss is better than chance.
        if rounded_guard(float(losses.mean()), DECIMALS) < 0.5:
            kept_unguarded.append(i)
        # Ladder: keep the first vector if its report is below 0.5, then every vector that
        # lowered the reported score (the authors' reference code, ``boostingattack``).
        first = state.reported is None
        decision, state = ladder_step(losses, best, state)
        if decision.improved:
            best = losses
            if not first or decision.reported_loss < 0.5:
                kept_ladder.append(i)

    unguarded = _majority(queries[kept_unguarded])
    guarded = _majority(queries[kept_ladder])
    return {
        "unguarded_feedback": float(_zero_one(unguarded, labels).mean()),
        "unguarded_fresh": float(_zero_one(unguarded, fresh).mean()),
        "guarded_feedback": float(_zero_one(guarded, labels).mean()),
        "guarded_fresh": float(_zero_one(guarded, fresh).mean()),
        "tuned_p_value": adaptive_overfit_test(
            _zero_one(unguarded, labels), _zero_one(unguarded, fresh)
        )["p_value"],
        "n_kept_unguarded": float(len(kept_unguarded)),
        "n_kept_ladder": float(len(kept_ladder)),
    }


@pytest.fixture(scope="module")
def runs() -> list[dict[str, float]]:
    return [_attack(seed) for seed in SEEDS]


def _mean(runs: list[dict[str, float]], key: str) -> float:
    return float(np.mean([r[key] for r in runs]))


def test_boosting_attack_overfits_an_unguarded_holdout(runs: list[dict[str, float]]) -> None:
    # Source: Blum & Hardt 2015, boosting attack figure, n = 4000, k = 400, 5 decimals,
    # mean of 5 runs (REFERENCES.md: "about 0.43 unguarded ... 0.50 on fresh rows"; the
    # authors' published result table for this setting has 0.42745 at k = 400).
    # Bounds: one run's loss on 4000 rows has binomial sd sqrt(0.25 / 4000) ~ 0.0079, the
    # mean of 5 runs ~ 0.0035 (more spread comes from how many vectors are kept). We allow
    # +-0.03 around the paper's 0.43 and 0.50 (about 8 sd of the 5-run mean): wide for the
    # draw, yet no run at chance level (0.5) could land inside the unguarded interval.
    # Measured with these seeds: 0.427 unguarded, 0.503 fresh (see the final report).
    assert 0.40 <= _mean(runs, "unguarded_feedback") <= 0.46
    assert 0.47 <= _mean(runs, "unguarded_fresh") <= 0.53
    # About half of the random vectors beat chance and are kept.
    assert 0.4 * N_QUERIES <= _mean(runs, "n_kept_unguarded") <= 0.6 * N_QUERIES


def test_boosting_attack_is_held_off_by_the_ladder(runs: list[dict[str, float]]) -> None:
    # Source: the same figure: the parameter-free Ladder's curve stays about 0.48 (csv:
    # 0.48425 at k = 400). Bound: 0.48 - 0.02 (about 6 sd of a 5-run mean, sd ~ 0.0035).
    # The gap to the unguarded attack in the paper is 0.057; we require at least 0.03
    # (the sd of the difference of two 5-run means is about 0.005).
    # Measured with these seeds: 0.484 guarded, 0.505 fresh.
    guarded = _mean(runs, "guarded_feedback")
    assert guarded >= 0.46
    assert guarded - _mean(runs, "unguarded_feedback") >= 0.03
    assert 0.47 <= _mean(runs, "guarded_fresh") <= 0.53


def test_feedback_tuned_flag_catches_the_unguarded_attack(runs: list[dict[str, float]]) -> None:
    # The unguarded combined vector is ~0.07 better on the feedback rows than on fresh rows,
    # about 6 standard errors (sd of a difference of two means on 4000 rows ~ 0.011), so
    # the one-sided Welch test flags every run at the default alpha 0.01.
    assert all(r["tuned_p_value"] < 0.01 for r in runs)


# ---------------------------------------------------------------- one-row probe


def _probe_reports(
    labels: np.ndarray,
    base: np.ndarray,
    moved: np.ndarray,
    loss: Callable[[np.ndarray, np.ndarray], np.ndarray],
) -> tuple[float, float, bool]:
    """Submit ``base`` then ``base`` with one row moved; return both reports and improved."""
    base_losses = loss(base, labels)
    first, state = ladder_step(base_losses, None, LadderState())
    probe_losses = loss(moved, labels)
    decision, _ = ladder_step(probe_losses, base_losses, state)
    return first.reported_loss, decision.reported_loss, decision.improved


def test_one_row_probe_recovers_no_binary_label_under_the_ladder() -> None:
    # A group flips its prediction on one row and watches the reported zero-one loss.
    # Unguarded (5 decimals) the score moves by +-1/4000 = 0.00025 and gives the label
    # away; under the Ladder the report does not change, whatever the row's label.
    rng = np.random.default_rng(42)
    labels = rng.integers(0, 2, N_ROWS)
    base = rng.integers(0, 2, N_ROWS)
    for row in rng.choice(N_ROWS, size=200, replace=False):
        moved = base.copy()
        moved[row] = 1 - moved[row]
        changes, unguarded = [], []
        for label in (0, 1):
            y = labels.copy()
            y[row] = label
            before, after, improved = _probe_reports(y, base, moved, _zero_one)
            assert not improved
            changes.append(after - before)
            unguarded.append(
                rounded_guard(float(_zero_one(moved, y).mean()), DECIMALS)
                - rounded_guard(float(_zero_one(base, y).mean()), DECIMALS)
            )
        assert changes == [0.0, 0.0]
        # The probe is a real one: without a guard the two labels give opposite moves.
        assert unguarded[0] * unguarded[1] < 0


def test_one_row_probe_recovers_no_regression_target_under_the_ladder() -> None:
    # Squared error: move one prediction far (and near) and watch the report, for several
    # candidate values of that row's target; the report never moves.
    def squared(pred: np.ndarray, y: np.ndarray) -> np.ndarray:
        return (pred - y) ** 2

    rng = np.random.default_rng(7)
    targets = rng.normal(size=500)
    base = targets + rng.normal(scale=0.8, size=500)
    for row in rng.choice(500, size=50, replace=False):
        for shift in (-100.0, -1.0, -0.01, 0.01, 1.0, 100.0):
            moved = base.copy()
            moved[row] += shift
            changes = []
            for candidate in (base[row] - 2.0, base[row], base[row] + shift, base[row] + 3.0):
                y = targets.copy()
                y[row] = candidate
                before, after, improved = _probe_reports(y, base, moved, squared)
                assert not improved
                changes.append(after - before)
            assert changes == [0.0] * 4
