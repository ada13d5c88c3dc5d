"""A real gunicorn refuses to start on a database that is not at this version's revision."""

from __future__ import annotations

import os
import signal
import subprocess
from pathlib import Path

import requests
import sqlalchemy as sa
from gunicorn_server import BIN, free_port, running_gunicorn

from service.cli import gunicorn_argv
from service.store import make_engine
from service.store.migrations import VERSION_TABLE, head_revision


def _start(tmp_path: Path, url: str) -> subprocess.CompletedProcess[str]:
    argv = gunicorn_argv()
    argv[0] = str(BIN / argv[0])
    env = {
        **os.environ,
        "HELDOUT_DATABASE_URL": url,
        "HELDOUT_BIND": f"127.0.0.1:{free_port()}",
        "HELDOUT_WORKERS": "1",
    }
    # The master exits by itself; the timeout only bounds a failure of this test.
    return subprocess.run(argv, env=env, cwd=tmp_path, capture_output=True, text=True, timeout=60)


def test_gunicorn_refuses_an_empty_database(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'empty.sqlite3'}"
    done = _start(tmp_path, url)
    assert done.returncode == 1
    assert "is empty (found revision: none" in done.stderr
    assert f"expected {head_revision()}" in done.stderr
    assert "Run `heldout db upgrade`" in done.stderr


def test_gunicorn_refuses_an_unknown_revision_and_serves_after_upgrade(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'db.sqlite3'}"
    assert (
        subprocess.run([str(BIN / "heldout"), "--database-url", url, "db", "upgrade"]).returncode
        == 0
    )
    engine = make_engine(url)
    try:
        with engine.begin() as conn:  # as if a newer version had migrated it
            conn.execute(sa.text(f"UPDATE {VERSION_TABLE} SET version_num = 'f00dcafe'"))
        done = _start(tmp_path, url)
        assert done.returncode == 1
        assert "at schema revision f00dcafe, which this version of Heldout does not know" in (
            done.stderr
        )
        with engine.begin() as conn:
            conn.execute(
                sa.text(f"UPDATE {VERSION_TABLE} SET version_num = :v"), {"v": head_revision()}
            )
    finally:
        engine.dispose()
    with running_gunicorn(tmp_path, {"HELDOUT_DATABASE_URL": url, "HELDOUT_WORKERS": "1"}) as srv:
        assert requests.get(f"{srv.base}/readyz", timeout=10).status_code == 200


def test_a_worker_booting_on_a_migrated_database_stops_the_server(tmp_path: Path) -> None:
    """A worker started after another version migrated the database does not serve it."""
    url = f"sqlite:///{tmp_path / 'db.sqlite3'}"
    upgrade = [str(BIN / "heldout"), "--database-url", url, "db", "upgrade"]
    assert subprocess.run(upgrade).returncode == 0
    settings = {"HELDOUT_DATABASE_URL": url, "HELDOUT_WORKERS": "1"}
    with running_gunicorn(tmp_path, settings) as srv:
        engine = make_engine(url)
        try:
            with engine.begin() as conn:  # a newer version's upgrade, while this one runs
                conn.execute(sa.text(f"UPDATE {VERSION_TABLE} SET version_num = 'f00dcafe'"))
        finally:
            engine.dispose()
        # The worker that booted before the change keeps answering...
        assert requests.get(f"{srv.base}/healthz", timeout=10).status_code == 200
        pids = subprocess.run(
            ["pgrep", "-P", str(srv.proc.pid)], capture_output=True, text=True, check=True
        ).stdout.split()
        assert len(pids) == 1
        os.kill(int(pids[0]), signal.SIGKILL)  # gunicorn boots a replacement, which checks
        assert srv.proc.wait(timeout=60) == 3  # gunicorn's "worker failed to boot" exit
    log = srv.log.read_text(encoding="utf-8")
    assert "at schema revision f00dcafe, which this version of Heldout does not know" in log
    assert "Worker failed to boot" in log
