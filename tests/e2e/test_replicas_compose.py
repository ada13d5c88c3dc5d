"""The compose stack runs two replicas behind nginx after a one-shot migration (no docker here).

The file is read as YAML and checked against the Compose specification's meaning of its
keys (``deploy.replicas``, ``depends_on.condition: service_completed_successfully``,
``expose`` versus ``ports``): the migration is the CLI's real ``heldout db upgrade``, the
replicas share the image and the database URL with it and publish no host port (two
replicas cannot both bind one), and the proxy's upstream is the replicas' port.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml

from service.cli import build_parser

ROOT = Path(__file__).resolve().parents[2]


def _services() -> dict[str, Any]:
    return yaml.safe_load((ROOT / "docker" / "compose.yaml").read_text(encoding="utf-8"))[
        "services"
    ]


def test_migration_runs_once_before_two_replicas() -> None:
    services = _services()
    migrate, service = services["migrate"], services["service"]
    assert migrate["command"] == ["heldout", "db", "upgrade"]
    args = build_parser().parse_args(migrate["command"][1:])  # a real CLI command
    assert (args.command, args.db_command) == ("db", "upgrade")
    assert migrate["restart"] == "no"
    assert migrate["depends_on"]["db"]["condition"] == "service_healthy"
    assert migrate["image"] == service["image"] and migrate["build"] == service["build"]
    url = service["environment"]["HELDOUT_DATABASE_URL"]
    assert migrate["environment"]["HELDOUT_DATABASE_URL"] == url
    assert service["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
    assert service["deploy"]["replicas"] == 2
    # Replicas publish no host port (two cannot bind one); the proxy publishes 8000.
    assert "ports" not in service
    port = service["environment"]["HELDOUT_BIND"].rsplit(":", 1)[1]
    assert service["expose"] == [port]


def test_proxy_round_robins_over_the_replicas() -> None:
    services = _services()
    proxy, service = services["proxy"], services["service"]
    assert proxy["image"].startswith("nginx:")
    assert proxy["ports"] == ["8000:8000"]
    assert proxy["depends_on"]["service"]["condition"] == "service_healthy"
    assert "./nginx.conf:/etc/nginx/nginx.conf:ro" in proxy["volumes"]
    conf = (ROOT / "docker" / "nginx.conf").read_text(encoding="utf-8")
    port = service["environment"]["HELDOUT_BIND"].rsplit(":", 1)[1]
    # nginx's default balancing is round-robin (nginx docs, ngx_http_upstream_module).
    upstream = re.search(r"upstream (\w+) \{(.*?)\}", conf, flags=re.S)
    assert upstream is not None
    assert re.search(rf"^\s*server service:{port}\b", upstream.group(2), flags=re.M)
    assert not re.search(r"\b(ip_hash|hash|least_conn|random)\b", upstream.group(2))
    assert re.search(rf"proxy_pass http://{upstream.group(1)};", conf)
    assert re.search(r"^\s*listen 8000;", conf, flags=re.M)
    assert conf.count("{") == conf.count("}")
