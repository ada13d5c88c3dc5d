"""Shared fixtures: a real app on a real database, per test, on SQLite and on PostgreSQL.

- ``postgres_url`` (session): a throwaway PostgreSQL cluster (initdb into a temporary
  directory owned by ``postgres``, started with ``pg_ctl`` on a free loopback port via
  ``runuser``), with one database; stopped and removed at the end of the session. Skipped
  with the reason when not running as root or when the server binaries are absent
  (``tests/run`` installs them).
- ``app`` / ``client``: a fresh app per test on a fresh database; parametrized by backend
  (``sqlite``, ``postgres``), so every API test runs on both.
- role fixtures: tokens made through the store (``Store.create_token``, what
  ``heldout tokens create`` calls): ``admin``, ``owner``, ``other_owner``, ``submitter``
  (group ``g1``), ``other_submitter`` (group ``g2``), each an ``ApiUser`` bound to the client.
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from service.store import Store, make_engine, schema

if TYPE_CHECKING:  # Flask is imported by the fixtures only: scoring tests never load it
    from flask import Flask
    from flask.testing import FlaskClient

# Fast intervals in tests; the statistics are tested in tests/scoring.
TEST_SETTINGS = {"BOOTSTRAP_RESAMPLES": 200}


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _postgres_bin() -> Path | None:
    """The newest installed PostgreSQL server's bin directory (15 preferred)."""
    preferred = Path("/usr/lib/postgresql/15/bin")
    if (preferred / "initdb").exists():
        return preferred
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    return Path(found[-1]).parent if found else None


def _as_postgres(*argv: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["runuser", "-u", "postgres", "--", *argv],
        check=True,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


@pytest.fixture(scope="session")
def postgres_url() -> Iterator[str]:
    """URL of a database in a throwaway PostgreSQL cluster started for this session."""
    if os.geteuid() != 0:
        pytest.skip("PostgreSQL tests start a cluster as user postgres and need root")
    bindir = _postgres_bin()
    if bindir is None:
        pytest.skip("PostgreSQL server binaries not found (tests/run installs them)")
    if shutil.which("runuser") is None:
        pytest.skip("runuser not found; it is needed to run the cluster as user postgres")
    base = Path(tempfile.mkdtemp(prefix="heldout-pg-"))
    data, sockets, log = base / "data", base / "sock", base / "server.log"
    sockets.mkdir()
    shutil.chown(base, "postgres", "postgres")
    shutil.chown(sockets, "postgres", "postgres")
    port = _free_port()
    started = False
    try:
        _as_postgres(
            str(bindir / "initdb"),
            "-D",
            str(data),
            "-U",
            "postgres",
            "--auth=trust",
            "-E",
            "UTF8",
            "--no-sync",
        )
        options = (
            f"-p {port} -k {sockets} -c listen_addresses=127.0.0.1 -c fsync=off "
            "-c synchronous_commit=off -c full_page_writes=off"
        )
        _as_postgres(
            str(bindir / "pg_ctl"),
            "-D",
            str(data),
            "-o",
            options,
            "-l",
            str(log),
            "-w",
            "-t",
            "60",
            "start",
        )
        started = True
        _as_postgres(
            str(bindir / "createdb"),
            "-h",
            "127.0.0.1",
            "-p",
            str(port),
            "-U",
            "postgres",
            "heldout_test",
        )
        yield f"postgresql+psycopg://postgres@127.0.0.1:{port}/heldout_test"
    finally:
        if started:
            subprocess.run(
                [
                    "runuser",
                    "-u",
                    "postgres",
                    "--",
                    str(bindir / "pg_ctl"),
                    "-D",
                    str(data),
                    "-m",
                    "immediate",
                    "-w",
                    "-t",
                    "60",
                    "stop",
                ],
                capture_output=True,
                timeout=90,
            )
        shutil.rmtree(base, ignore_errors=True)


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh, empty database with the service's tables, on each backend."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'heldout.sqlite3'}"
        return
    url = request.getfixturevalue("postgres_url")
    engine = make_engine(url)
    try:
        schema.metadata.drop_all(engine)
    finally:
        engine.dispose()
    yield url


def store_of(app: Flask) -> Store:
    """The app's store (what ``service.api.app.get_store`` returns)."""
    store = app.extensions["heldout_store"]
    assert isinstance(store, Store)
    return store


@pytest.fixture
def app(database_url: str) -> Iterator[Flask]:
    from service import create_app

    application = create_app({"DATABASE_URL": database_url, "TESTING": True, **TEST_SETTINGS})
    store = store_of(application)
    store.init_schema()
    yield application
    store.dispose()


@pytest.fixture
def store(app: Flask) -> Store:
    return store_of(app)


@pytest.fixture
def client(app: Flask) -> FlaskClient:
    return app.test_client()


@dataclass
class ApiUser:
    """A token bound to the test client: ``user.get(path)`` sends its Bearer header."""

    client: FlaskClient
    token: str
    token_id: str
    role: str
    group: str | None

    def _headers(self, headers: dict[str, str] | None) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.token}", **(headers or {})}

    def get(self, path: str, headers: dict[str, str] | None = None, **kw: Any) -> Any:
        return self.client.get(path, headers=self._headers(headers), **kw)

    def post(self, path: str, headers: dict[str, str] | None = None, **kw: Any) -> Any:
        return self.client.post(path, headers=self._headers(headers), **kw)


def _user(app: Flask, client: FlaskClient, role: str, group: str | None) -> ApiUser:
    record, secret = store_of(app).create_token(role, group, f"test {role}")
    return ApiUser(client, secret, record.id, role, group)


@pytest.fixture
def admin(app: Flask, client: FlaskClient) -> ApiUser:
    return _user(app, client, "admin", None)


@pytest.fixture
def owner(app: Flask, client: FlaskClient) -> ApiUser:
    return _user(app, client, "owner", "team-a")


@pytest.fixture
def other_owner(app: Flask, client: FlaskClient) -> ApiUser:
    return _user(app, client, "owner", "team-b")


@pytest.fixture
def submitter(app: Flask, client: FlaskClient) -> ApiUser:
    return _user(app, client, "submitter", "g1")


@pytest.fixture
def other_submitter(app: Flask, client: FlaskClient) -> ApiUser:
    return _user(app, client, "submitter", "g2")


@pytest.fixture
def make_user(app: Flask, client: FlaskClient) -> Any:
    """Factory for further tokens: ``make_user("submitter", "g3")``."""

    def make(role: str, group: str | None = None) -> ApiUser:
        return _user(app, client, role, group)

    return make
