"""While the database is down the API answers 503 problem+json with Retry-After, and it
recovers by itself when the database is back.

The database is a PostgreSQL cluster of this test's own (``replicas.throwaway_postgres``),
stopped and started here; the session's shared cluster is never touched. The app is the
real one, in process (Flask's test client), so every request goes through the same error
mapping and the same engine as under gunicorn; ``test_replicas.py`` restarts PostgreSQL
under two gunicorn replicas.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import orjson
import pytest
import sqlalchemy as sa
from replicas import PostgresCluster, PostgresUnavailable, throwaway_postgres

from service import create_app
from service.api.errors import RETRY_AFTER_SECONDS, database_unreachable
from service.store import Store

pytestmark = pytest.mark.postgres

HOLDOUT = {
    "name": "down-and-up",
    "task": "regression",
    "ids": [f"r{i}" for i in range(200)],
    "y_true": [float(i % 7) for i in range(200)],
}


@pytest.fixture
def cluster() -> Iterator[PostgresCluster]:
    try:
        with throwaway_postgres() as running:
            yield running
    except PostgresUnavailable as exc:
        pytest.skip(str(exc))


def _assert_unavailable(response: Any) -> None:
    assert response.status_code == 503
    assert response.mimetype == "application/problem+json"
    assert response.headers["Retry-After"] == str(RETRY_AFTER_SECONDS)
    body = orjson.loads(response.data)
    # RFC 9457 section 3.1: the members of a problem object.
    assert body["status"] == 503 and body["type"].endswith("/unavailable")
    assert "database cannot be reached" in body["detail"]


def test_database_down_is_503_then_recovers_without_a_step(
    cluster: PostgresCluster, tmp_path: Path
) -> None:
    url = cluster.create_database("heldout_down")
    store = Store(url)
    store.init_schema()
    _, owner = store.create_token("owner", "team-a")
    store.dispose()
    app = create_app({"DATABASE_URL": url, "TESTING": True, "BOOTSTRAP_RESAMPLES": 200})
    client = app.test_client()
    auth = {"Authorization": f"Bearer {owner}"}
    try:
        created = client.post("/v1/holdouts", json=HOLDOUT, headers=auth)
        assert created.status_code == 201, created.data
        assert client.get("/v1/holdouts", headers=auth).status_code == 200  # pool warm

        cluster.stop("fast")
        _assert_unavailable(client.get("/v1/holdouts", headers=auth))  # a pooled connection
        _assert_unavailable(client.get("/v1/holdouts", headers=auth))  # a new connection
        _assert_unavailable(client.post("/v1/holdouts", json=HOLDOUT, headers=auth))
        _assert_unavailable(client.get("/readyz"))

        cluster.start()
        # No restart of the app, no manual step: the next request succeeds.
        assert client.get("/readyz").status_code == 200
        listed = client.get("/v1/holdouts", headers=auth)
        assert listed.status_code == 200
        again = client.post("/v1/holdouts", json=HOLDOUT, headers=auth)
        assert again.status_code == 200  # the same registration: the stored holdout
    finally:
        app.extensions["heldout_store"].dispose()


def test_pool_timeout_and_lost_connection_are_503_but_a_constraint_is_500() -> None:
    """The mapping itself, on exceptions of the kinds SQLAlchemy and psycopg raise."""
    import psycopg

    app = create_app({"DATABASE_URL": "sqlite://", "TESTING": True})
    lost = sa.exc.DBAPIError("SELECT 1", {}, Exception("gone"), connection_invalidated=True)
    cases = {
        "/pool": sa.exc.TimeoutError("QueuePool limit reached"),
        "/lost": lost,
        "/driver": psycopg.OperationalError("connection refused"),
        "/constraint": sa.exc.IntegrityError("INSERT", {}, Exception("duplicate")),
    }
    for path, exc in cases.items():

        def view(exc: Exception = exc) -> Any:
            raise exc

        app.add_url_rule(path, path.strip("/"), view)
    client = app.test_client()
    for path in ("/pool", "/lost", "/driver"):
        assert database_unreachable(cases[path])
        _assert_unavailable(client.get(path))
    assert not database_unreachable(cases["/constraint"])
    response = client.get("/constraint")
    assert response.status_code == 500 and "Retry-After" not in response.headers
