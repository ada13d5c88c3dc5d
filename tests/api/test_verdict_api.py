"""Gates and verdicts through the API: policy validation, bounds, flags, comparisons with a
reference submission (checked against scipy and statsmodels on the same rows), reference
permissions, and what a submitter's verdict may show under the reuse guards.

Every API test runs on SQLite and on PostgreSQL (the ``app`` fixture's backends).
"""

from __future__ import annotations

import io
import math
from typing import Any

import numpy as np
import pytest
from apidata import Holdout, classification_body, register, regression_body
from guarddata import holdout_mask, numbers
from scipy import stats
from sklearn.datasets import load_diabetes
from sklearn.metrics import accuracy_score, mean_squared_error, r2_score
from sklearn.tree import DecisionTreeRegressor
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.weightstats import ttost_paired

from service.scoring.comparison import MCNEMAR_EXACT_BELOW

ALPHA = 0.05


# ------------------------------------------------------------------------------ helpers


def _register(owner: Any, gates: list[dict[str, Any]] | None, **policy: Any) -> Holdout:
    body = regression_body(name=f"gated-{np.random.default_rng().integers(1 << 40)}")
    body["policy"] = {**policy, **({} if gates is None else {"gates": gates})}
    return register(owner, body)


def _preds(holdout: Holdout, scale: float, seed: int, n_seeds: int = 2) -> np.ndarray:
    """Predictions (K, n) in holdout row order: the labels plus seeded normal noise."""
    rng = np.random.default_rng(seed)
    y = np.asarray(holdout.y)
    return y + rng.normal(scale=scale, size=(n_seeds, y.size))


def _body(holdout: Holdout, preds: np.ndarray, **extra: Any) -> dict[str, Any]:
    """A submission body for predictions in holdout order, ids shuffled."""
    order = np.random.default_rng(99).permutation(preds.shape[1])
    return {
        "model": extra.pop("model", "m"),
        "ids": [holdout.ids[i] for i in order],
        "predictions": preds[:, order].tolist(),
        **extra,
    }


