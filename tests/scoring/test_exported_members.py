"""The scoring core's public list is complete and the core never imports Flask or a database."""

from __future__ import annotations

import subprocess
import sys

import service.scoring


def test_every_public_name_is_importable() -> None:
    for name in service.scoring.__all__:
        assert hasattr(service.scoring, name), name
    assert sorted(service.scoring.__all__) == sorted(set(service.scoring.__all__))


def test_core_imports_no_web_or_database_module() -> None:
    code = (
        "import sys, service.scoring; "
        "bad = [m for m in ('flask', 'sqlalchemy', 'psycopg', 'werkzeug', 'marshmallow') "
        "if m in sys.modules]; print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
