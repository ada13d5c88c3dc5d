"""What each role sees of a submission: feedback, reserve and full views, and the guards.

References: the scoring core (``regression_report``, ``classification_report``,
``complexity_sweep``) called on the holdout's rows sliced by the stored split (recomputed
from the split seed with ``service.scoring.split.feedback_mask``); scikit-learn's
``mean_squared_error`` and ``accuracy_score`` for headline numbers; scipy.stats for the
Ladder's paired test (``ttest_rel``) and the ``feedback_tuned`` Welch test (``ttest_ind``);
Blum & Hardt 2015 (the Ladder) for what a non-improving submission is told.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from apidata import (
    BINARY_CLASSES,
    classification_body,
    probability_submission,
    register,
    regression_body,
    regression_submission,
)
from guarddata import REPORT_KEYS, as_json, assert_close, holdout_mask, keys
from scipy import stats
from sklearn.metrics import accuracy_score, mean_squared_error

from service.scoring.classification import classification_report
from service.scoring.guard import round_nested
from service.scoring.regression import regression_report, regression_row_losses
from service.scoring.sweep import SweepInput, complexity_sweep

NOT_IMPROVED = (
    "did not beat your group's best by the required margin; the best is reported unchanged"
)


def _submit(user: Any, holdout_id: str, body: dict[str, Any]) -> dict[str, Any]:
    r = user.post(f"/v1/holdouts/{holdout_id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    return r.get_json()


def _with_predictions(holdout: Any, body: dict[str, Any], preds: np.ndarray) -> dict[str, Any]:
    """``body`` with predictions (K, n) in holdout order written in the body's id order."""
    index = {row_id: i for i, row_id in enumerate(holdout.ids)}
    order = [index[i] for i in body["ids"]]
    return {**body, "predictions": preds[:, order].tolist()}


def test_owner_views_are_the_core_on_each_slice(options: Any, owner: Any, submitter: Any) -> None:
    h = register(owner, regression_body("views"))
    mask = holdout_mask(owner, h)
    y = np.asarray(h.y)
    rng = np.random.default_rng(3)
    train_y = rng.normal(size=40) * 1000.0
    train_p = train_y + rng.normal(scale=100.0, size=(2, 40))
    body, preds = regression_submission(
        h, n_seeds=2, train={"y_true": train_y.tolist(), "predictions": train_p.tolist()}
    )
    out = _submit(submitter, h.id, body)
    full = owner.get(f"/v1/submissions/{out['id']}").get_json()
    assert full["slice"] == "full" and set(full["views"]) == {"feedback", "reserve", "full"}
    for name, rows in (("feedback", mask), ("reserve", ~mask), ("full", np.ones_like(mask))):
        # reference: the scoring core on the same rows (training rows unchanged)
        report = regression_report(
            y[rows],
            preds[:, rows],
            train_y_true=train_y,
            train_predictions=train_p,
            options=options,
        )
        view = full["views"][name]
        assert view["slice"] == name and view["n_rows"] == int(rows.sum())
        expected = as_json(report)
        for key in REPORT_KEYS:
            assert_close(view[key], expected[key], key)
        # reference: sklearn.metrics.mean_squared_error, averaged over seeds
        mse = np.mean([mean_squared_error(y[rows], p[rows]) for p in preds])
        assert view["scores"]["mse"] == pytest.approx(mse, rel=1e-12)
        assert view["primary_value"] == pytest.approx(math.sqrt(mse), rel=1e-12)
    # The top level is the full view for owners.
    for key in REPORT_KEYS:
        assert full[key] == full["views"]["full"][key]


def test_classification_split_is_stratified(options: Any, owner: Any, submitter: Any) -> None:
    h = register(owner, classification_body("strata"))
    classes = h.response["classes"]
    y = np.array([classes.index(v) for v in h.y])
    mask = holdout_mask(owner, h, strata=y)
    # Each class is split in proportion: within one row of 0.3 of its rows, at least one row
    # on each side (the rule documented in service.scoring.split).
    for c in range(len(classes)):
        n_c = int((y == c).sum())
        assert abs(int(mask[y == c].sum()) - 0.3 * n_c) < 1.0
        assert 1 <= int(mask[y == c].sum()) <= n_c - 1
    body, probs = probability_submission(h)
    labels = probs.argmax(axis=2)
    out = _submit(submitter, h.id, {**body, "predictions": None})
    view = owner.get(f"/v1/submissions/{out['id']}").get_json()["views"]["feedback"]
    # reference: the core on the feedback rows; sklearn.metrics.accuracy_score per seed
    report = classification_report(
        y[mask], len(classes), probabilities=probs[:, mask, :], options=options
    )
    for key in REPORT_KEYS:
        assert_close(view[key], as_json(report)[key], key)
    assert view["scores"]["accuracy"] == pytest.approx(
        np.mean([accuracy_score(y[mask], lab[mask]) for lab in labels]), rel=1e-12
    )


