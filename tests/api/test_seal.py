"""The seal: no response a submitter can get, error or not, carries a label or a per-row value.

Every response a submitter can provoke is collected (success and error bodies, headers) and
scanned for:
- any registered regression label, as Python writes it (``repr``) and as 10 and 12
  significant digits;
- any array as long as the holdout (a per-row loss, residual or label would be one), except
  the public id list of ``GET /ids``;
- for classification, the label sequence itself (as names or as class indices).
The log records of all those requests are scanned for labels and submitted values too.
Before a holdout is closed, no number computed on its reserve rows (or on all rows) reaches
a submitter, exact or rounded, whatever the guard.
"""

from __future__ import annotations

import gzip
import logging
import math
from collections.abc import Iterator
from typing import Any

import numpy as np
import orjson
import pytest
from apidata import (
    classification_body,
    probability_submission,
    register,
    regression_body,
    regression_submission,
)
from guarddata import holdout_mask


def _label_texts(y: list[float]) -> set[str]:
    texts = set()
    for v in y:
        texts |= {repr(v), format(v, ".10g"), format(v, ".12g")}
    return texts


def _lists(value: Any) -> Iterator[list[Any]]:
    if isinstance(value, list):
        yield value
        for item in value:
            yield from _lists(item)
    elif isinstance(value, dict):
        for item in value.values():
            yield from _lists(item)


class Recorder:
    """Wraps a user and keeps every response it receives."""

    def __init__(self, user: Any) -> None:
        self.user = user
        self.responses: list[tuple[str, Any]] = []

    def get(self, path: str, **kw: Any) -> Any:
        r = self.user.get(path, **kw)
        self.responses.append((path, r))
        return r

    def post(self, path: str, **kw: Any) -> Any:
        r = self.user.post(path, **kw)
        self.responses.append((path, r))
        return r


def _exercise(
    rec: Recorder, holdout_id: str, good: dict[str, Any], bad_bodies: list[dict[str, Any]]
) -> None:
    """Call every endpoint a submitter may call, with good and bad input."""
    base = f"/v1/holdouts/{holdout_id}"
    r = rec.post(f"{base}/submissions", json=good)
    assert r.status_code == 201, r.get_json()
    sub_id = r.get_json()["id"]
    for bad in bad_bodies:
        assert rec.post(f"{base}/submissions", json=bad).status_code >= 400
    rec.post(f"{base}/submissions", data=b"{not json", content_type="application/json")
    rec.post(f"{base}/submissions", data=b"x", content_type="application/xml")
    rec.post(
        f"{base}/submissions",
        data=gzip.compress(b"{}")[:-4],
        headers={"Content-Encoding": "gzip"},
        content_type="application/json",
    )
    for path in (
        "/v1/holdouts",
        base,
        f"{base}/ids",
        f"{base}/submissions",
        f"{base}/submissions?limit=1&offset=0",
        f"{base}/standings",
        f"{base}/sweeps/seal",
        f"{base}/sweeps/other",
        f"/v1/submissions/{sub_id}",
        "/v1/submissions/sub_doesnotexist",
        "/v1/holdouts/ho_doesnotexist",
        "/v1/openapi.json",
        "/healthz",
        "/readyz",
        "/no/such/route",
    ):
        rec.get(path)
    rec.get(f"{base}/ids", headers={"Accept": "text/csv"})
    rec.get(f"{base}/submissions?limit=oops")


def _scan(rec: Recorder, n_rows: int, forbidden: set[str], label_lists: list[list[Any]]) -> None:
    assert len(rec.responses) > 20
    for path, r in rec.responses:
        text = r.get_data(as_text=True) + "\n".join(f"{k}: {v}" for k, v in r.headers.items())
        for label in forbidden:
            assert label not in text, (path, label)
        if r.mimetype in ("application/json", "application/problem+json"):
            body = orjson.loads(r.get_data())
            for lst in _lists(body):
                if path.endswith("/ids") and lst is body["ids"]:
                    continue
                assert len(lst) != n_rows, (path, "an array as long as the holdout")
                assert lst not in label_lists, (path, "the label sequence")


def test_regression_labels_never_leave(
    owner: Any, submitter: Any, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.DEBUG)
    holdout = register(owner, regression_body("sealed"))
    y = holdout.y
    good, preds = regression_submission(
        holdout,
        sweep={"name": "seal", "complexity": 1},
        train={"y_true": y[:10], "predictions": [[v + 1.0 for v in y[:10]]] * 3},
    )
    n = len(y)
    bad = [
        {**good, "ids": good["ids"][:-1]},
        {**good, "ids": [*good["ids"][:-1], "row-x"]},
        {**good, "predictions": [[*p[:-1], None] for p in good["predictions"]]},
        {**good, "predictions": [p[:-1] for p in good["predictions"]]},
        {**good, "seeds": ["a"]},
        {**good, "probabilities": [[1.0]] * n},
        {**good, "train": {"y_true": [1.0], "predictions": [1.0, 2.0]}},
        {"model": "m"},
        {**good, "model": "x" * 500},
    ]
    # Predictions of zero make a residual equal to minus the label: the strongest probe.
    zeros = {**good, "predictions": [[0.0] * n] * 3, "sweep": None, "train": None}
    rec = Recorder(submitter)
    _exercise(rec, holdout.id, good, bad)
    r = rec.post(f"/v1/holdouts/{holdout.id}/submissions", json=zeros)
    assert r.status_code == 201
    rec.get(f"/v1/submissions/{r.get_json()['id']}")
    forbidden = _label_texts(y)
    _scan(rec, n, forbidden, [y])
    # Logs: no label and no submitted prediction.
    submitted = {repr(v) for p in good["predictions"] for v in p}
    for record in caplog.records:
        message = record.getMessage()
        for value in forbidden | submitted:
            assert value not in message


