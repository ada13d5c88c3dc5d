"""The docker files agree with each other and with the README (docker cannot run here).

The compose service runs exactly the gunicorn command the README documents in a fenced code
block, which is also the Dockerfile's CMD and what ``heldout serve`` runs.
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import yaml

from service.cli import gunicorn_argv

ROOT = Path(__file__).resolve().parents[2]
COMMAND = ["gunicorn", "--config", "python:service.api.gunicorn_conf", "service:create_app()"]


def _compose() -> dict:
    return yaml.safe_load((ROOT / "docker" / "compose.yaml").read_text(encoding="utf-8"))


def _fenced_lines(markdown: str) -> list[str]:
    blocks = re.findall(r"^```[^\n]*\n(.*?)^```", markdown, flags=re.M | re.S)
    return [line.strip() for block in blocks for line in block.splitlines() if line.strip()]


def _words(line: str) -> list[str]:
    """A fenced line as shell words; a line continued onto the next (``\\``) is not a command."""
    try:
        return shlex.split(line)
    except ValueError:
        return []


def test_compose_runs_the_documented_command() -> None:
    compose = _compose()
    command = compose["services"]["service"]["command"]
    if isinstance(command, str):
        command = shlex.split(command)
    assert command == COMMAND == gunicorn_argv()
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    documented = [_words(line.removeprefix("$ ")) for line in _fenced_lines(readme)]
    assert COMMAND in documented, (
        "README.md must show the server command in a fenced code block: " + shlex.join(COMMAND)
    )


def test_compose_wires_postgres() -> None:
    services = _compose()["services"]
    assert services["db"]["image"] == "postgres:15"
    env = services["service"]["environment"]
    assert env["HELDOUT_DATABASE_URL"].startswith("postgresql+psycopg://")
    assert "@db:5432/" in env["HELDOUT_DATABASE_URL"]
    assert services["service"]["depends_on"]["db"]["condition"] == "service_healthy"
    assert "pg_isready" in " ".join(services["db"]["healthcheck"]["test"])
    assert "/readyz" in " ".join(services["service"]["healthcheck"]["test"])


def test_dockerfile() -> None:
    text = (ROOT / "docker" / "Dockerfile").read_text(encoding="utf-8")
    assert re.search(r"^FROM python:3\.\d+-slim$", text, flags=re.M)
    users = re.findall(r"^USER (\S+)$", text, flags=re.M)
    assert users and users[-1] not in ("root", "0")
    [cmd] = re.findall(r"^CMD (\[.*\])$", text, flags=re.M)
    assert json.loads(cmd) == COMMAND
    assert "pip install ." in text
