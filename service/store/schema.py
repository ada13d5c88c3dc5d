"""Every table of the service, in one ``MetaData``.

Secrets and sealed values live in tables of their own (``holdout_data``, ``submission_data``)
so that every query for metadata reads only metadata; only ``Store`` methods whose names say
so ever select from them. Uniqueness is the database's job: a token hash, a holdout name per
owner. Timestamps are timezone-aware UTC.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import (
    BigInteger,
    Boolean,
    Column,
    Connection,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
    event,
    text,
)

metadata = MetaData()

tokens = Table(
    "tokens",
    metadata,
    Column("id", String(32), primary_key=True),
    # SHA-256 of the whole token text, hex; the token itself is never stored.
    Column("token_hash", String(64), nullable=False, unique=True),
    Column("role", String(16), nullable=False),
    Column("group_name", String(64), nullable=True),
    Column("label", String(200), nullable=True),
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("revoked_at", DateTime(timezone=True), nullable=True),
)

holdouts = Table(
    "holdouts",
    metadata,
    Column("id", String(32), primary_key=True),
    # Owner identity: "group:<name>" for a token with a group, else "token:<token id>".
    Column("owner", String(100), nullable=False),
    Column("name", String(200), nullable=False),
    Column("task", String(16), nullable=False),
    Column("n_rows", Integer, nullable=False),
    Column("classes", Text, nullable=True),  # JSON list of class names, in index order
    Column("policy", Text, nullable=False),  # JSON object, normalized (defaults filled in)
    Column("fingerprint", String(64), nullable=False),
    Column("created_by", String(32), nullable=False),  # token id
    Column("created_at", DateTime(timezone=True), nullable=False),
    # Rows in the feedback slice (the rest is the sealed reserve); see holdout_data.
    Column("feedback_rows", Integer, nullable=True),
    # Set once by POST /close: no further submissions, the salt and the reserve revealed.
    Column("closed_at", DateTime(timezone=True), nullable=True),
    UniqueConstraint("owner", "name", name="uq_holdouts_owner_name"),
)

holdout_data = Table(
    "holdout_data",
    metadata,
    Column("holdout_id", String(32), ForeignKey("holdouts.id"), primary_key=True),
    Column("salt", LargeBinary(32), nullable=False),  # secret until a later reveal
    Column("ids", LargeBinary, nullable=False),  # compressed array, registration order
    Column("labels", LargeBinary, nullable=False),  # float64 targets or int32 class indices
    # The feedback/reserve split, drawn once at registration and never changed: the seed of
    # service.scoring.split.feedback_mask and the mask itself (compressed uint8, 1 = feedback).
    Column("split_seed", BigInteger, nullable=True),
    Column("feedback_mask", LargeBinary, nullable=True),
)

submissions = Table(
    "submissions",
    metadata,
    Column("id", String(32), primary_key=True),
    Column("holdout_id", String(32), ForeignKey("holdouts.id"), nullable=False),
    Column("group_name", String(64), nullable=False),
    Column("token_id", String(32), nullable=False),
    Column("model", String(200), nullable=False),
    Column("n_seeds", Integer, nullable=False),
    Column("seeds", Text, nullable=False),  # JSON list of seed labels
    Column("sweep_name", String(200), nullable=True),
    Column("sweep_complexity", Float, nullable=True),
    Column("primary_metric", String(64), nullable=False),
    Column("primary_value", Float, nullable=True),  # NULL when the metric is undefined
    Column("report", Text, nullable=False),  # JSON of the scoring core's Report
    Column("created_at", DateTime(timezone=True), nullable=False),
    Index("ix_submissions_holdout_group", "holdout_id", "group_name", "created_at"),
)

submission_data = Table(
    "submission_data",
    metadata,
    Column("submission_id", String(32), ForeignKey("submissions.id"), primary_key=True),
    Column("row_loss", String(32), nullable=False),  # which per-row loss: squared, log, ...
    # Per-row losses of the primary loss in holdout row order, averaged over seeds; compressed.
    Column("row_losses", LargeBinary, nullable=False),
)

submission_slices = Table(
    "submission_slices",
    metadata,
    # The scoring core's report of a submission on one slice of the holdout's rows
    # (``feedback`` or ``reserve``; the full-set report is submissions.report).
    Column("submission_id", String(32), ForeignKey("submissions.id"), primary_key=True),
    Column("slice", String(16), primary_key=True),
    Column("n_rows", Integer, nullable=False),
    Column("primary_value", Float, nullable=True),
    Column("report", Text, nullable=False),
)

submission_guards = Table(
    "submission_guards",
    metadata,
    # What the holdout's guard told the group about this submission.
    Column("submission_id", String(32), ForeignKey("submissions.id"), primary_key=True),
    Column("kind", String(16), nullable=False),  # ladder, rounded or none
    Column("improved", Boolean, nullable=True),  # ladder only
    # The submission whose feedback view the group is shown (itself unless the Ladder
    # found no improvement, then the group's best at that moment).
    Column("shown_submission_id", String(32), nullable=False),
    Column("reported_loss", Float, nullable=True),  # the Ladder's reported (rounded) loss
    Column("message", Text, nullable=False),
)

group_states = Table(
    "group_states",
    metadata,
    # One row per group and holdout: the Ladder's state and the day's quota counter. Every
    # scored submission updates this row first, in the transaction that stores it, so
    # submissions of one group serialize on it (row lock; SQLite's write lock).
    Column("holdout_id", String(32), ForeignKey("holdouts.id"), primary_key=True),
    Column("group_name", String(64), primary_key=True),
    Column("quota_day", String(10), nullable=True),  # UTC date, YYYY-MM-DD
    Column("quota_used", Integer, nullable=False),
    Column("best_submission_id", String(32), nullable=True),
    Column("best_loss", Float, nullable=True),  # exact; owner-only
    Column("reported_loss", Float, nullable=True),
    Column("n_improvements", Integer, nullable=False),
)

idempotency_keys = Table(
    "idempotency_keys",
    metadata,
    # One row per Idempotency-Key a group used on a holdout, written in the transaction that
    # stores the submission it created: a retry finds that submission here, and two requests
    # racing with one key cannot both store one (the unique constraint refuses the second).
    Column("submission_id", String(32), ForeignKey("submissions.id"), primary_key=True),
    Column("holdout_id", String(32), ForeignKey("holdouts.id"), nullable=False),
    Column("group_name", String(64), nullable=False),
    Column("key", String(255), nullable=False),
    # SHA-256 (hex) of the request as the service read it: media type, form or query fields,
    # body bytes after Content-Encoding. The same key with another request is refused.
    Column("request_digest", String(64), nullable=False),
    Column("created_at", DateTime(timezone=True), nullable=False),
    UniqueConstraint("holdout_id", "group_name", "key", name="uq_idempotency_keys_scope"),
)


@event.listens_for(metadata, "after_drop")
def _forget_revision(_target: MetaData, connection: Connection, **_kw: Any) -> None:
    """``metadata.drop_all`` empties the database, so Alembic's revision record goes too.

    Otherwise a later upgrade would read the old revision and create nothing.
    """
    connection.execute(text("DROP TABLE IF EXISTS alembic_version"))


__all__ = [
    "group_states",
    "holdout_data",
    "idempotency_keys",
    "holdouts",
    "metadata",
    "submission_data",
    "submission_guards",
    "submission_slices",
    "submissions",
    "tokens",
]
