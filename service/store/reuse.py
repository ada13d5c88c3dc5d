"""Storage for reusing a holdout safely: slice reports, guard outcomes, quotas, closing.

A scored submission is stored by ``store_scored_submission`` in one transaction whose first
statement is a conditional update of the group's row in ``group_states``:

- it counts the submission against the group's daily quota, and matches no row when the
  quota is used up (``... WHERE quota_used < :quota``), so two concurrent submissions
  cannot both take the last slot;
- it locks the group's row until commit (PostgreSQL: a row lock that a concurrent update of
  the same row waits for, then re-checks its condition against; SQLite: the database's
  write lock, taken by the transaction's first statement, so the busy timeout applies), so
  the Ladder's state is read and written by one submission of a group at a time.

The same transaction checks that the holdout is open (PostgreSQL: ``FOR SHARE`` on the
holdout row, which ``close_holdout``'s update waits for), inserts the submission, its per-row
losses, its slice reports and its guard outcome, and updates the Ladder's state. A refused or
failed submission rolls all of it back, quota slot included.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa
from numpy.typing import NDArray

from . import schema
from .blobs import decode_array
from .store import NewSubmission, Store, StoreError, SubmissionRecord

FEEDBACK = "feedback"
RESERVE = "reserve"
FULL = "full"
SLICES = (FEEDBACK, RESERVE, FULL)


class QuotaExceededError(StoreError):
    """The group has used its daily quota of scored submissions on this holdout."""

    def __init__(self, day: str, quota: int) -> None:
        super().__init__(f"daily quota {quota} used on {day}")
        self.day = day
        self.quota = quota


class HoldoutClosedError(StoreError):
    """The holdout is closed: it takes no further submissions."""

    def __init__(self, closed_at: datetime) -> None:
        super().__init__(f"closed at {closed_at.isoformat()}")
        self.closed_at = closed_at


@dataclass(frozen=True)
class SliceReport:
    """The scoring core's report of one submission on one slice of the holdout's rows."""

    slice: str  # feedback or reserve (the full-set report lives in submissions.report)
    n_rows: int
    primary_value: float | None
    report: dict[str, Any]


@dataclass(frozen=True)
class GroupState:
    """One group's row in ``group_states``: the Ladder's state and today's quota counter."""

    holdout_id: str
    group: str
    quota_day: str | None
    quota_used: int
    best_submission_id: str | None
    best_loss: float | None  # exact feedback loss of the best; owner-only
    reported_loss: float | None
    n_improvements: int


@dataclass(frozen=True)
class LadderUpdate:
    """The Ladder's new state for a group, after an accepted improvement."""

    best_submission_id: str
    best_loss: float
    reported_loss: float
    n_improvements: int


@dataclass(frozen=True)
class GuardRecord:
    """What the guard told the group about one submission."""

    submission_id: str
    kind: str
    improved: bool | None
    shown_submission_id: str
    reported_loss: float | None
    message: str


@dataclass(frozen=True)
class GuardOutcome:
    """A guard's decision, made inside the storing transaction."""

    kind: str
    improved: bool | None
    shown_submission_id: str
    reported_loss: float | None
    message: str
    update: LadderUpdate | None = None


Decide = Callable[[GroupState, "NDArray[np.float64] | None", SubmissionRecord], GuardOutcome]
"""``decide(state, best_row_losses, record)``: the guard's outcome for the new submission.

``best_row_losses`` are the stored per-row losses (all rows, holdout order) of the group's
best submission, or None when the group has none yet."""


def _state(row: Any) -> GroupState:
    return GroupState(
        holdout_id=row.holdout_id,
        group=row.group_name,
        quota_day=row.quota_day,
        quota_used=int(row.quota_used),
        best_submission_id=row.best_submission_id,
        best_loss=row.best_loss,
        reported_loss=row.reported_loss,
        n_improvements=int(row.n_improvements),
    )


def utc_day(now: datetime | None = None) -> str:
    """The UTC calendar day of ``now`` (default: the current time) as ``YYYY-MM-DD``."""
    return (now or datetime.now(UTC)).astimezone(UTC).strftime("%Y-%m-%d")


def ensure_group_state(store: Store, holdout_id: str, group: str) -> None:
    """Create the group's ``group_states`` row if missing (its own transaction; idempotent)."""
    gs = schema.group_states
    where = (gs.c.holdout_id == holdout_id, gs.c.group_name == group)
    with store.engine.connect() as conn:
        if conn.execute(sa.select(gs.c.holdout_id).where(*where)).first() is not None:
            return
    try:
        with store.engine.begin() as conn:
            conn.execute(
                gs.insert().values(
                    holdout_id=holdout_id, group_name=group, quota_used=0, n_improvements=0
                )
            )
    except sa.exc.IntegrityError:
        pass  # a concurrent request created it


