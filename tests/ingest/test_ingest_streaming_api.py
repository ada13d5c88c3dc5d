"""A plain CSV submission through the API is read from the request stream (``bodies``).

The same submission as JSON is the reference: both must reach the scoring core as the same
arrays, so their reports are equal. A body shorter than its Content-Length is the same 400
as before, and a request refused before its body is read still reads it to the end.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import sqlalchemy as sa

from service.store import schema

N = 211


def _holdout(owner: Any) -> tuple[str, list[str], np.ndarray]:
    rng = np.random.default_rng(5)
    ids = [f"s-{i:05d}" for i in rng.permutation(N)]
    y = rng.normal(50.0, 10.0, size=N)
    body = {"name": "streamed", "task": "regression", "ids": ids, "y_true": y.tolist(),
            "policy": {"guard": "none"}}
    r = owner.post("/v1/holdouts", json=body)
    assert r.status_code == 201, r.get_json()
    return r.get_json()["id"], ids, y


def _csv(ids: list[str], preds: np.ndarray, order: np.ndarray) -> bytes:
    header = "id," + ",".join(f"pred.{s}" for s in range(preds.shape[0]))
    rows = [",".join([ids[i], *(repr(float(v)) for v in preds[:, i])]) for i in order]
    return ("\n".join([header, *rows]) + "\n").encode()


def _rows(store: Any) -> dict[str, int]:
    with store.engine.connect() as conn:
        return {t.name: int(conn.execute(sa.select(sa.func.count()).select_from(t)).scalar_one())
                for t in schema.metadata.sorted_tables}


def test_streamed_csv_is_scored_like_the_same_json(owner: Any, submitter: Any,
                                                   other_submitter: Any) -> None:
    hid, ids, y = _holdout(owner)
    rng = np.random.default_rng(6)
    preds = y + rng.normal(0.0, 3.0, size=(3, N))
    r_csv = submitter.post(f"/v1/holdouts/{hid}/submissions?model=m",
                           data=_csv(ids, preds, rng.permutation(N)),
                           headers={"Content-Type": "text/csv"})
    assert r_csv.status_code == 201, r_csv.get_json()
    phases = [p.split(";")[0].strip() for p in r_csv.headers["Server-Timing"].split(",")]
    assert "receive_parse" in phases and "upload" not in phases  # read as a stream
    r_json = other_submitter.post(
        f"/v1/holdouts/{hid}/submissions",
        json={"model": "m", "ids": ids, "predictions": preds.tolist(),
              "seeds": ["0", "1", "2"]})
    assert r_json.status_code == 201, r_json.get_json()
    a, b = r_csv.get_json(), r_json.get_json()
    assert a["n_seeds"] == b["n_seeds"] == 3
    assert a["scores"] == b["scores"]


def test_a_short_csv_body_is_the_same_400(owner: Any, submitter: Any, store: Any) -> None:
    hid, ids, y = _holdout(owner)
    body = _csv(ids, y[None, :], np.arange(N))
    before = _rows(store)
    r = submitter.post(f"/v1/holdouts/{hid}/submissions?model=m",
                       input_stream=io.BytesIO(body),
                       headers={"Content-Type": "text/csv"},
                       environ_overrides={"CONTENT_LENGTH": str(len(body) + 100)})
    assert r.status_code == 400, r.get_json()
    (entry,) = r.get_json()["errors"]
    assert entry["field"] == "body"
    assert entry["message"] == f"{len(body)} of {len(body) + 100} bytes received"
    assert _rows(store) == before


def test_a_request_refused_before_its_body_still_reads_it(owner: Any, submitter: Any) -> None:
    hid, ids, y = _holdout(owner)
    assert owner.post(f"/v1/holdouts/{hid}/close").status_code == 200
    body = _csv(ids, y[None, :], np.arange(N))
    stream = io.BytesIO(body)
    r = submitter.post(f"/v1/holdouts/{hid}/submissions?model=m", input_stream=stream,
                       headers={"Content-Type": "text/csv"},
                       environ_overrides={"CONTENT_LENGTH": str(len(body))})
    assert r.status_code == 409, r.get_json()
    assert stream.tell() == len(body)  # drained: a client still sending gets the answer