def test_classification_labels_never_leave(owner: Any, submitter: Any) -> None:
    holdout = register(owner, classification_body("sealed-c"))
    classes = holdout.response["classes"]
    good, probs = probability_submission(holdout, sweep={"name": "seal", "complexity": 1})
    n = len(holdout.ids)
    bad = [
        {**good, "ids": good["ids"][:-1]},
        {**good, "probabilities": [[[0.2, 0.2, 0.2]] * n]},
        {**good, "predictions": ["qx7-unknown"] * n},
        {**good, "train": {"y_true": ["qx7-nope"], "probabilities": [[1.0, 0.0, 0.0]]}},
    ]
    rec = Recorder(submitter)
    _exercise(rec, holdout.id, good, bad)
    # The label sequence in registration order, as names and as indices.
    y_names = holdout.y
    y_index = [classes.index(v) for v in y_names]
    order = sorted(range(n), key=lambda i: holdout.ids[i])
    _scan(
        rec, n, set(), [y_names, y_index, [y_names[i] for i in order], [y_index[i] for i in order]]
    )


def _floats(value: Any) -> Iterator[float]:
    if isinstance(value, dict):
        for item in value.values():
            yield from _floats(item)
    elif isinstance(value, list):
        for item in value:
            yield from _floats(item)
    elif isinstance(value, float):
        yield value


@pytest.mark.parametrize("guard", ["ladder", "none"])
def test_no_reserve_number_reaches_a_submitter_before_close(
    owner: Any, submitter: Any, guard: str
) -> None:
    # Predictions far better on the reserve rows than on the feedback rows, so every number
    # computed on the reserve (or on all rows) differs from its feedback twin; then no
    # response a submitter can get may hold one of them, exact or rounded to the policy's
    # decimals, nor a label, nor an array as long as either slice.
    holdout = register(owner, {**regression_body(f"sealed-{guard}"), "policy": {"guard": guard}})
    mask = holdout_mask(owner, holdout)
    y = np.asarray(holdout.y)
    rng = np.random.default_rng(17)
    preds = np.where(mask, 300.0, 37.0) * rng.normal(size=(3, y.size)) + y
    worse = np.where(mask, 350.0, 11.0) * rng.normal(size=(3, y.size)) + y
    good, _ = regression_submission(holdout, sweep={"name": "seal", "complexity": 1})
    index = {row_id: i for i, row_id in enumerate(holdout.ids)}
    order = [index[i] for i in good["ids"]]
    good["predictions"] = preds[:, order].tolist()
    train_y = rng.normal(size=20)
    good["train"] = {"y_true": train_y.tolist(), "predictions": [train_y.tolist()] * 3}
    rec = Recorder(submitter)
    _exercise(rec, holdout.id, good, [{**good, "ids": good["ids"][:-1]}])
    second = {**good, "predictions": worse[:, order].tolist(), "train": None}
    second["sweep"] = {"name": "seal", "complexity": 2}
    r = rec.post(f"/v1/holdouts/{holdout.id}/submissions", json=second)
    assert r.status_code == 201
    rec.get(f"/v1/submissions/{r.get_json()['id']}")
    rec.get(f"/v1/holdouts/{holdout.id}/sweeps/seal")
    rec.get(f"/v1/holdouts/{holdout.id}/sweeps/seal?slice=reserve")
    rec.get(f"/v1/holdouts/{holdout.id}/standings")

    shown: set[float] = set()
    sealed: set[float] = set()
    for listing in owner.get(f"/v1/holdouts/{holdout.id}/submissions").get_json()["submissions"]:
        views = owner.get(f"/v1/submissions/{listing['id']}").get_json()["views"]
        shown |= set(_floats(views["feedback"]))
        sealed |= set(_floats(views["reserve"])) | set(_floats(views["full"]))
    # Numbers shared with the feedback view (training scores, the interval level) are not
    # reserve information; the rest must never reach the submitter, in any form.
    sealed = {v for v in sealed - shown if abs(v) > 1e-6 and math.isfinite(v)}
    sealed_rounded = {round(v, 4) for v in sealed} - {round(v, 4) for v in shown}
    assert len(sealed) > 50
    for path, resp in rec.responses:
        if resp.mimetype not in ("application/json", "application/problem+json"):
            continue
        for value in _floats(orjson.loads(resp.get_data())):
            assert value not in sealed, (path, value)
            assert value not in sealed_rounded, (path, value)
    _scan(rec, y.size, _label_texts(holdout.y), [holdout.y])
    n_feedback, n_reserve = int(mask.sum()), int((~mask).sum())
    for path, resp in rec.responses:
        if resp.mimetype in ("application/json", "application/problem+json"):
            for lst in _lists(orjson.loads(resp.get_data())):
                assert len(lst) not in (n_feedback, n_reserve), (path, "a per-row array")