@pytest.mark.parametrize("guard", ["none", "rounded", "ladder"])
def test_submitters_see_the_feedback_view_through_the_guard(
    owner: Any, submitter: Any, guard: str
) -> None:
    policy = {"guard": guard, "decimals": 3}
    h = register(owner, {**regression_body(f"guard-{guard}"), "policy": policy})
    body, _ = regression_submission(h)
    out = _submit(submitter, h.id, body)
    feedback = owner.get(f"/v1/submissions/{out['id']}").get_json()["views"]["feedback"]
    shown = feedback if guard == "none" else round_nested(feedback, 3)
    assert out["slice"] == "feedback" and out["views"] == {}
    assert out["n_rows"] == feedback["n_rows"] < len(h.ids)
    assert out["primary_value"] == shown["primary_value"]
    single_row = {"max_error", "median_absolute_error"}  # owner-only, whatever the guard
    for key in ("scores", "intervals", "seed_spread", "ensemble"):
        assert out[key] == {k: v for k, v in shown[key].items() if k not in single_row}
    assert out["bias_variance"] == shown["bias_variance"] and out["flags"] == shown["flags"]
    assert out["guard"]["kind"] == guard
    assert out["guard"]["decimals"] == (None if guard == "none" else 3)
    if guard == "ladder":
        assert out["guard"]["improved"] is True and out["guard"]["best_submission_id"] == out["id"]
    else:
        assert out["guard"]["improved"] is None and out["guard"]["best_submission_id"] is None


def _squared(y: np.ndarray, preds: np.ndarray) -> np.ndarray:
    # reference: the per-row squared error of the seed-averaged loss, as the core stores it
    return regression_row_losses(y, preds)


def test_a_ladder_without_improvement_reports_the_best_unchanged(
    owner: Any, submitter: Any
) -> None:
    h = register(owner, regression_body("ladder"))
    mask = holdout_mask(owner, h)
    y = np.asarray(h.y)
    rng = np.random.default_rng(21)
    body, _ = regression_submission(h, n_seeds=1)
    # The first; a clearly worse one; a clearly better one; the better one made worse. The
    # decisions are far from the margin whatever the random split (paired t beyond +-3).
    scales = [500.0, 750.0, 100.0, 100.0]
    preds = [y + rng.normal(scale=s, size=(1, y.size)) for s in scales]
    preds[3] = preds[2] + rng.normal(scale=200.0, size=(1, y.size))
    outs = [_submit(submitter, h.id, _with_predictions(h, body, p)) for p in preds]

    best_index, best = 0, outs[0]
    for i in range(1, 4):
        prev = _squared(y[mask], preds[best_index][:, mask])
        new = _squared(y[mask], preds[i][:, mask])
        # reference: scipy.stats.ttest_rel(alternative="less"): the parameter-free Ladder
        # accepts when the paired t statistic of new - best is below -1 (Blum & Hardt 2015).
        t = stats.ttest_rel(new, prev, alternative="less").statistic
        improved = bool(t < -1.0)
        out = outs[i]
        assert out["guard"]["kind"] == "ladder" and out["guard"]["improved"] is improved
        if improved:
            best_index, best = i, out
            assert out["guard"]["best_submission_id"] == out["id"]
        else:
            assert out["guard"]["message"] == NOT_IMPROVED
            assert out["guard"]["best_submission_id"] == best["id"]
            # Every number is the best's: nothing of this submission's feedback slice shows.
            for key in ("primary_value", *REPORT_KEYS, "n_rows"):
                assert out[key] == best[key], key
            assert out["guard"]["reported_loss"] == best["guard"]["reported_loss"]
        assert not {"threshold", "raw_loss", "best_loss"} & keys(out)
    assert [o["guard"]["improved"] for o in outs] == [True, False, True, False]
    # The same view when the submitter reads it again, and in the listing.
    again = submitter.get(f"/v1/submissions/{outs[1]['id']}").get_json()
    assert again == outs[1]
    listing = submitter.get(f"/v1/holdouts/{h.id}/submissions").get_json()["submissions"]
    assert [s["primary_value"] for s in listing] == [o["primary_value"] for o in outs]
    assert [s["guard"] for s in listing] == [o["guard"] for o in outs]
    # Owners see each submission's own numbers.
    own = owner.get(f"/v1/submissions/{outs[1]['id']}").get_json()
    assert own["views"]["feedback"]["primary_value"] != own["views"]["reserve"]["primary_value"]
    expected = math.sqrt(np.mean(_squared(y[mask], preds[1][:, mask])))
    assert own["views"]["feedback"]["primary_value"] == pytest.approx(expected, rel=1e-12)


