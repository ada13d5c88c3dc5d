"""Schema migrations (Alembic): upgrade a database, and check that it is the one we expect.

The revision scripts in ``versions/`` are the schema's history; ``service.store.schema`` is
its present, and a test fails when the two disagree. ``upgrade`` brings a database to the
newest revision (``heldout db upgrade``); ``check_schema`` is what the service runs before
it serves (the gunicorn master before forking, each worker as it boots): a database at any
other revision, or with no revision at all, stops the service with a message that names the
revision found, the one expected and the command to run.

An unversioned database that already holds exactly this version's tables (created by
``heldout db init`` before there were migrations) is adopted by ``upgrade``: its revision
is recorded without touching a table. One with other tables is refused.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import sqlalchemy as sa
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from alembic.util.exc import CommandError

from .. import schema

SCRIPT_LOCATION = Path(__file__).resolve().parent
VERSION_TABLE = "alembic_version"
# pg_advisory_xact_lock key taken by every upgrade on PostgreSQL ("heldout" as ASCII, < 2**63).
ADVISORY_LOCK_KEY = 0x68656C646F7574
UPGRADE_COMMAND = "heldout db upgrade"


class SchemaVersionError(RuntimeError):
    """The database is not at the revision this version of the service expects.

    A ``RuntimeError``, so gunicorn's master prints the message alone and exits 1.
    """

    def __init__(self, message: str, found: str | None, expected: str) -> None:
        super().__init__(message)
        self.found = found
        self.expected = expected


class UpgradeRefused(RuntimeError):
    """``upgrade`` will not touch this database (its tables are not ones it can migrate)."""


def alembic_config(
    connection: sa.Connection | None = None, script_location: Path = SCRIPT_LOCATION
) -> Config:
    """An Alembic configuration for the packaged scripts; ``connection`` is used if given.

    ``script_location`` is another scripts folder (tests: a copy with a further revision).
    """
    config = Config()
    config.set_main_option("script_location", str(script_location))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


@lru_cache(maxsize=4)
def _scripts(script_location: Path) -> ScriptDirectory:
    return ScriptDirectory.from_config(alembic_config(script_location=script_location))


def head_revision(script_location: Path = SCRIPT_LOCATION) -> str:
    """The newest revision in ``versions/``: the one this code's schema corresponds to."""
    heads = _scripts(script_location).get_heads()
    if len(heads) != 1:  # a merge revision is missing; the test suite catches this first
        raise RuntimeError(f"the migrations have {len(heads)} heads: {', '.join(heads)}")
    return heads[0]


def known_revision(revision: str, script_location: Path = SCRIPT_LOCATION) -> bool:
    """Whether ``revision`` is one of this version's scripts."""
    try:
        return _scripts(script_location).get_revision(revision) is not None
    except CommandError:
        return False


def current_revisions(connection: sa.Connection) -> tuple[str, ...] | None:
    """The revisions recorded in the database; None when it has no version table."""
    if not sa.inspect(connection).has_table(VERSION_TABLE):
        return None
    return tuple(MigrationContext.configure(connection).get_current_heads())


def _service_tables(connection: sa.Connection) -> list[str]:
    present = set(sa.inspect(connection).get_table_names())
    return sorted(present & set(schema.metadata.tables))


def schema_differences(connection: sa.Connection) -> list[object]:
    """What differs between the database's tables and ``schema.metadata`` (Alembic's diff).

    Empty when they agree: every table, column (type, nullability), index and unique
    constraint of ``schema.py`` and nothing more (the version table aside).
    """
    context = MigrationContext.configure(connection, opts={"compare_type": True})
    return [
        diff
        for diff in compare_metadata(context, schema.metadata)
        if not (diff[0] == "remove_table" and diff[1].name == VERSION_TABLE)
    ]


def _display(url: sa.URL) -> str:
    return url.render_as_string(hide_password=True)


def check_schema(engine: sa.Engine, script_location: Path = SCRIPT_LOCATION) -> str:
    """Return the database's revision when it is this version's head; else raise.

    Raises ``SchemaVersionError`` (no version table, an older revision, an unknown one) with
    a message naming what was found, what is expected and what to run. Connection errors
    (``sqlalchemy.exc.OperationalError``) pass through: the caller may retry those.
    """
    expected = head_revision(script_location)
    where = _display(engine.url)
    with engine.connect() as connection:
        found = current_revisions(connection)
        tables = _service_tables(connection) if found is None else []
    if found == (expected,):
        return expected
    if not found:  # no version table, or an empty one (every revision downgraded)
        state = "has Heldout's tables but no schema revision" if tables else "is empty"
        message = (
            f"The database {where} {state} (found revision: none, expected {expected}). "
            f"Run `{UPGRADE_COMMAND}` with this version, then start the service."
        )
        raise SchemaVersionError(message, None, expected)
    shown = ", ".join(found)
    if all(known_revision(r, script_location) for r in found):
        message = (
            f"The database {where} is at schema revision {shown}; this version of Heldout "
            f"expects {expected}. Run `{UPGRADE_COMMAND}` with this version, then start "
            "the service."
        )
    else:
        message = (
            f"The database {where} is at schema revision {shown}, which this version of "
            f"Heldout does not know (it expects {expected}): a newer version has migrated it. "
            "Run the version that migrated it; `heldout db upgrade` of this version cannot "
            "help."
        )
    raise SchemaVersionError(message, found[0] if len(found) == 1 else shown, expected)


@dataclass(frozen=True)
class UpgradeResult:
    """What ``upgrade`` did: the revision before (None: unversioned) and after."""

    before: str | None
    after: str
    adopted: bool = False  # an unversioned database with this version's tables, stamped


def upgrade(
    engine: sa.Engine, revision: str = "head", script_location: Path = SCRIPT_LOCATION
) -> UpgradeResult:
    """Run every pending migration (one transaction; serialized on PostgreSQL).

    An unversioned database with exactly this version's tables is stamped at the head
    instead; one with some of the tables or different ones raises ``UpgradeRefused``.
    """
    with engine.connect() as connection:
        before = current_revisions(connection)
        if before is None and _service_tables(connection):
            differences = schema_differences(connection)
            connection.rollback()
            if differences:
                first = "; ".join(str(d) for d in differences[:3])
                raise UpgradeRefused(
                    f"The database {_display(engine.url)} has Heldout tables but no schema "
                    f"revision, and they differ from this version's schema in "
                    f"{len(differences)} places ({first}). Migrate it by hand, or start "
                    "from an empty database."
                )
            command.stamp(alembic_config(connection, script_location), "head")
            after = head_revision(script_location)
            return UpgradeResult(None, after, adopted=True)
        if connection.in_transaction():
            connection.rollback()
        command.upgrade(alembic_config(connection, script_location), revision)
        after_revisions = current_revisions(connection)
        if connection.in_transaction():
            connection.rollback()
    start = None if not before else ", ".join(before)
    return UpgradeResult(start, ", ".join(after_revisions or ()))


__all__ = [
    "ADVISORY_LOCK_KEY",
    "SCRIPT_LOCATION",
    "UPGRADE_COMMAND",
    "VERSION_TABLE",
    "SchemaVersionError",
    "UpgradeRefused",
    "UpgradeResult",
    "alembic_config",
    "check_schema",
    "current_revisions",
    "head_revision",
    "known_revision",
    "schema_differences",
    "upgrade",
]
