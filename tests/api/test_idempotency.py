"""Nothing lost, nothing counted twice: Idempotency-Key retries and all-or-nothing storage.

References: the IETF HTTPAPI draft "The Idempotency-Key HTTP Header Field"
(draft-ietf-httpapi-idempotency-key-header): a retry with the same key and payload gets the
first response; the same key with a different payload is 422; the key is a Structured Field
String (RFC 8941). Database failures are real ones: a trigger that refuses an insert inside
the storing transaction (SQLite ``RAISE(ABORT)``, PostgreSQL ``RAISE EXCEPTION``), no mocks.
Concurrent retries through gunicorn on PostgreSQL: tests/e2e/test_idempotency_gunicorn.py.
"""

from __future__ import annotations

import gzip
import io
import threading
from typing import Any

import orjson
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa
from apidata import Holdout, register, regression_body, regression_submission
from werkzeug.datastructures import Headers

from service.store import Store, schema

KEY = "Idempotency-Key"


def row_counts(store: Store) -> dict[str, int]:
    """Rows in every table of the service."""
    with store.engine.connect() as conn:
        return {
            t.name: int(conn.execute(sa.select(sa.func.count()).select_from(t)).scalar_one())
            for t in schema.metadata.sorted_tables
        }


def _stored_rows(store: Store) -> dict[str, int]:
    """Rows of every table a stored submission writes to (all but the group's state row,
    which exists once a group has tried to submit; its quota count is checked apart)."""
    return {name: n for name, n in row_counts(store).items() if name != "group_states"}


def _quota_used(store: Store) -> int:
    if "group_states" not in schema.metadata.tables:
        return 0
    t = schema.metadata.tables["group_states"]
    with store.engine.connect() as conn:
        return int(conn.execute(sa.select(sa.func.coalesce(sa.func.sum(t.c.quota_used), 0)))
                   .scalar_one())


def _parquet(body: dict[str, Any]) -> bytes:
    columns = {"id": pa.array(body["ids"])}
    for k, seed in enumerate(body["predictions"]):
        columns[f"pred.s{k}"] = pa.array(seed, type=pa.float64())
    sink = io.BytesIO()
    pq.write_table(pa.table(columns), sink)
    return sink.getvalue()


def _csv(body: dict[str, Any]) -> bytes:
    lines = ["id," + ",".join(f"pred.s{k}" for k in range(len(body["predictions"])))]
    for i, row_id in enumerate(body["ids"]):
        lines.append(row_id + "," + ",".join(repr(seed[i]) for seed in body["predictions"]))
    return ("\n".join(lines) + "\n").encode()


def post(user: Any, holdout: Holdout, fmt: str, body: dict[str, Any], key: str | None) -> Any:
    """One submission request in ``fmt``; every call builds its request anew."""
    headers = {} if key is None else {KEY: key}
    path = f"/v1/holdouts/{holdout.id}/submissions"
    if fmt == "json":
        return user.post(path, data=orjson.dumps(body),
                         headers={**headers, "Content-Type": "application/json"})
    if fmt == "json-gzip":
        return user.post(path, data=gzip.compress(orjson.dumps(body)),
                         headers={**headers, "Content-Type": "application/json",
                                  "Content-Encoding": "gzip"})
    if fmt == "parquet":
        return user.post(f"{path}?model=m", data=_parquet(body),
                         headers={**headers, "Content-Type": "application/vnd.apache.parquet"})
    if fmt == "csv":
        return user.post(f"{path}?model=m", data=_csv(body),
                         headers={**headers, "Content-Type": "text/csv"})
    assert fmt == "multipart"  # a new random boundary each time: the parts are compared
    return user.post(path, headers=headers, content_type="multipart/form-data",
                     data={"model": "m", "file": (io.BytesIO(_csv(body)), "preds.csv")})


@pytest.fixture
def holdout(owner: Any) -> Holdout:
    return register(owner, regression_body())


@pytest.mark.parametrize("fmt", ["json", "parquet", "csv", "multipart"])
def test_a_retry_returns_the_first_result_and_stores_nothing(
    holdout: Holdout, submitter: Any, store: Store, fmt: str
) -> None:
    body, _ = regression_submission(holdout)
    first = post(submitter, holdout, fmt, body, "retry-7f3a")
    assert first.status_code == 201, first.get_json()
    assert "Idempotent-Replayed" not in first.headers
    after_first = _stored_rows(store), _quota_used(store)
    for _ in range(2):
        again = post(submitter, holdout, fmt, body, "retry-7f3a")
        assert again.status_code == 201 and again.headers["Idempotent-Replayed"] == "true"
        assert again.get_json() == first.get_json()  # same id, same scores, same everything
        assert again.headers["Location"] == first.headers["Location"]
        assert (_stored_rows(store), _quota_used(store)) == after_first
    listing = submitter.get(f"/v1/holdouts/{holdout.id}/submissions").get_json()
    assert listing["total"] == 1 and listing["submissions"][0]["id"] == first.get_json()["id"]
    # Without a key, the same body is a new submission.
    assert post(submitter, holdout, fmt, body, None).get_json()["id"] != first.get_json()["id"]