def _probe_send(user: Any, h: Any, task: str, pred: np.ndarray) -> dict[str, Any]:
    values = [BINARY_CLASSES[v] for v in pred] if task == "binary" else pred.tolist()
    return _submit(user, h.id, {"model": "probe", "ids": h.ids, "predictions": values})


def _probe_setup(owner: Any, guard: str, task: str) -> tuple[Any, np.ndarray, list[np.ndarray]]:
    """A holdout, the base predictions, and the base moved on one row for two feedback rows
    whose labels differ (binary: one of each class; regression: lowest and highest target)."""
    policy = {"guard": guard, "feedback_fraction": 0.5}
    if task == "binary":
        body = classification_body(f"probe-{guard}", n=200, classes=BINARY_CLASSES, seed=5)
        h = register(owner, {**body, "policy": policy})
        y = np.array([BINARY_CLASSES.index(v) for v in h.y])
        mask = holdout_mask(owner, h, strata=y)
        base = np.random.default_rng(8).integers(0, 2, y.size)
        rows = [int(np.flatnonzero(mask & (y == c))[0]) for c in (0, 1)]
        base[rows] = 0  # the same prediction on both rows, so only the labels differ
    else:
        h = register(owner, {**regression_body(f"probe-{guard}", n=200, seed=5), "policy": policy})
        y = np.asarray(h.y)
        mask = holdout_mask(owner, h)
        base = y + np.random.default_rng(8).normal(scale=300.0, size=y.size)
        feedback_rows = np.flatnonzero(mask)
        order = np.argsort(y[mask])
        rows = [int(feedback_rows[order[0]]), int(feedback_rows[order[-1]])]
    moved = []
    for row in rows:
        pred = base.copy()
        if task == "binary":
            pred[row] = 1 - pred[row]
        else:
            pred[row] += 1e4  # far: the score's change depends on the row's target
        moved.append(pred)
    return h, base, moved


@pytest.mark.parametrize("task", ["binary", "regression"])
def test_a_one_row_probe_reads_no_label_under_the_ladder(
    owner: Any, make_user: Any, task: str
) -> None:
    # A group moves one prediction far and watches the reported score, on two feedback rows
    # whose labels differ. Under the Ladder the answer is the same for both rows (the best,
    # unchanged); under guard none the two moves show different changes, so the probe is
    # real. Source: Blum & Hardt 2015; a one-row change equals the Ladder's threshold exactly
    # and is rejected (tests/scoring/test_boosting_attack.py runs the same probe on the core).
    answers: dict[str, list[dict[str, Any]]] = {}
    for guard in ("ladder", "none"):
        user = make_user("submitter", f"probe-{guard}")
        h, base, moved = _probe_setup(owner, guard, task)
        answers[guard] = [_probe_send(user, h, task, p) for p in (base, *moved)]
    first, *probes = answers["ladder"]
    for out in probes:
        assert out["guard"]["improved"] is False
        assert out["primary_value"] == first["primary_value"]
        for key in REPORT_KEYS:
            assert out[key] == first[key]
    first, *probes = answers["none"]
    changes = [p["primary_value"] - first["primary_value"] for p in probes]
    if task == "binary":
        assert changes[0] * changes[1] < 0  # one label 0, one label 1: opposite moves
    else:
        assert changes[0] != 0 and changes[1] != 0 and changes[0] != changes[1]


