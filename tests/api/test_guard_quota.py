"""Daily quotas: counted per group per UTC day, only for stored submissions, 429 beyond.

References: RFC 6585 section 4 (429 Too Many Requests, with Retry-After) and RFC 9110
section 10.2.3 (Retry-After as delay-seconds, a non-negative integer); RFC 9457 problems.
Concurrent requests are checked through gunicorn in tests/e2e/test_guard_concurrency.py.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from typing import Any

import sqlalchemy as sa
from apidata import register, regression_body, regression_submission

from service.store import schema
from service.store.reuse import group_state


def _seconds_to_midnight(now: datetime) -> int:
    midnight = datetime.combine(now.date() + timedelta(days=1), datetime.min.time(), UTC)
    return math.ceil((midnight - now).total_seconds())


def test_the_quota_counts_only_stored_submissions(
    owner: Any, submitter: Any, other_submitter: Any, store: Any
) -> None:
    h = register(owner, {**regression_body("quota"), "policy": {"daily_quota": 2}})
    path = f"/v1/holdouts/{h.id}/submissions"
    body, _ = regression_submission(h)
    # A refused submission (422) uses no slot.
    assert submitter.post(path, json={**body, "ids": body["ids"][:-1]}).status_code == 422
    assert [submitter.post(path, json=body).status_code for _ in range(2)] == [201, 201]
    before = datetime.now(UTC)
    r = submitter.post(path, json=body)
    after = datetime.now(UTC)
    assert r.status_code == 429 and r.mimetype == "application/problem+json"
    problem = r.get_json()
    assert problem["status"] == 429 and problem["errors"][0]["field"] == "daily_quota"
    # reference: RFC 6585 / RFC 9110: delay-seconds, here until the next midnight UTC
    retry = int(r.headers["Retry-After"])
    assert _seconds_to_midnight(after) <= retry <= _seconds_to_midnight(before)
    assert 1 <= retry <= 86400
    # Over quota stores nothing and counts nothing; another group has its own quota.
    assert store.count_submissions(h.id, group="g1") == 2
    assert group_state(store, h.id, "g1").quota_used == 2
    assert other_submitter.post(path, json=body).status_code == 201


def test_the_quota_renews_each_utc_day(owner: Any, submitter: Any, store: Any) -> None:
    h = register(owner, {**regression_body("daily"), "policy": {"daily_quota": 1}})
    path = f"/v1/holdouts/{h.id}/submissions"
    body, _ = regression_submission(h)
    assert submitter.post(path, json=body).status_code == 201
    assert submitter.post(path, json=body).status_code == 429
    # The stored day is yesterday's: today's count starts again at one.
    gs = schema.group_states
    yesterday = (datetime.now(UTC) - timedelta(days=1)).strftime("%Y-%m-%d")
    with store.engine.begin() as conn:
        conn.execute(gs.update().where(gs.c.holdout_id == h.id).values(quota_day=yesterday))
    assert submitter.post(path, json=body).status_code == 201
    state = group_state(store, h.id, "g1")
    assert state.quota_used == 1 and state.quota_day == datetime.now(UTC).strftime("%Y-%m-%d")
    assert store.count_submissions(h.id) == 2
    with store.engine.connect() as conn:
        slices = conn.execute(sa.select(sa.func.count()).select_from(schema.submission_slices))
        assert slices.scalar_one() == 4  # feedback and reserve of each stored submission


def test_no_quota_by_default(owner: Any, submitter: Any) -> None:
    h = register(owner, regression_body("unlimited"))
    body, _ = regression_submission(h, n_seeds=1)
    path = f"/v1/holdouts/{h.id}/submissions"
    assert {submitter.post(path, json=body).status_code for _ in range(5)} == {201}
