"""Baseline: every table as service/store/schema.py declared it when migrations began.

Revision ID: 0001
Revises: (none)
Created: 2026-12-02

Frozen: later schema changes are new revisions on top of this one, never edits here.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "holdouts",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("owner", sa.String(length=100), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("task", sa.String(length=16), nullable=False),
        sa.Column("n_rows", sa.Integer(), nullable=False),
        sa.Column("classes", sa.Text(), nullable=True),
        sa.Column("policy", sa.Text(), nullable=False),
        sa.Column("fingerprint", sa.String(length=64), nullable=False),
        sa.Column("created_by", sa.String(length=32), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("feedback_rows", sa.Integer(), nullable=True),
        sa.Column("closed_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("owner", "name", name="uq_holdouts_owner_name"),
    )
    op.create_table(
        "tokens",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("group_name", sa.String(length=64), nullable=True),
        sa.Column("label", sa.String(length=200), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("token_hash"),
    )
    op.create_table(
        "group_states",
        sa.Column("holdout_id", sa.String(length=32), nullable=False),
        sa.Column("group_name", sa.String(length=64), nullable=False),
        sa.Column("quota_day", sa.String(length=10), nullable=True),
        sa.Column("quota_used", sa.Integer(), nullable=False),
        sa.Column("best_submission_id", sa.String(length=32), nullable=True),
        sa.Column("best_loss", sa.Float(), nullable=True),
        sa.Column("reported_loss", sa.Float(), nullable=True),
        sa.Column("n_improvements", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["holdout_id"],
            ["holdouts.id"],
        ),
        sa.PrimaryKeyConstraint("holdout_id", "group_name"),
    )
    op.create_table(
        "holdout_data",
        sa.Column("holdout_id", sa.String(length=32), nullable=False),
        sa.Column("salt", sa.LargeBinary(length=32), nullable=False),
        sa.Column("ids", sa.LargeBinary(), nullable=False),
        sa.Column("labels", sa.LargeBinary(), nullable=False),
        sa.Column("split_seed", sa.BigInteger(), nullable=True),
        sa.Column("feedback_mask", sa.LargeBinary(), nullable=True),
        sa.ForeignKeyConstraint(
            ["holdout_id"],
            ["holdouts.id"],
        ),
        sa.PrimaryKeyConstraint("holdout_id"),
    )
    op.create_table(
        "submissions",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("holdout_id", sa.String(length=32), nullable=False),
        sa.Column("group_name", sa.String(length=64), nullable=False),
        sa.Column("token_id", sa.String(length=32), nullable=False),
        sa.Column("model", sa.String(length=200), nullable=False),
        sa.Column("n_seeds", sa.Integer(), nullable=False),
        sa.Column("seeds", sa.Text(), nullable=False),
        sa.Column("sweep_name", sa.String(length=200), nullable=True),
        sa.Column("sweep_complexity", sa.Float(), nullable=True),
        sa.Column("primary_metric", sa.String(length=64), nullable=False),
        sa.Column("primary_value", sa.Float(), nullable=True),
        sa.Column("report", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["holdout_id"],
            ["holdouts.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(
        "ix_submissions_holdout_group",
        "submissions",
        ["holdout_id", "group_name", "created_at"],
        unique=False,
    )

    op.create_table(
        "idempotency_keys",
        sa.Column("submission_id", sa.String(length=32), nullable=False),
        sa.Column("holdout_id", sa.String(length=32), nullable=False),
        sa.Column("group_name", sa.String(length=64), nullable=False),
        sa.Column("key", sa.String(length=255), nullable=False),
        sa.Column("request_digest", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["holdout_id"],
            ["holdouts.id"],
        ),
        sa.ForeignKeyConstraint(
            ["submission_id"],
            ["submissions.id"],
        ),
        sa.PrimaryKeyConstraint("submission_id"),
        sa.UniqueConstraint("holdout_id", "group_name", "key", name="uq_idempotency_keys_scope"),
    )
    op.create_table(
        "submission_data",
        sa.Column("submission_id", sa.String(length=32), nullable=False),
        sa.Column("row_loss", sa.String(length=32), nullable=False),
        sa.Column("row_losses", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(
            ["submission_id"],
            ["submissions.id"],
        ),
        sa.PrimaryKeyConstraint("submission_id"),
    )
    op.create_table(
        "submission_guards",
        sa.Column("submission_id", sa.String(length=32), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("improved", sa.Boolean(), nullable=True),
        sa.Column("shown_submission_id", sa.String(length=32), nullable=False),
        sa.Column("reported_loss", sa.Float(), nullable=True),
        sa.Column("message", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["submission_id"],
            ["submissions.id"],
        ),
        sa.PrimaryKeyConstraint("submission_id"),
    )
    op.create_table(
        "submission_slices",
        sa.Column("submission_id", sa.String(length=32), nullable=False),
        sa.Column("slice", sa.String(length=16), nullable=False),
        sa.Column("n_rows", sa.Integer(), nullable=False),
        sa.Column("primary_value", sa.Float(), nullable=True),
        sa.Column("report", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["submission_id"],
            ["submissions.id"],
        ),
        sa.PrimaryKeyConstraint("submission_id", "slice"),
    )


def downgrade() -> None:
    op.drop_table("submission_slices")
    op.drop_table("submission_guards")
    op.drop_table("submission_data")
    op.drop_table("idempotency_keys")
    op.drop_index("ix_submissions_holdout_group", table_name="submissions")

    op.drop_table("submissions")
    op.drop_table("holdout_data")
    op.drop_table("group_states")
    op.drop_table("tokens")
    op.drop_table("holdouts")
