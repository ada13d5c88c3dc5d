"""The ``heldout`` command: tokens, database, settings, serve's command line."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from service import create_app
from service.cli import gunicorn_argv, main
from service.settings import SETTINGS


def _run(capsys: Any, *argv: str) -> tuple[int, str, str]:
    status = main(list(argv))
    out, err = capsys.readouterr()
    return status, out, err


def test_token_lifecycle(capsys: Any, database_url: str) -> None:
    db = ("--database-url", database_url)
    status, out, err = _run(
        capsys,
        *db,
        "tokens",
        "create",
        "--role",
        "submitter",
        "--group",
        "g1",
        "--label",
        "ci pipeline",
    )
    assert status == 0
    token = out.strip()
    assert out == token + "\n"  # the token alone on stdout, for scripts
    assert token.startswith("hdt_") and len(token) >= 4 + 43
    assert "shown only once" in err and token not in err

    status, out, _ = _run(capsys, *db, "tokens", "list", "--json")
    [row] = json.loads(out)
    assert row["role"] == "submitter" and row["group"] == "g1" and row["label"] == "ci pipeline"
    assert row["revoked_at"] is None and token not in out

    app = create_app({"DATABASE_URL": database_url})
    client = app.test_client()
    headers = {"Authorization": f"Bearer {token}"}
    assert client.get("/v1/holdouts", headers=headers).status_code == 200

    assert _run(capsys, *db, "tokens", "revoke", row["id"])[0] == 0
    assert client.get("/v1/holdouts", headers=headers).status_code == 401
    status, out, _ = _run(capsys, *db, "tokens", "list")
    assert row["id"] in out and "revoked_at" in out.splitlines()[0]
    assert _run(capsys, *db, "tokens", "revoke", "tok_nosuchtoken")[0] == 1
    app.extensions["heldout_store"].dispose()


def test_only_hashes_are_stored(capsys: Any, tmp_path: Path) -> None:
    path = tmp_path / "db.sqlite3"
    status, out, _ = _run(
        capsys, "--database-url", f"sqlite:///{path}", "tokens", "create", "--role", "owner"
    )
    token = out.strip()
    raw = path.read_bytes() + b"".join(p.read_bytes() for p in tmp_path.glob("db.sqlite3-*"))
    assert token.encode() not in raw and token[4:].encode() not in raw


@pytest.mark.parametrize(
    "argv",
    [
        ("tokens", "create", "--role", "submitter"),
        ("tokens", "create", "--role", "submitter", "--group", "no spaces"),
    ],
)
def test_token_create_refuses_bad_groups(capsys: Any, tmp_path: Path, argv: tuple) -> None:
    status, out, err = _run(capsys, "--database-url", f"sqlite:///{tmp_path / 'x.db'}", *argv)
    assert status == 2 and out == "" and "group" in err


def test_db_init_is_idempotent(capsys: Any, database_url: str) -> None:
    assert _run(capsys, "--database-url", database_url, "db", "init")[0] == 0
    assert _run(capsys, "--database-url", database_url, "db", "init")[0] == 0


def test_settings_table_lists_every_variable(capsys: Any) -> None:
    status, out, _ = _run(capsys, "settings")
    assert status == 0
    for s in SETTINGS:
        assert f"`{s.env}`" in out


def test_serve_runs_gunicorn_with_the_config_module() -> None:
    assert gunicorn_argv() == [
        "gunicorn",
        "--config",
        "python:service.api.gunicorn_conf",
        "service:create_app()",
    ]
    assert gunicorn_argv("0.0.0.0:9000", 4)[3:7] == ["--bind", "0.0.0.0:9000", "--workers", "4"]


def test_console_script_is_installed(tmp_path: Path) -> None:
    script = Path(sys.executable).parent / "heldout"
    assert script.exists(), "pip install -e . declares the heldout console script"
    env = {**os.environ, "HELDOUT_DATABASE_URL": f"sqlite:///{tmp_path / 'c.db'}"}
    done = subprocess.run(
        [str(script), "tokens", "create", "--role", "admin"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert done.stdout.startswith("hdt_") and done.stdout.count("\n") == 1