def group_state(store: Store, holdout_id: str, group: str) -> GroupState | None:
    gs = schema.group_states
    with store.engine.connect() as conn:
        row = conn.execute(
            sa.select(gs).where(gs.c.holdout_id == holdout_id, gs.c.group_name == group)
        ).first()
    return None if row is None else _state(row)


def group_states(store: Store, holdout_id: str) -> dict[str, GroupState]:
    """Every group's state on a holdout, by group name."""
    gs = schema.group_states
    with store.engine.connect() as conn:
        rows = conn.execute(sa.select(gs).where(gs.c.holdout_id == holdout_id)).all()
    return {row.group_name: _state(row) for row in rows}


def quota_used(store: Store, holdout_id: str, group: str, day: str) -> int:
    """Scored submissions the group has stored on ``day`` (a cheap check before scoring)."""
    state = group_state(store, holdout_id, group)
    if state is None or state.quota_day != day:
        return 0
    return state.quota_used


def store_scored_submission(
    store: Store,
    new: NewSubmission,
    slices: Sequence[SliceReport],
    *,
    day: str,
    daily_quota: int | None,
    decide: Decide,
) -> tuple[SubmissionRecord, GuardRecord]:
    """Store a scored submission with its slices and guard outcome, in one transaction.

    Raises ``QuotaExceededError`` when the group's quota for ``day`` is used up and
    ``HoldoutClosedError`` when the holdout is closed; then nothing is stored and no quota
    slot is used. Exceptions raised by ``decide`` roll everything back too.
    """
    ensure_group_state(store, new.holdout_id, new.group)
    gs, h, d = schema.group_states, schema.holdouts, schema.submission_data
    where = (gs.c.holdout_id == new.holdout_id, gs.c.group_name == new.group)
    with store.engine.begin() as conn:
        # First statement: count the slot and lock the group's row (module docstring).
        count = gs.update().where(*where)
        if daily_quota is not None:
            count = count.where(
                sa.or_(
                    gs.c.quota_day.is_(None),
                    gs.c.quota_day != day,
                    gs.c.quota_used < daily_quota,
                )
            )
        counted = conn.execute(
            count.values(
                quota_day=day,
                quota_used=sa.case((gs.c.quota_day == day, gs.c.quota_used + 1), else_=1),
            )
        )
        if counted.rowcount != 1:
            raise QuotaExceededError(day, int(daily_quota or 0))
        closed_at = conn.execute(
            sa.select(h.c.closed_at).where(h.c.id == new.holdout_id).with_for_update(read=True)
        ).scalar_one()
        if closed_at is not None:
            raise HoldoutClosedError(_utc(closed_at))
        state = _state(conn.execute(sa.select(gs).where(*where)).one())
        best: NDArray[np.float64] | None = None
        if state.best_submission_id is not None:
            blob = conn.execute(
                sa.select(d.c.row_losses).where(d.c.submission_id == state.best_submission_id)
            ).scalar_one()
            best = decode_array(blob)
        record = Store.insert_submission_rows(conn, new)
        for part in slices:
            conn.execute(
                schema.submission_slices.insert().values(
                    submission_id=record.id,
                    slice=part.slice,
                    n_rows=part.n_rows,
                    primary_value=part.primary_value,
                    report=orjson.dumps(part.report).decode(),
                )
            )
        outcome = decide(state, best, record)
        conn.execute(
            schema.submission_guards.insert().values(
                submission_id=record.id,
                kind=outcome.kind,
                improved=outcome.improved,
                shown_submission_id=outcome.shown_submission_id,
                reported_loss=outcome.reported_loss,
                message=outcome.message,
            )
        )
        if outcome.update is not None:
            u = outcome.update
            conn.execute(
                gs.update()
                .where(*where)
                .values(
                    best_submission_id=u.best_submission_id,
                    best_loss=u.best_loss,
                    reported_loss=u.reported_loss,
                    n_improvements=u.n_improvements,
                )
            )
    guard = GuardRecord(
        submission_id=record.id,
        kind=outcome.kind,
        improved=outcome.improved,
        shown_submission_id=outcome.shown_submission_id,
        reported_loss=outcome.reported_loss,
        message=outcome.message,
    )
    return record, guard


def _utc(value: datetime) -> datetime:
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)


