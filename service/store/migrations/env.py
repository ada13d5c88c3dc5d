"""Alembic's environment for Heldout's migrations.

Two ways in: ``service.store.migrations`` passes its own connection in
``config.attributes["connection"]`` (``heldout db upgrade``, the store, the tests); the
``alembic`` command line (``alembic.ini`` at the repository root, for writing a revision)
connects to ``HELDOUT_DATABASE_URL``. Either way every pending revision runs in one
transaction, and on PostgreSQL that transaction first takes an advisory lock, so replicas
upgrading one database at the same moment run the migrations once, one after the other.
"""

from __future__ import annotations

import os

from alembic import context
from sqlalchemy import Connection, text

from service.store import schema
from service.store.migrations import ADVISORY_LOCK_KEY


def _run(connection: Connection) -> None:
    if connection.dialect.name == "postgresql":
        # Held until the transaction ends: a second upgrader waits, then finds nothing to do.
        connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": ADVISORY_LOCK_KEY})
    context.configure(
        connection=connection,
        target_metadata=schema.metadata,
        compare_type=True,
        render_as_batch=connection.dialect.name == "sqlite",
    )
    with context.begin_transaction():
        context.run_migrations()
    if connection.in_transaction():
        connection.commit()


def _main() -> None:
    connection = context.config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    from service.settings import load_settings
    from service.store import make_engine

    url = (
        context.config.get_main_option("sqlalchemy.url")
        or load_settings(os.environ)["DATABASE_URL"]
    )
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            _run(connection)
    finally:
        engine.dispose()


if context.is_offline_mode():
    raise SystemExit("Heldout's migrations run online only (heldout db upgrade).")
_main()