def _submit(user: Any, holdout: Holdout, body: dict[str, Any]) -> dict[str, Any]:
    r = user.post(f"/v1/holdouts/{holdout.id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    return r.get_json()


def _row_losses(preds: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Per-row squared error averaged over seeds: what the service stores for rmse/mse
    holdouts (service.scoring.regression.regression_row_losses; DEVELOPERS.md)."""
    return ((preds - y) ** 2).mean(axis=0)


def _reason(verdict: dict[str, Any], kind: str, metric: str | None = None) -> list[dict]:
    return [
        r
        for r in verdict["reasons"]
        if r["kind"] == kind and (metric is None or r["spec"].get("metric") == metric)
    ]


def _put(user: Any, path: str, body: dict[str, Any]) -> Any:
    return user.client.put(path, json=body, headers=user._headers(None))


def _delete(user: Any, path: str) -> Any:
    return user.client.delete(path, headers=user._headers(None))


# ----------------------------------------------------------------------- gate validation


def test_bad_gates_at_registration_are_422_naming_each_field(owner: Any) -> None:
    body = regression_body(name="bad-gates")
    body["policy"] = {
        "gates": [
            {"metric": "rmsee", "op": "<=", "value": 3.2},
            {"metric": "rmse", "op": "=<", "value": 3.2},
            {"compare": "non_inferior", "metric": "rmse", "alpha": 0.05},
            {"compare": "superior", "metric": "mae", "alpha": 0.05},
            {"flag": "generalization_gap", "min_severity": "severe"},
            {"metric": "max_error", "op": "<", "value": 1},
            "rmse <= 3",
        ]
    }
    r = owner.post("/v1/holdouts", json=body)
    assert r.status_code == 422
    errors = {e["field"]: e["message"] for e in r.get_json()["errors"]}
    assert "rmse" in errors["policy.gates[0].metric"]  # the fix: the metrics allowed
    assert "'<='" in errors["policy.gates[1].op"]
    assert "required" in errors["policy.gates[2].margin"]
    # mae needs predictions; the reference keeps its per-row squared losses only
    assert "mse, rmse, r2" in errors["policy.gates[3].metric"]
    assert "'critical'" in errors["policy.gates[4].min_severity"]
    assert "residual" in errors["policy.gates[5].metric"]
    assert "JSON object" in errors["policy.gates[6]"]
    assert owner.get("/v1/holdouts").get_json()["holdouts"] == []  # nothing registered


def test_gates_are_registered_and_shown_with_the_policy(owner: Any) -> None:
    gates = [
        {"metric": "rmse", "op": "<=", "value": 3.2},
        {"metric": "variance_share", "op": "<=", "value": 0.5},
        {"flag": "generalization_gap", "min_severity": "critical"},
        {"compare": "non_inferior", "metric": "rmse", "margin": 0.05, "alpha": 0.05},
    ]
    h = _register(owner, gates)
    assert h.response["policy"]["gates"] == gates
    # the same registration again is the same holdout (gates part of the policy)
    r = owner.post("/v1/holdouts", json=h.body)
    assert r.status_code == 200 and r.get_json()["id"] == h.id
    other = {**h.body, "policy": {"gates": gates[:1]}}
    assert owner.post("/v1/holdouts", json=other).status_code == 409


def test_no_gates_is_pass_with_no_reasons(owner: Any, submitter: Any) -> None:
    h = _register(owner, None)
    out = _submit(submitter, h, _body(h, _preds(h, 300.0, 1)))
    assert out["verdict"]["status"] == "pass" and out["verdict"]["reasons"] == []
    assert out["verdict"]["based_on"] == out["id"] and out["verdicts_by_slice"] == {}
    seen = owner.get(f"/v1/submissions/{out['id']}").get_json()
    assert set(seen["verdicts_by_slice"]) == {"feedback", "reserve", "full"}
    assert {v["status"] for v in seen["verdicts_by_slice"].values()} == {"pass"}


# -------------------------------------------------------------------------------- bounds


def test_bound_gates_pass_fail_and_warn_on_the_feedback_rmse(owner: Any, submitter: Any) -> None:
    y = np.asarray(regression_body()["y_true"])
    gates = [
        {"metric": "rmse", "op": "<=", "value": 1e6},  # passes
        {"metric": "rmse", "op": "<=", "value": 1.0, "severity": "warn"},  # trips: warn
    ]
    h = _register(owner, gates, guard="none")
    preds = _preds(h, 300.0, 2)
    out = _submit(submitter, h, _body(h, preds))
    mask = holdout_mask(owner, h)
    # reference: sklearn.metrics.mean_squared_error per seed on the feedback rows; the
    # service's rmse is sqrt of the mean over seeds (DEVELOPERS.md, conventions)
    want = math.sqrt(np.mean([mean_squared_error(y[mask], p[mask]) for p in preds]))
    first, second = out["verdict"]["reasons"]
    assert first["status"] == "pass" and second["status"] == "warn"
    assert first["value"] == pytest.approx(want, rel=1e-9) == second["value"]
    assert first["gate"] == "rmse <= 1000000.0" and first["bound"] == 1e6 and first["op"] == "<="
    assert out["verdict"]["status"] == "warn" and out["verdict"]["slice"] == "feedback"

    failing = _register(owner, [*gates, {"metric": "rmse", "op": "<", "value": 2.0}], guard="none")
    out = _submit(submitter, failing, _body(failing, preds))
    assert [r["status"] for r in out["verdict"]["reasons"]] == ["pass", "warn", "fail"]
    assert out["verdict"]["status"] == "fail"
    # owners: the same gates on every slice; the full slice reads all rows
    seen = owner.get(f"/v1/submissions/{out['id']}").get_json()
    full = seen["verdicts_by_slice"]["full"]
    want_full = math.sqrt(np.mean([mean_squared_error(y, p) for p in preds]))
    assert full["reasons"][0]["value"] == pytest.approx(want_full, rel=1e-9)
    assert seen["verdict"] == out["verdict"]  # owners see what the group was told


def test_variance_share_bound_reads_the_shown_decomposition(owner: Any, submitter: Any) -> None:
    h = _register(owner, [{"metric": "variance_share", "op": "<=", "value": 0.5}], guard="none")
    out = _submit(submitter, h, _body(h, _preds(h, 300.0, 3, n_seeds=3)))
    (reason,) = out["verdict"]["reasons"]
    shown = out["bias_variance"]["squared"]["variance_share"]
    assert reason["metric"] == "bias_variance.squared.variance_share"
    assert reason["value"] == shown
    assert reason["status"] == ("pass" if shown <= 0.5 else "fail")


# -------------------------------------------------------------------------------- flags


def _diabetes_holdout(owner: Any, gates: list[dict[str, Any]]) -> tuple[Holdout, dict]:
    """scikit-learn's diabetes data: the last 150 rows are the holdout, the rest training."""
    X, y = load_diabetes(return_X_y=True)
    train_X, train_y, test_X, test_y = X[:-150], y[:-150], X[-150:], y[-150:]
    body = {
        "name": f"diabetes-{np.random.default_rng().integers(1 << 40)}",
        "task": "regression",
        "ids": [f"patient-{i:03d}" for i in range(150)],
        "y_true": test_y.tolist(),
        "policy": {"guard": "none", "gates": gates},
    }
    return register(owner, body), {"train_X": train_X, "train_y": train_y, "test_X": test_X}


def test_flag_gate_fails_a_real_generalization_gap(owner: Any, submitter: Any) -> None:
    h, data = _diabetes_holdout(owner, [{"flag": "generalization_gap", "min_severity": "critical"}])
    # Fully grown trees: training rows fitted exactly, new rows poorly (a real gap).
    trees = [
        DecisionTreeRegressor(random_state=s).fit(data["train_X"], data["train_y"])
        for s in range(3)
    ]
    test_p = np.stack([t.predict(data["test_X"]) for t in trees])
    train_p = np.stack([t.predict(data["train_X"]) for t in trees])
    body = {
        "model": "deep-tree",
        "ids": h.ids,
        "predictions": test_p.tolist(),
        "train": {"y_true": data["train_y"].tolist(), "predictions": train_p.tolist()},
    }
    out = _submit(submitter, h, body)
    mask = holdout_mask(owner, h)
    y = np.asarray(h.y)
    test_loss = _row_losses(test_p, y)[mask]
    train_loss = _row_losses(train_p, data["train_y"])
    # reference: scipy.stats.ttest_ind (Welch, one-sided): held-out loss above training loss
    welch = stats.ttest_ind(test_loss, train_loss, equal_var=False, alternative="greater")
    assert welch.pvalue < 0.01 and test_loss.mean() >= 2 * train_loss.mean()
    (reason,) = out["verdict"]["reasons"]
    assert reason["kind"] == "flag" and reason["status"] == "fail"
    assert reason["details"]["flag_severity"] == "critical"
    assert out["verdict"]["status"] == "fail"

    # The same trees without training rows: no evidence, so the flag gate passes.
    out = _submit(
        submitter, h, {"model": "deep-tree", "ids": h.ids, "predictions": test_p.tolist()}
    )
    assert out["verdict"]["status"] == "pass"


# -------------------------------------------------------------------------- comparisons


COMPARE_GATES = [
    {"compare": "superior", "metric": "mse", "alpha": ALPHA},
    {"compare": "non_inferior", "metric": "mse", "margin": 20000.0, "alpha": ALPHA},
    {"compare": "non_inferior", "metric": "r2", "margin": 0.001, "alpha": 0.1},
]


def _check_mse_reasons(
    verdict: dict[str, Any], cand: np.ndarray, ref: np.ndarray, abs_tol: float = 0.0
) -> None:
    """The mse comparison reasons against scipy and statsmodels on the same rows."""
    superior, non_inferior = _reason(verdict, "compare", "mse")
    diff = cand - ref
    # reference: scipy.stats.ttest_rel (two-sided paired t test and its 1 - 2 alpha interval)
    t = stats.ttest_rel(cand, ref)
    ci = t.confidence_interval(1 - 2 * ALPHA)
    for r in (superior, non_inferior):
        assert r["difference"] == pytest.approx(diff.mean(), rel=1e-9, abs=abs_tol)
        assert r["p_value"] == pytest.approx(t.pvalue, rel=1e-7, abs=abs_tol)
        assert r["interval"]["low"] == pytest.approx(ci.low, rel=1e-9, abs=abs_tol)
        assert r["interval"]["high"] == pytest.approx(ci.high, rel=1e-9, abs=abs_tol)
        assert r["interval"]["level"] == pytest.approx(1 - 2 * ALPHA)
        assert r["alpha"] == ALPHA and r["op"] == "<"
    # reference: statsmodels ttost_paired: its upper test is H0: mean(cand - ref) >= upp,
    # the one-sided test of each gate (upp = margin, or 0 for superiority)
    for r, upp in ((superior, 0.0), (non_inferior, 20000.0)):
        _, _, (_, p_upper, _) = ttost_paired(cand, ref, -1e12, upp)
        assert r["details"]["p_value_one_sided"] == pytest.approx(p_upper, rel=1e-6, abs=abs_tol)
        assert r["status"] == ("pass" if p_upper < ALPHA else "fail")
        assert r["bound"] == upp


def test_comparisons_with_a_named_reference_match_scipy_and_statsmodels(
    owner: Any, submitter: Any
) -> None:
    h = _register(owner, COMPARE_GATES, guard="none")
    y = np.asarray(h.y)
    ref_p, good_p, bad_p = _preds(h, 300.0, 4), _preds(h, 120.0, 5), _preds(h, 600.0, 6)
    ref = _submit(submitter, h, _body(h, ref_p, model="ref"))
    assert [r["status"] for r in ref["verdict"]["reasons"]] == ["warn"] * 3  # no reference
    assert ref["verdict"]["reference"] is None
    mask = holdout_mask(owner, h)
    for p in (good_p, bad_p):
        out = _submit(submitter, h, _body(h, p, reference=ref["id"]))
        verdict = out["verdict"]
        assert verdict["reference"] == ref["id"]
        assert {r["reference"] for r in _reason(verdict, "compare")} == {ref["id"]}
        cand, base = _row_losses(p, y), _row_losses(ref_p, y)
        _check_mse_reasons(verdict, cand[mask], base[mask])  # feedback rows only
        # r2: the difference of sklearn's r2_score (mean over seeds) on the feedback rows
        (r2,) = _reason(verdict, "compare", "r2")
        want = np.mean([r2_score(y[mask], q[mask]) for q in p]) - np.mean(
            [r2_score(y[mask], q[mask]) for q in ref_p]
        )
        assert r2["difference"] == pytest.approx(want, rel=1e-9)
        assert r2["op"] == ">" and r2["bound"] == -0.001
        # owners: the same comparisons on the reserve and on all rows
        seen = owner.get(f"/v1/submissions/{out['id']}").get_json()["verdicts_by_slice"]
        _check_mse_reasons(seen["reserve"], cand[~mask], base[~mask])
        _check_mse_reasons(seen["full"], cand, base)
        statuses = [r["status"] for r in _reason(verdict, "compare", "mse")]
        if p is good_p:  # 120 vs 300 noise on 32 rows: clearly better (both pass)
            assert statuses == ["pass", "pass"]
        else:
            assert statuses == ["fail", "fail"] and verdict["status"] == "fail"


def test_rounded_guard_rounds_every_comparison_number(owner: Any, submitter: Any) -> None:
    h = _register(owner, COMPARE_GATES[:2], guard="rounded", decimals=2)
    y = np.asarray(h.y)
    ref_p, cand_p = _preds(h, 300.0, 7), _preds(h, 250.0, 8)
    ref = _submit(submitter, h, _body(h, ref_p))
    out = _submit(submitter, h, _body(h, cand_p, reference=ref["id"]))
    mask = holdout_mask(owner, h)
    for reason in out["verdict"]["reasons"]:
        for x in numbers({k: v for k, v in reason.items() if k not in ("spec", "bound")}):
            assert round(x, 2) == x, (reason["gate"], x)
    cand, base = _row_losses(cand_p, y)[mask], _row_losses(ref_p, y)[mask]
    _check_mse_reasons(out["verdict"], cand, base, abs_tol=0.005 + 1e-9)


def test_accuracy_comparison_is_mcnemar_on_the_feedback_rows(owner: Any, submitter: Any) -> None:
    body = classification_body(name="species-gated", n=211)
    body["policy"] = {
        "guard": "none",
        "gates": [
            {"compare": "non_inferior", "metric": "accuracy", "margin": 0.05, "alpha": ALPHA}
        ],
    }
    h = register(owner, body)
    classes = h.response["classes"]
    y = np.array([classes.index(v) for v in h.y])
    rng = np.random.default_rng(23)

    def labels(p_right: float) -> np.ndarray:
        """One seed: the true class with probability p_right, else another at random."""
        wrong = (y + rng.integers(1, len(classes), size=y.size)) % len(classes)
        return np.where(rng.random(y.size) < p_right, y, wrong)

    ref_l, cand_l = labels(0.8), labels(0.6)
    ref = _submit(
        submitter, h, {"model": "r", "ids": h.ids, "predictions": [[classes[i] for i in ref_l]]}
    )
    out = _submit(
        submitter,
        h,
        {
            "model": "c",
            "ids": h.ids,
            "predictions": [[classes[i] for i in cand_l]],
            "reference": ref["id"],
        },
    )
    mask = holdout_mask(owner, h, strata=y)
    (reason,) = out["verdict"]["reasons"]
    # reference: sklearn.metrics.accuracy_score on the feedback rows
    want = accuracy_score(y[mask], cand_l[mask]) - accuracy_score(y[mask], ref_l[mask])
    assert reason["difference"] == pytest.approx(want, abs=1e-12)
    assert reason["details"]["method"].startswith("mcnemar") and reason["op"] == ">"
    # reference: statsmodels.stats.contingency_tables.mcnemar on the 2x2 table of
    # right/wrong pairs (exact binomial below MCNEMAR_EXACT_BELOW discordant rows)
    a, b = cand_l[mask] == y[mask], ref_l[mask] == y[mask]
    table = [[int((a & b).sum()), int((a & ~b).sum())], [int((~a & b).sum()), int((~a & ~b).sum())]]
    discordant = table[0][1] + table[1][0]
    expected = mcnemar(table, exact=discordant < MCNEMAR_EXACT_BELOW, correction=True).pvalue
    if table[0][1] == table[1][0]:
        # Equal discordant counts: the core caps the continuity correction (its documented
        # difference from statsmodels), giving the exact test's p-value.
        # reference: scipy.stats.binomtest, the exact McNemar test
        expected = stats.binomtest(table[0][1], discordant, 0.5).pvalue
    assert reason["p_value"] == pytest.approx(expected, rel=1e-9)
    low, high = reason["interval"]["low"], reason["interval"]["high"]
    assert low <= reason["difference"] <= high
    # non-inferior within 0.05 exactly when the one-sided lower bound clears -0.05
    assert reason["status"] == ("pass" if low > -0.05 else "fail")


# ------------------------------------------------------------------ reference permissions


def test_reference_permissions(
    owner: Any, other_owner: Any, submitter: Any, other_submitter: Any, store: Any
) -> None:
    h = _register(owner, COMPARE_GATES[:1], guard="none")
    theirs = _submit(other_submitter, h, _body(h, _preds(h, 300.0, 9)))
    mine = _submit(submitter, h, _body(h, _preds(h, 300.0, 10)))
    elsewhere_h = _register(owner, None, guard="none")
    elsewhere = _submit(submitter, elsewhere_h, _body(elsewhere_h, _preds(elsewhere_h, 300.0, 1)))
    before = store.count_submissions(h.id)
    path = f"/v1/holdouts/{h.id}/submissions"
    for bad in (theirs["id"], "sub_doesnotexist00", elsewhere["id"]):
        r = submitter.post(path, json=_body(h, _preds(h, 300.0, 11), reference=bad))
        assert r.status_code == 422, r.get_json()
        (error,) = r.get_json()["errors"]
        assert error["field"] == "reference"
        assert ("same holdout" in error["message"]) or ("own group" in error["message"])
    assert store.count_submissions(h.id) == before  # nothing stored
    # another group's and a missing one are refused alike (no existence oracle)
    msgs = [
        submitter.post(path, json=_body(h, _preds(h, 300.0, 11), reference=x)).get_json()
        for x in (theirs["id"], "sub_doesnotexist00")
    ]
    assert msgs[0]["errors"][0]["message"].replace(theirs["id"], "X") == msgs[1]["errors"][0][
        "message"
    ].replace("sub_doesnotexist00", "X")

    ref_path = f"/v1/holdouts/{h.id}/reference"
    assert _put(submitter, ref_path, {"submission": mine["id"]}).status_code == 403
    assert _put(other_owner, ref_path, {"submission": mine["id"]}).status_code == 404
    r = _put(owner, ref_path, {"submission": elsewhere["id"]})
    assert r.status_code == 422 and r.get_json()["errors"][0]["field"] == "submission"
    assert owner.get(ref_path).get_json()["submission"] is None

    # The owner's holdout-wide reference (another group's submission) applies by default.
    r = _put(owner, ref_path, {"submission": theirs["id"]})
    assert r.status_code == 200 and r.get_json()["submission"] == theirs["id"]
    assert owner.get(ref_path).get_json()["group"] == "g2"
    out = _submit(submitter, h, _body(h, _preds(h, 300.0, 12)))
    # another group's submission id is never shown to this group; the owner sees it
    assert out["verdict"]["reference"] == "holdout-reference"
    assert {r["reference"] for r in out["verdict"]["reasons"]} == {"holdout-reference"}
    assert theirs["id"] not in str(out)
    by_slice = owner.get(f"/v1/submissions/{out['id']}").get_json()["verdicts_by_slice"]
    assert by_slice["feedback"]["reference"] == theirs["id"]
    assert out["verdict"]["reasons"][0]["p_value"] is not None
    # a named reference of the group's own wins over it
    named = _submit(submitter, h, _body(h, _preds(h, 300.0, 13), reference=mine["id"]))
    assert named["verdict"]["reference"] == mine["id"]

    # Clearing it: no reference, so the comparison gate warns; stored verdicts keep theirs.
    assert _delete(owner, ref_path).get_json()["submission"] is None
    later = _submit(submitter, h, _body(h, _preds(h, 300.0, 14)))
    assert later["verdict"]["status"] == "warn" and later["verdict"]["reference"] is None
    again = submitter.get(f"/v1/submissions/{out['id']}").get_json()
    assert again["verdict"] == out["verdict"]


@pytest.mark.parametrize("form", ["query", "multipart"])
def test_reference_with_a_table_upload(owner: Any, submitter: Any, form: str) -> None:
    h = _register(owner, COMPARE_GATES[:1], guard="none")
    ref = _submit(submitter, h, _body(h, _preds(h, 300.0, 15, n_seeds=1)))
    preds = _preds(h, 300.0, 16, n_seeds=1)[0]
    csv = "id,pred\n" + "".join(f"{i},{float(p)!r}\n" for i, p in zip(h.ids, preds, strict=True))
    path = f"/v1/holdouts/{h.id}/submissions"
    if form == "query":
        r = submitter.post(
            f"{path}?model=csv&reference={ref['id']}",
            data=csv.encode(),
            headers={"Content-Type": "text/csv"},
        )
    else:
        r = submitter.post(
            path,
            content_type="multipart/form-data",
            data={
                "model": "csv",
                "reference": ref["id"],
                "file": (io.BytesIO(csv.encode()), "p.csv"),
            },
        )
    assert r.status_code == 201, r.get_json()
    assert r.get_json()["verdict"]["reference"] == ref["id"]


# ----------------------------------------------------------------------------- the Ladder


def test_ladder_verdict_shows_only_released_numbers(
    owner: Any, submitter: Any, other_submitter: Any
) -> None:
    gates = [
        {"metric": "rmse", "op": "<=", "value": 250.0},
        {"compare": "non_inferior", "metric": "mse", "margin": 5000.0, "alpha": ALPHA},
    ]
    h = _register(owner, gates)  # default policy: the Ladder, 4 decimals
    y = np.asarray(h.y)
    champion_p = _preds(h, 280.0, 17)
    champion = _submit(other_submitter, h, _body(h, champion_p))
    assert (
        _put(owner, f"/v1/holdouts/{h.id}/reference", {"submission": champion["id"]}).status_code
        == 200
    )

    best_p = _preds(h, 200.0, 18)
    best = _submit(submitter, h, _body(h, best_p))
    assert best["guard"]["improved"] is True and best["verdict"]["based_on"] == best["id"]
    mask = holdout_mask(owner, h)
    # Released numbers are rounded to 4 decimals; the comparison agrees with scipy's paired
    # t test on the feedback rows to that precision.
    for x in numbers(best["verdict"]):
        assert round(x, 4) == x
    (cmp_,) = _reason(best["verdict"], "compare")
    cand, base = _row_losses(best_p, y)[mask], _row_losses(champion_p, y)[mask]
    # reference: scipy.stats.ttest_rel
    assert cmp_["difference"] == pytest.approx((cand - base).mean(), abs=0.5e-4 + 1e-6)
    assert cmp_["p_value"] == pytest.approx(stats.ttest_rel(cand, base).pvalue, abs=0.5e-4 + 1e-9)

    worse_p = _preds(h, 900.0, 19)
    worse = _submit(submitter, h, _body(h, worse_p, reference=best["id"]))
    assert worse["guard"]["improved"] is False
    verdict = worse["verdict"]
    assert verdict["based_on"] == best["id"] and verdict["note"]
    assert verdict["status"] == best["verdict"]["status"]
    for got, shown in zip(verdict["reasons"], best["verdict"]["reasons"], strict=True):
        assert {**got, "message": ""} == {**shown, "message": ""}
        assert got["message"].endswith(shown["message"])
    (withheld,) = _reason(verdict, "compare")
    assert withheld["message"].startswith("withheld under the Ladder")
    # Every number the group gets back was already released (the best's response) or is
    # the owner's policy; its own feedback comparison with the best is nowhere in it.
    released = set(numbers(best)) | set(numbers(h.response["policy"]))
    assert set(numbers(worse)) <= released
    own = owner.get(f"/v1/submissions/{worse['id']}").get_json()["verdicts_by_slice"]
    hidden = own["feedback"]["reasons"]
    assert hidden[1]["reference"] == best["id"]
    # (its p-value is left out: a tiny one rounds to 0.0, which other numbers may also be)
    for x in (hidden[0]["value"], hidden[1]["difference"]):
        assert round(x, 4) not in numbers(worse)
    # Stable: read again, the same verdict; the standings show the best's status.
    assert submitter.get(f"/v1/submissions/{worse['id']}").get_json()["verdict"] == verdict
    entries = submitter.get(f"/v1/holdouts/{h.id}/standings").get_json()["entries"]
    mine = next(e for e in entries if e["group"] == "g1")
    assert mine["verdict_status"] == best["verdict"]["status"]
    assert mine["reserve_verdict_status"] is None
    owners = owner.get(f"/v1/holdouts/{h.id}/standings").get_json()["entries"]
    assert next(e for e in owners if e["group"] == "g1")["reserve_verdict_status"] in (
        "pass",
        "warn",
        "fail",
    )
    # Under the Ladder a withheld submission cannot be a reference (its loss would leak).
    r = submitter.post(
        f"/v1/holdouts/{h.id}/submissions",
        json=_body(h, _preds(h, 300.0, 20), reference=worse["id"]),
    )
    assert r.status_code == 422 and r.get_json()["errors"][0]["field"] == "reference"


def test_closed_holdout_shows_submitters_their_reserve_verdict(owner: Any, submitter: Any) -> None:
    h = _register(owner, [{"metric": "rmse", "op": "<=", "value": 1e6}])
    out = _submit(submitter, h, _body(h, _preds(h, 300.0, 21)))
    assert out["verdicts_by_slice"] == {}  # nothing about the reserve before close
    assert owner.post(f"/v1/holdouts/{h.id}/close").status_code == 200
    seen = submitter.get(f"/v1/submissions/{out['id']}").get_json()
    assert set(seen["verdicts_by_slice"]) == {"reserve"}
    reserve = seen["verdicts_by_slice"]["reserve"]
    mask = holdout_mask(owner, h)
    y, p = np.asarray(h.y), _preds(h, 300.0, 21)
    # reference: sklearn.metrics.mean_squared_error on the reserve rows, rounded to 4
    want = math.sqrt(np.mean([mean_squared_error(y[~mask], q[~mask]) for q in p]))
    assert reserve["reasons"][0]["value"] == pytest.approx(want, abs=0.5e-4 + 1e-9)
    final = submitter.get(f"/v1/holdouts/{h.id}/standings").get_json()["final"]
    assert final[0]["verdict_status"] == reserve["status"] == "pass"


def test_listing_shows_each_submissions_verdict_status(owner: Any, submitter: Any) -> None:
    # Under the Ladder (default policy) a non-improving submission's verdict is its group's
    # best's; the listing's status is the submission's own `verdict` status for every role.
    h = _register(owner, [{"metric": "rmse", "op": "<=", "value": 250.0}])
    made = [_submit(submitter, h, _body(h, _preds(h, s, i))) for i, s in enumerate((900, 100, 600))]
    assert {m["verdict"]["status"] for m in made} == {"pass", "fail"}
    path = f"/v1/holdouts/{h.id}/submissions"
    for user in (owner, submitter):
        listed = {s["id"]: s["verdict_status"] for s in user.get(path).get_json()["submissions"]}
        assert listed == {
            m["id"]: user.get(f"/v1/submissions/{m['id']}").get_json()["verdict"]["status"]
            for m in made
        }