def test_the_body_is_compared_after_content_encoding(
    holdout: Holdout, submitter: Any, store: Store
) -> None:
    body, _ = regression_submission(holdout)
    first = post(submitter, holdout, "json", body, "gz-1")
    again = post(submitter, holdout, "json-gzip", body, "gz-1")
    assert again.status_code == 201 and again.get_json()["id"] == first.get_json()["id"]
    assert store.count_submissions(holdout.id) == 1


@pytest.mark.parametrize(
    "change",
    [
        lambda b: {**b, "model": "another"},
        lambda b: {**b, "predictions": [[v + 1.0 for v in p] for p in b["predictions"]]},
        lambda b: {**b, "ids": b["ids"][::-1], "predictions": [p[::-1] for p in b["predictions"]]},
    ],
)
def test_the_same_key_with_another_request_is_422(
    holdout: Holdout, submitter: Any, store: Store, change: Any
) -> None:
    body, _ = regression_submission(holdout)
    first = post(submitter, holdout, "json", body, "k-1")
    assert first.status_code == 201
    before = row_counts(store)
    r = post(submitter, holdout, "json", change(body), "k-1")
    assert r.status_code == 422 and r.mimetype == "application/problem+json"
    error = r.get_json()["errors"][0]
    assert error["field"] == KEY and error["count"] == 1 and error["examples"] == ["k-1"]
    assert row_counts(store) == before


def test_the_same_bytes_as_another_media_type_are_another_request(
    holdout: Holdout, submitter: Any
) -> None:
    body, _ = regression_submission(holdout)
    assert post(submitter, holdout, "csv", body, "k-2").status_code == 201
    r = post(submitter, holdout, "multipart", body, "k-2")  # same table, same model, as a form
    assert r.status_code == 201 and r.headers.get("Idempotent-Replayed") == "true"
    r = submitter.post(f"/v1/holdouts/{holdout.id}/submissions?model=other", data=_csv(body),
                       headers={KEY: "k-2", "Content-Type": "text/csv"})
    assert r.status_code == 422  # another model name in the query: another request


def test_keys_are_scoped_to_the_group_and_the_holdout(
    owner: Any, holdout: Holdout, submitter: Any, other_submitter: Any, store: Store
) -> None:
    body, _ = regression_submission(holdout)
    mine = post(submitter, holdout, "json", body, "shared-key").get_json()["id"]
    theirs = post(other_submitter, holdout, "json", body, "shared-key")
    assert theirs.status_code == 201 and "Idempotent-Replayed" not in theirs.headers
    assert theirs.get_json()["id"] != mine
    second = register(owner, regression_body(name="second"))
    body2, _ = regression_submission(second)
    other = post(submitter, second, "json", body2, "shared-key")
    assert other.status_code == 201 and other.get_json()["id"] != mine
    # Another group cannot read this group's submission by replaying its key: its own
    # request with that key made its own submission, and a different body is a 422.
    assert post(other_submitter, holdout, "json", {**body, "model": "x"}, "shared-key") \
        .status_code == 422
    assert store.count_submissions(holdout.id) == 2


@pytest.mark.parametrize(
    ("raw", "key"),
    [
        ('"4d2c-aa"', "4d2c-aa"),  # RFC 8941 String
        ("4d2c-aa", "4d2c-aa"),  # the bare token: the same key
        ('"with space and \\"quote\\""', 'with space and "quote"'),
        ("  padded  ", "padded"),
    ],
)
def test_key_forms(holdout: Holdout, submitter: Any, raw: str, key: str) -> None:
    from service.api.idempotency import parse_key

    assert parse_key(raw) == key
    body, _ = regression_submission(holdout)
    first = post(submitter, holdout, "json", body, raw)
    assert first.status_code == 201
    # The other spelling of the same key replays it.
    other = f'"{key}"' if not raw.startswith('"') and '"' not in key else key
    if '"' not in key and " " not in key:
        again = post(submitter, holdout, "json", body, other)
        assert again.headers.get("Idempotent-Replayed") == "true"
        assert again.get_json()["id"] == first.get_json()["id"]


@pytest.mark.parametrize(
    "raw",
    ['""', " ", '"unterminated', '"a"b"', '"bad \\n escape"', "caf\u00e9", "tab\there", "x" * 256,
     "with space"],
)
def test_malformed_keys_are_400(holdout: Holdout, submitter: Any, store: Store, raw: str) -> None:
    body, _ = regression_submission(holdout)
    before = row_counts(store)
    headers = {KEY: raw.encode("utf-8").decode("latin-1")}  # the header as raw bytes
    r = submitter.post(f"/v1/holdouts/{holdout.id}/submissions", json=body, headers=headers)
    assert r.status_code == 400 and r.mimetype == "application/problem+json"
    error = r.get_json()["errors"][0]
    assert error["field"] == KEY and error["count"] == 1 and len(error["examples"]) == 1
    assert row_counts(store) == before