def test_standings_by_role(owner: Any, make_user: Any) -> None:
    h = register(owner, {**regression_body("table"), "policy": {"guard": "rounded"}})
    mask = holdout_mask(owner, h)
    y = np.asarray(h.y)
    groups = {"ga": 200.0, "gb": 600.0}
    users = {g: make_user("submitter", g) for g in groups}
    preds = {}
    for g, scale in groups.items():
        body, _ = regression_submission(h, n_seeds=1, seed=len(g))
        p = y + np.random.default_rng(int(scale)).normal(scale=scale, size=(1, y.size))
        preds[g] = p
        _submit(users[g], h.id, _with_predictions(h, body, p))
    seen = users["ga"].get(f"/v1/holdouts/{h.id}/standings").get_json()
    table = owner.get(f"/v1/holdouts/{h.id}/standings").get_json()
    assert seen["slice"] == table["slice"] == "feedback" and seen["guard"] == "rounded"
    assert (
        [e["group"] for e in table["entries"]]
        == ["ga", "gb"]
        == [e["group"] for e in seen["entries"]]
    )
    for mine, full in zip(seen["entries"], table["entries"], strict=True):
        g = full["group"]
        losses = _squared(y, preds[g])
        # reference: the feedback and reserve RMSE written out with numpy
        fb = math.sqrt(losses[mask].mean())
        rs = math.sqrt(losses[~mask].mean())
        assert full["value"] == pytest.approx(fb, rel=1e-12)
        assert full["reserve_value"] == pytest.approx(rs, rel=1e-12)
        assert mine["value"] == round(full["value"], 4)
        assert mine["reserve_value"] is None and mine["reserve_interval"] is None
        assert mine["feedback_tuned"] is None
        tuned = full["feedback_tuned"]
        # reference: scipy.stats.ttest_ind(equal_var=False, alternative="less") on the
        # feedback vs reserve per-row losses of the group's best submission
        ref = stats.ttest_ind(losses[mask], losses[~mask], equal_var=False, alternative="less")
        assert tuned["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
        assert tuned["flagged"] == (ref.pvalue < 0.01) and tuned["loss"] == "squared"
        assert (mine["submission_id"] is None) == (g != "ga")
    assert seen["final"] is None and table["final"] is None and table["closed_at"] is None


@pytest.mark.parametrize("guard", ["ladder", "none"])
def test_submitter_sweeps_use_the_feedback_rows(
    options: Any, owner: Any, submitter: Any, guard: str
) -> None:
    h = register(owner, {**regression_body(f"sweep-{guard}"), "policy": {"guard": guard}})
    mask = holdout_mask(owner, h)
    y = np.asarray(h.y)
    ids = []
    expected_points = []
    for complexity, scale in ((1, 800.0), (2, 300.0), (3, 320.0), (4, 700.0)):
        body, preds = regression_submission(h, seed=complexity, n_seeds=2)
        preds = y + (preds - y) * scale / 300.0
        body = _with_predictions(h, body, preds)
        body["sweep"] = {"name": "depth", "complexity": complexity}
        out = _submit(submitter, h.id, body)
        ids.append(out["id"])
        improved = out["guard"]["improved"]
        if guard == "ladder" and not improved:
            continue
        # reference: the core's decomposition and row losses on the feedback rows
        report = regression_report(y[mask], preds[:, mask], options=options)
        expected_points.append(
            SweepInput(
                float(complexity),
                regression_row_losses(y[mask], preds[:, mask]),
                report.bias_variance["squared"].bias,
                report.bias_variance["squared"].variance,
            )
        )
    path = f"/v1/holdouts/{h.id}/sweeps/depth"
    out = submitter.get(path).get_json()
    expected = as_json(complexity_sweep(expected_points, loss="squared"))
    assert out["slice"] == "feedback"
    assert out["n_withheld"] == 4 - len(expected_points)
    if guard == "ladder":
        assert out["n_withheld"] >= 1  # the worse depths did not beat the best
    numbers = ("test_loss", "test_loss_se", "bias", "variance")
    for got, want in zip(out["points"], expected["points"], strict=True):
        assert got["complexity"] == want["complexity"] and got["region"] == want["region"]
        for k in numbers:
            shown = want[k] if guard == "none" else round(want[k], 4)
            assert got[k] == pytest.approx(shown, rel=1e-9, abs=1e-12), k
    assert out["best_complexity"] == expected["best_complexity"]
    # The reserve is sealed for submitters until close; owners may read any slice.
    r = submitter.get(f"{path}?slice=reserve")
    assert r.status_code == 422 and r.get_json()["errors"][0]["field"] == "slice"
    reserve = owner.get(f"{path}?group=g1&slice=reserve").get_json()
    assert reserve["slice"] == "reserve" and reserve["n_withheld"] == 0
    assert len(reserve["points"]) == 4
