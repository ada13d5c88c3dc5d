"""Idempotency keys: which submission a group's key created on a holdout, and for what request.

The key row is written by ``Store.insert_submission_rows`` in the transaction that stores the
submission (``NewSubmission.idempotency_key``), under the unique constraint
``uq_idempotency_keys_scope`` on (holdout, group, key). So a key names at most one stored
submission, whichever of two racing requests commits first; the other's transaction fails
on the constraint and stores nothing, and ``find_key`` then gives it the winner's submission.
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlalchemy as sa

from . import schema
from .store import Store


@dataclass(frozen=True)
class KeyRecord:
    """A used Idempotency-Key: the submission it created and the request's digest."""

    submission_id: str
    request_digest: str


def find_key(store: Store, holdout_id: str, group: str, key: str) -> KeyRecord | None:
    """The submission ``group`` created on ``holdout_id`` with ``key``, or None."""
    t = schema.idempotency_keys
    query = sa.select(t.c.submission_id, t.c.request_digest).where(
        t.c.holdout_id == holdout_id, t.c.group_name == group, t.c.key == key
    )
    with store.engine.connect() as conn:
        row = conn.execute(query).first()
    return None if row is None else KeyRecord(row.submission_id, row.request_digest)


__all__ = ["KeyRecord", "find_key"]
