"""Alembic migrations: they build exactly ``schema.py``, and the service refuses other schemas.

Every test runs on SQLite and on the throwaway PostgreSQL cluster (``database_url``). The
drift check is Alembic's own comparison (``alembic.autogenerate.compare_metadata``) between
an upgraded database and ``service.store.schema.metadata``: a change to ``schema.py``
without a revision (or a revision without the change) fails here.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from service.cli import main
from service.store import make_engine, schema
from service.store.migrations import (
    SCRIPT_LOCATION,
    VERSION_TABLE,
    SchemaVersionError,
    UpgradeRefused,
    check_schema,
    current_revisions,
    head_revision,
    schema_differences,
    upgrade,
)


@pytest.fixture
def engine(database_url: str) -> Any:
    eng = make_engine(database_url)
    yield eng
    eng.dispose()


def _differences(engine: sa.Engine) -> list[object]:
    with engine.connect() as conn:
        return schema_differences(conn)


def test_one_head_and_a_frozen_baseline() -> None:
    scripts = sorted((SCRIPT_LOCATION / "versions").glob("*.py"))
    assert scripts, "the baseline revision is packaged with the service"
    assert head_revision()
    for script in scripts:
        # A revision describes the schema of its day: it must not read today's schema.py.
        assert "service.store.schema" not in script.read_text(encoding="utf-8"), script.name


def test_upgrade_from_empty_builds_exactly_schema_py(engine: sa.Engine) -> None:
    result = upgrade(engine)
    assert result.before is None and result.after == head_revision() and not result.adopted
    assert check_schema(engine) == head_revision()
    # reference: alembic.autogenerate.compare_metadata (tables, columns, types, nullability,
    # indexes, unique constraints) between the migrated database and schema.py's MetaData.
    assert _differences(engine) == []
    with engine.connect() as conn:
        tables = set(sa.inspect(conn).get_table_names())
    assert tables == set(schema.metadata.tables) | {VERSION_TABLE}
    # A second upgrade changes nothing.
    again = upgrade(engine)
    assert again.before == again.after == head_revision()


def test_the_drift_check_sees_a_difference(engine: sa.Engine) -> None:
    """The comparison above can fail: an index missing from the database is reported."""
    upgrade(engine)
    with engine.begin() as conn:
        conn.execute(sa.text("DROP INDEX ix_submissions_holdout_group"))
    differences = _differences(engine)
    assert [d[0] for d in differences] == ["add_index"]
    assert differences[0][1].name == "ix_submissions_holdout_group"


def test_refuses_an_empty_database(engine: sa.Engine) -> None:
    with pytest.raises(SchemaVersionError) as info:
        check_schema(engine)
    message = str(info.value)
    assert "is empty" in message and "found revision: none" in message
    assert f"expected {head_revision()}" in message and "heldout db upgrade" in message
    assert info.value.found is None and info.value.expected == head_revision()


def test_refuses_tables_without_a_version_and_upgrade_adopts_them(engine: sa.Engine) -> None:
    # How `heldout db init` made databases before there were migrations.
    schema.metadata.create_all(engine)
    with pytest.raises(SchemaVersionError, match="no schema revision.*heldout db upgrade"):
        check_schema(engine)
    result = upgrade(engine)
    assert result.adopted and result.before is None and result.after == head_revision()
    assert check_schema(engine) == head_revision()
    assert _differences(engine) == []


def test_upgrade_refuses_unversioned_tables_that_differ(engine: sa.Engine) -> None:
    schema.metadata.create_all(engine)
    with engine.begin() as conn:
        conn.execute(sa.text("DROP INDEX ix_submissions_holdout_group"))
    with pytest.raises(UpgradeRefused, match="differ from this version's schema in 1 places"):
        upgrade(engine)
    with engine.connect() as conn:
        assert current_revisions(conn) is None  # nothing recorded


def test_drop_all_forgets_the_revision(engine: sa.Engine) -> None:
    upgrade(engine)
    schema.metadata.drop_all(engine)
    with engine.connect() as conn:
        assert sa.inspect(conn).get_table_names() == []
    assert upgrade(engine).before is None
    assert _differences(engine) == []


_NEXT_REVISION = '''"""A later revision, as a newer version would ship it (test only)."""

import sqlalchemy as sa
from alembic import op

revision = "9999"
down_revision = "{head}"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table("probe_table", sa.Column("id", sa.Integer(), primary_key=True))


def downgrade() -> None:
    op.drop_table("probe_table")
'''


@pytest.fixture
def newer_scripts(tmp_path: Path, engine: sa.Engine) -> Any:
    """A copy of the scripts with one revision more: what a newer version would ship."""
    location = tmp_path / "migrations"
    shutil.copytree(SCRIPT_LOCATION, location, ignore=shutil.ignore_patterns("__pycache__"))
    text = _NEXT_REVISION.format(head=head_revision())
    (location / "versions" / "9999_probe.py").write_text(text, encoding="utf-8")
    yield location
    with engine.begin() as conn:  # the shared PostgreSQL database outlives this test
        conn.execute(sa.text("DROP TABLE IF EXISTS probe_table"))


def test_refuses_an_older_revision(engine: sa.Engine, newer_scripts: Path) -> None:
    upgrade(engine)  # this version's head, which the newer scripts consider old
    with pytest.raises(SchemaVersionError) as info:
        check_schema(engine, script_location=newer_scripts)
    message = str(info.value)
    assert f"at schema revision {head_revision()}" in message
    assert "expects 9999" in message and "Run `heldout db upgrade`" in message
    # The newer version's upgrade then brings it forward and its check passes.
    assert upgrade(engine, script_location=newer_scripts).after == "9999"
    assert check_schema(engine, script_location=newer_scripts) == "9999"


def test_refuses_an_unknown_newer_revision(engine: sa.Engine, newer_scripts: Path) -> None:
    upgrade(engine, script_location=newer_scripts)  # migrated by the newer version
    with pytest.raises(SchemaVersionError) as info:
        check_schema(engine)
    message = str(info.value)
    assert "at schema revision 9999, which this version of Heldout does not know" in message
    assert f"expects {head_revision()}" in message
    assert info.value.found == "9999"


def test_refuses_an_emptied_version_table(engine: sa.Engine) -> None:
    upgrade(engine)
    with engine.begin() as conn:
        conn.execute(sa.text(f"DELETE FROM {VERSION_TABLE}"))
    with pytest.raises(SchemaVersionError, match="found revision: none"):
        check_schema(engine)


def test_cli_db_upgrade_check_and_init(capsys: Any, database_url: str) -> None:
    db = ("--database-url", database_url)
    assert main([*db, "db", "check"]) == 1
    assert "heldout db upgrade" in capsys.readouterr().err
    assert main([*db, "db", "upgrade"]) == 0
    assert f"to {head_revision()}" in capsys.readouterr().err
    assert main([*db, "db", "init"]) == 0  # kept as a name for upgrade
    assert f"already at revision {head_revision()}" in capsys.readouterr().err
    assert main([*db, "db", "check"]) == 0
    assert capsys.readouterr().out.strip() == head_revision()