def close_holdout(store: Store, holdout_id: str) -> tuple[datetime, bool]:
    """Close a holdout (idempotent). Returns ``(closed_at, newly_closed)``.

    The update waits for in-flight submission transactions of the holdout (which hold
    ``FOR SHARE`` on its row on PostgreSQL; SQLite's write lock orders them), so every
    submission is stored either before the close or not at all.
    """
    h = schema.holdouts
    with store.engine.begin() as conn:
        result = conn.execute(
            h.update()
            .where(h.c.id == holdout_id, h.c.closed_at.is_(None))
            .values(closed_at=datetime.now(UTC))
        )
        closed_at = conn.execute(sa.select(h.c.closed_at).where(h.c.id == holdout_id)).scalar_one()
    return _utc(closed_at), result.rowcount == 1


def revealed_secrets(store: Store, holdout_id: str) -> tuple[bytes, int | None]:
    """The salt and the split seed of a holdout (for a closed holdout's public view)."""
    d = schema.holdout_data
    with store.engine.connect() as conn:
        row = conn.execute(
            sa.select(d.c.salt, d.c.split_seed).where(d.c.holdout_id == holdout_id)
        ).one()
    return bytes(row.salt), row.split_seed


def split_seed(store: Store, holdout_id: str) -> int | None:
    """The split seed alone (owners see it; it lets them recompute the stored mask)."""
    return revealed_secrets(store, holdout_id)[1]


def slice_reports(
    store: Store, submission_ids: Iterable[str], *, with_report: bool = True
) -> dict[str, dict[str, SliceReport]]:
    """``{submission_id: {slice: SliceReport}}`` for the given submissions."""
    ids = list(dict.fromkeys(submission_ids))
    if not ids:
        return {}
    t = schema.submission_slices
    columns = [t.c.submission_id, t.c.slice, t.c.n_rows, t.c.primary_value]
    if with_report:
        columns.append(t.c.report)
    out: dict[str, dict[str, SliceReport]] = {}
    with store.engine.connect() as conn:
        for row in conn.execute(sa.select(*columns).where(t.c.submission_id.in_(ids))):
            out.setdefault(row.submission_id, {})[row.slice] = SliceReport(
                slice=row.slice,
                n_rows=int(row.n_rows),
                primary_value=row.primary_value,
                report=orjson.loads(row.report) if with_report else {},
            )
    return out


def slice_values(store: Store, holdout_id: str, slice_name: str) -> dict[str, float | None]:
    """Every submission's primary value on one slice of a holdout, by submission id."""
    s, t = schema.submissions, schema.submission_slices
    query = (
        sa.select(t.c.submission_id, t.c.primary_value)
        .join(s, s.c.id == t.c.submission_id)
        .where(s.c.holdout_id == holdout_id, t.c.slice == slice_name)
    )
    with store.engine.connect() as conn:
        return {row.submission_id: row.primary_value for row in conn.execute(query)}


def guard_records(store: Store, submission_ids: Iterable[str]) -> dict[str, GuardRecord]:
    ids = list(dict.fromkeys(submission_ids))
    if not ids:
        return {}
    t = schema.submission_guards
    with store.engine.connect() as conn:
        rows = conn.execute(sa.select(t).where(t.c.submission_id.in_(ids))).all()
    return {
        row.submission_id: GuardRecord(
            submission_id=row.submission_id,
            kind=row.kind,
            improved=row.improved,
            shown_submission_id=row.shown_submission_id,
            reported_loss=row.reported_loss,
            message=row.message,
        )
        for row in rows
    }


def row_losses(store: Store, submission_ids: Iterable[str]) -> dict[str, NDArray[np.float64]]:
    """Stored per-row losses (all rows, holdout order) of the given submissions. Sealed."""
    ids = list(dict.fromkeys(submission_ids))
    if not ids:
        return {}
    d = schema.submission_data
    with store.engine.connect() as conn:
        rows = conn.execute(
            sa.select(d.c.submission_id, d.c.row_losses).where(d.c.submission_id.in_(ids))
        ).all()
    return {row.submission_id: decode_array(row.row_losses) for row in rows}


__all__ = [
    "FEEDBACK",
    "FULL",
    "RESERVE",
    "SLICES",
    "Decide",
    "GroupState",
    "GuardOutcome",
    "GuardRecord",
    "HoldoutClosedError",
    "LadderUpdate",
    "QuotaExceededError",
    "SliceReport",
    "close_holdout",
    "ensure_group_state",
    "group_state",
    "group_states",
    "guard_records",
    "quota_used",
    "revealed_secrets",
    "row_losses",
    "slice_reports",
    "slice_values",
    "split_seed",
    "store_scored_submission",
    "utc_day",
]