def test_the_key_twice_is_400(holdout: Holdout, submitter: Any) -> None:
    body, _ = regression_submission(holdout)
    headers = Headers([("Authorization", f"Bearer {submitter.token}"), (KEY, "a"), (KEY, "b")])
    r = submitter.client.post(f"/v1/holdouts/{holdout.id}/submissions", json=body,
                              headers=headers)
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == KEY


def test_a_refused_request_leaves_its_key_free(
    holdout: Holdout, submitter: Any, store: Store
) -> None:
    body, _ = regression_submission(holdout)
    bad = {**body, "ids": body["ids"][:-1], "predictions": [p[:-1] for p in body["predictions"]]}
    assert post(submitter, holdout, "json", bad, "fix-me").status_code == 422
    fixed = post(submitter, holdout, "json", body, "fix-me")
    assert fixed.status_code == 201 and "Idempotent-Replayed" not in fixed.headers
    assert store.count_submissions(holdout.id) == 1


def test_a_replay_is_not_counted_against_the_quota(
    owner: Any, submitter: Any, store: Store
) -> None:
    h = register(owner, {**regression_body("quota-replay"), "policy": {"daily_quota": 1}})
    body, _ = regression_submission(h)
    first = post(submitter, h, "json", body, "q-1")
    assert first.status_code == 201
    again = post(submitter, h, "json", body, "q-1")  # the quota is used up, yet a retry works
    assert again.status_code == 201 and again.get_json()["id"] == first.get_json()["id"]
    assert post(submitter, h, "json", body, "q-2").status_code == 429
    assert store.count_submissions(h.id) == 1 and _quota_used(store) == 1


# ------------------------------------------------------------------------- all or nothing


def _refuse_inserts(store: Store, table: str) -> None:
    """A trigger that makes the database refuse every insert into ``table``."""
    with store.engine.begin() as conn:
        if store.engine.dialect.name == "sqlite":
            conn.execute(sa.text(
                f"CREATE TRIGGER refuse_{table} BEFORE INSERT ON {table} "
                "BEGIN SELECT RAISE(ABORT, 'refused by the test'); END"
            ))
        else:
            conn.execute(sa.text(
                "CREATE OR REPLACE FUNCTION heldout_test_refuse() RETURNS trigger AS $$ "
                "BEGIN RAISE EXCEPTION 'refused by the test'; END $$ LANGUAGE plpgsql"
            ))
            conn.execute(sa.text(
                f"CREATE TRIGGER refuse_{table} BEFORE INSERT ON {table} "
                "FOR EACH ROW EXECUTE FUNCTION heldout_test_refuse()"
            ))


def _allow_inserts(store: Store, table: str) -> None:
    with store.engine.begin() as conn:
        suffix = "" if store.engine.dialect.name == "sqlite" else f" ON {table}"
        conn.execute(sa.text(f"DROP TRIGGER refuse_{table}{suffix}"))


def _submission_tables() -> list[str]:
    """Every table a stored submission writes a row to, besides ``submissions`` itself."""
    return sorted(t.name for t in schema.metadata.sorted_tables if "submission_id" in t.c)


@pytest.mark.parametrize("table", _submission_tables())
def test_a_failure_while_storing_stores_nothing(
    holdout: Holdout, submitter: Any, store: Store, table: str
) -> None:
    body, _ = regression_submission(holdout)
    first = post(submitter, holdout, "json", body, "before")
    assert first.status_code == 201  # the group has a stored submission and state
    before = _stored_rows(store), _quota_used(store)
    _refuse_inserts(store, table)
    try:
        # Scored, then the database refuses one insert of the storing transaction.
        other, _ = regression_submission(holdout, seed=9)
        r = post(submitter, holdout, "json", other, "after")
        assert r.status_code == 500 and r.mimetype == "application/problem+json"
        assert "refused by the test" not in r.get_data(as_text=True)
        assert (_stored_rows(store), _quota_used(store)) == before  # not half stored
    finally:
        _allow_inserts(store, table)
    # The key was not taken by the failed attempt: the retry stores the submission once.
    retry = post(submitter, holdout, "json", other, "after")
    assert retry.status_code == 201 and "Idempotent-Replayed" not in retry.headers
    assert store.count_submissions(holdout.id) == 2


def test_concurrent_retries_store_one_submission(
    app: Any, holdout: Holdout, submitter: Any, store: Store
) -> None:
    """Threads, each with its own client, post the same keyed request at once."""
    body, _ = regression_submission(holdout)
    barrier = threading.Barrier(4)
    results: list[Any] = []
    lock = threading.Lock()

    def send() -> None:
        client = app.test_client()
        barrier.wait()
        r = client.post(f"/v1/holdouts/{holdout.id}/submissions", json=body,
                        headers={"Authorization": f"Bearer {submitter.token}", KEY: "race"})
        replayed = r.headers.get("Idempotent-Replayed")
        with lock:
            results.append((r.status_code, r.get_json()["id"], replayed))

    threads = [threading.Thread(target=send) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert len(results) == 4
    assert {status for status, _, _ in results} == {201}
    assert len({sid for _, sid, _ in results}) == 1
    assert sum(replayed == "true" for _, _, replayed in results) == 3
    assert store.count_submissions(holdout.id) == 1
