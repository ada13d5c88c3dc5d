"""The one object that talks to the database.

``Store`` owns a SQLAlchemy engine, created lazily in the process that first uses it and
re-created after a fork (a pooled connection must never cross a fork), so gunicorn workers
each get their own; nothing connects at import time. Every write is one
``with engine.begin()`` transaction. Reads of sealed data (labels, salt, per-row losses) go
through the methods whose names say so, and decoded holdout arrays are cached per process:
they never change once registered.
"""

from __future__ import annotations

import base64
import hashlib
import os
import secrets
import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from functools import cached_property
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa
from numpy.typing import NDArray
from sqlalchemy.engine import Engine

from service.roles import ROLES

from . import schema
from .blobs import decode_array, decode_text, encode_array

TOKEN_PREFIX = "hdt_"
TOKEN_RANDOM_BYTES = 32


class StoreError(Exception):
    """Base of the store's own errors."""


class UnknownTokenError(StoreError):
    """No token has that id."""


class DuplicateHoldoutNameError(StoreError):
    """The owner already has a holdout of that name (the database refused a second)."""


def _new_id(prefix: str) -> str:
    """Random, unguessable object id: a prefix and 16 base32 characters (80 bits)."""
    return prefix + base64.b32encode(secrets.token_bytes(10)).decode("ascii").lower()


def _now() -> datetime:
    return datetime.now(UTC)


def _utc(value: datetime | None) -> datetime | None:
    """SQLite returns naive datetimes; every stored datetime is UTC."""
    if value is None or value.tzinfo is not None:
        return value
    return value.replace(tzinfo=UTC)


def _json_or_none(value: Any) -> str | None:
    return None if value is None else orjson.dumps(value).decode()


def hash_token(secret: str) -> str:
    """SHA-256 of the token text, hex: the only form in which a token is stored."""
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


def new_token_secret() -> str:
    """``hdt_`` followed by 32 random bytes, URL-safe base64 (43 characters)."""
    return TOKEN_PREFIX + secrets.token_urlsafe(TOKEN_RANDOM_BYTES)


@dataclass(frozen=True)
class TokenRecord:
    id: str
    role: str
    group: str | None
    label: str | None
    created_at: datetime
    revoked_at: datetime | None

    @property
    def owner_identity(self) -> str:
        """Who owns the holdouts this token registers: its group if it has one, else itself."""
        return f"group:{self.group}" if self.group else f"token:{self.id}"


@dataclass(frozen=True)
class HoldoutRecord:
    id: str
    owner: str
    name: str
    task: str
    n_rows: int
    classes: list[str] | None
    policy: dict[str, Any]
    fingerprint: str
    created_by: str
    created_at: datetime
    feedback_rows: int | None = None  # rows in the feedback slice; the rest is the reserve
    closed_at: datetime | None = None  # set once, by closing the holdout


@dataclass(frozen=True)
class NewHoldout:
    owner: str
    name: str
    task: str
    classes: list[str] | None
    policy: dict[str, Any]
    created_by: str
    ids: NDArray  # (n,) str, registration order
    labels: NDArray  # (n,) float64 targets or integer class indices
    salt: bytes
    fingerprint: str
    split_seed: int | None = None  # seed of the feedback/reserve split
    feedback_mask: NDArray | None = None  # (n,) bool, True = feedback row


@dataclass
class HoldoutArrays:
    """A holdout's sealed arrays, decoded once per process (immutable)."""

    ids: NDArray  # (n,) str (fixed-width <U or object), registration order
    labels: NDArray  # (n,) float64 or intp class indices
    salt: bytes
    feedback_mask: NDArray | None = None  # (n,) bool, True = feedback row; None: no split
    split_seed: int | None = None
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def __post_init__(self) -> None:
        # Cached and shared by every request of the process: a write would change the
        # holdout for all of them, so numpy refuses one.
        for array in (self.ids, self.labels, self.feedback_mask):
            if array is not None:
                array.flags.writeable = False

    @cached_property
    def sorted_ids(self) -> NDArray:
        """The ids in ascending code-point order: the order ``GET /ids`` publishes.

        Publishing the registration order could leak the labels (a file sorted by target),
        so the public order is one that depends on the ids alone.
        """
        with self._lock:
            ordered = np.sort(self.ids, kind="stable")
            ordered.flags.writeable = False
            return ordered


@dataclass(frozen=True)
class SubmissionRecord:
    id: str
    holdout_id: str
    group: str
    token_id: str
    model: str
    n_seeds: int
    seeds: list[str]
    sweep_name: str | None
    sweep_complexity: float | None
    primary_metric: str
    primary_value: float | None
    created_at: datetime
    report: dict[str, Any] | None = None  # None when only the summary was read


@dataclass(frozen=True)
class NewSubmission:
    holdout_id: str
    group: str
    token_id: str
    model: str
    seeds: list[str]
    sweep_name: str | None
    sweep_complexity: float | None
    primary_metric: str
    primary_value: float | None
    report: dict[str, Any]
    row_loss: str
    row_losses: NDArray[np.float64]  # (n,) in holdout row order
    # The client's Idempotency-Key and the digest of its request, stored with the submission
    # (schema.idempotency_keys); None when the request carried no key.
    idempotency_key: str | None = None
    request_digest: str | None = None


@dataclass(frozen=True)
class SweepMember:
    """One submission of a sweep with its stored per-row losses (sealed; never returned)."""

    submission: SubmissionRecord
    row_loss: str
    row_losses: NDArray[np.float64]


def make_engine(url: str) -> Engine:
    """An engine for ``url``; SQLite gets WAL, a busy timeout and enforced foreign keys."""
    if url.startswith("sqlite"):
        engine = sa.create_engine(url, connect_args={"timeout": 30})

        @sa.event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
            cursor = dbapi_connection.cursor()
            cursor.execute("PRAGMA foreign_keys=ON")
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA synchronous=NORMAL")
            cursor.close()

        return engine
    return sa.create_engine(url, pool_pre_ping=True)


_SUMMARY_COLUMNS = (
    schema.submissions.c.id,
    schema.submissions.c.holdout_id,
    schema.submissions.c.group_name,
    schema.submissions.c.token_id,
    schema.submissions.c.model,
    schema.submissions.c.n_seeds,
    schema.submissions.c.seeds,
    schema.submissions.c.sweep_name,
    schema.submissions.c.sweep_complexity,
    schema.submissions.c.primary_metric,
    schema.submissions.c.primary_value,
    schema.submissions.c.created_at,
)


class Store:
    """Tokens, holdouts and submissions in one SQL database (SQLite or PostgreSQL)."""

    def __init__(self, url: str, *, label_cache_size: int = 8) -> None:
        self.url = url
        self._engine: Engine | None = None
        self._pid: int | None = None
        self._lock = threading.Lock()
        self._cache: OrderedDict[str, HoldoutArrays] = OrderedDict()
        self._cache_size = label_cache_size
        # Called with (hit, arrays) on every holdout_arrays lookup: the API's metrics count
        # label-cache hits and misses (service/api/metrics.py); None outside the app.
        self.label_cache_observer: Callable[[bool, HoldoutArrays], None] | None = None

    # -- connection lifetime -------------------------------------------------------------

    @property
    def engine(self) -> Engine:
        """This process's engine, created on first use and again after a fork."""
        pid = os.getpid()
        with self._lock:
            if self._engine is None or self._pid != pid:
                if self._engine is not None:
                    # Inherited from the parent: drop its pool without closing its sockets.
                    self._engine.dispose(close=False)
                self._cache.clear()
                self._engine = make_engine(self.url)
                self._pid = pid
            return self._engine

    def dispose(self) -> None:
        """Close this process's connections (tests and the gunicorn master before forking)."""
        with self._lock:
            if self._engine is not None and self._pid == os.getpid():
                self._engine.dispose()
            self._engine = None
            self._pid = None

    def init_schema(self) -> None:
        """Bring the database to the newest schema revision (Alembic migrations; idempotent).

        An empty database gets every table; ``service.store.migrations`` explains the rest.
        """
        from .migrations import upgrade

        upgrade(self.engine)

    def ping(self) -> None:
        """Run a trivial query; raises if the database is unreachable."""
        with self.engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))

    # -- tokens --------------------------------------------------------------------------

    def create_token(
        self, role: str, group: str | None = None, label: str | None = None
    ) -> tuple[TokenRecord, str]:
        """Store a new token's hash; return its record and the token text (shown once)."""
        if role not in ROLES:
            raise ValueError(f"role must be one of {', '.join(ROLES)}; got {role!r}")
        if role == "submitter" and not group:
            raise ValueError("a submitter token needs a group")
        if label is not None and len(label) > 200:
            raise ValueError(f"a label has at most 200 characters, got {len(label)}")
        secret = new_token_secret()
        record = TokenRecord(_new_id("tok_"), role, group or None, label or None, _now(), None)
        with self.engine.begin() as conn:
            conn.execute(
                schema.tokens.insert().values(
                    id=record.id,
                    token_hash=hash_token(secret),
                    role=record.role,
                    group_name=record.group,
                    label=record.label,
                    created_at=record.created_at,
                    revoked_at=None,
                )
            )
        return record, secret

    @staticmethod
    def _token(row: Any) -> TokenRecord:
        return TokenRecord(
            row.id, row.role, row.group_name, row.label, _utc(row.created_at), _utc(row.revoked_at)
        )

    def list_tokens(self) -> list[TokenRecord]:
        t = schema.tokens
        query = sa.select(
            t.c.id, t.c.role, t.c.group_name, t.c.label, t.c.created_at, t.c.revoked_at
        ).order_by(t.c.created_at, t.c.id)
        with self.engine.connect() as conn:
            return [self._token(row) for row in conn.execute(query)]

    def revoke_token(self, token_id: str) -> TokenRecord:
        """Mark a token revoked (idempotent); raises ``UnknownTokenError``."""
        t = schema.tokens
        with self.engine.begin() as conn:
            conn.execute(
                t.update()
                .where(t.c.id == token_id, t.c.revoked_at.is_(None))
                .values(revoked_at=_now())
            )
            row = conn.execute(sa.select(t).where(t.c.id == token_id)).first()
        if row is None:
            raise UnknownTokenError(token_id)
        return self._token(row)

    def authenticate(self, secret: str) -> TokenRecord | None:
        """The live (unrevoked) token with this text, or None."""
        t = schema.tokens
        with self.engine.connect() as conn:
            row = conn.execute(
                sa.select(t).where(t.c.token_hash == hash_token(secret), t.c.revoked_at.is_(None))
            ).first()
        return None if row is None else self._token(row)

    # -- holdouts ------------------------------------------------------------------------

    @staticmethod
    def _holdout(row: Any) -> HoldoutRecord:
        return HoldoutRecord(
            id=row.id,
            owner=row.owner,
            name=row.name,
            task=row.task,
            n_rows=row.n_rows,
            classes=None if row.classes is None else orjson.loads(row.classes),
            policy=orjson.loads(row.policy),
            fingerprint=row.fingerprint,
            created_by=row.created_by,
            created_at=_utc(row.created_at),
            feedback_rows=row.feedback_rows,
            closed_at=_utc(row.closed_at),
        )

    def insert_holdout(self, new: NewHoldout) -> HoldoutRecord:
        """Store a holdout and its sealed arrays in one transaction.

        Raises ``DuplicateHoldoutNameError`` when the owner already has that name: the
        unique constraint decides, so two concurrent registrations cannot both win.
        """
        record = HoldoutRecord(
            id=_new_id("ho_"),
            owner=new.owner,
            name=new.name,
            task=new.task,
            n_rows=int(new.ids.shape[0]),
            classes=new.classes,
            policy=new.policy,
            fingerprint=new.fingerprint,
            created_by=new.created_by,
            created_at=_now(),
            feedback_rows=None if new.feedback_mask is None else int(new.feedback_mask.sum()),
        )
        labels = new.labels.astype(np.float64 if new.task == "regression" else np.int32)
        try:
            with self.engine.begin() as conn:
                conn.execute(
                    schema.holdouts.insert().values(
                        id=record.id,
                        owner=record.owner,
                        name=record.name,
                        task=record.task,
                        n_rows=record.n_rows,
                        classes=_json_or_none(record.classes),
                        policy=orjson.dumps(record.policy, option=orjson.OPT_SORT_KEYS).decode(),
                        fingerprint=record.fingerprint,
                        created_by=record.created_by,
                        created_at=record.created_at,
                        feedback_rows=record.feedback_rows,
                    )
                )
                conn.execute(
                    schema.holdout_data.insert().values(
                        holdout_id=record.id,
                        salt=new.salt,
                        ids=encode_array(new.ids),
                        labels=encode_array(labels),
                        split_seed=new.split_seed,
                        feedback_mask=None
                        if new.feedback_mask is None
                        else encode_array(np.asarray(new.feedback_mask, dtype=np.uint8)),
                    )
                )
        except sa.exc.IntegrityError as exc:
            if self.holdout_by_name(new.owner, new.name) is not None:
                raise DuplicateHoldoutNameError(new.name) from None
            raise exc
        return record

    def get_holdout(self, holdout_id: str) -> HoldoutRecord | None:
        h = schema.holdouts
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(h).where(h.c.id == holdout_id)).first()
        return None if row is None else self._holdout(row)

    def holdout_by_name(self, owner: str, name: str) -> HoldoutRecord | None:
        h = schema.holdouts
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(h).where(h.c.owner == owner, h.c.name == name)).first()
        return None if row is None else self._holdout(row)

    def list_holdouts(self, owner: str | None = None) -> list[HoldoutRecord]:
        """Holdouts, oldest first; only ``owner``'s when given."""
        h = schema.holdouts
        query = sa.select(h).order_by(h.c.created_at, h.c.id)
        if owner is not None:
            query = query.where(h.c.owner == owner)
        with self.engine.connect() as conn:
            return [self._holdout(row) for row in conn.execute(query)]

    def set_policy_entry(self, holdout_id: str, key: str, value: Any) -> HoldoutRecord:
        """Set (or, with None, remove) one entry of a holdout's policy JSON; the new record.

        For the few policy entries that change after registration (the holdout-wide
        reference submission); read and written in one transaction, the row locked on
        PostgreSQL so two concurrent changes do not lose one.
        """
        h = schema.holdouts
        with self.engine.begin() as conn:
            row = conn.execute(
                sa.select(h.c.policy).where(h.c.id == holdout_id).with_for_update()
            ).first()
            if row is None:
                raise KeyError(holdout_id)
            policy = orjson.loads(row.policy)
            if value is None:
                policy.pop(key, None)
            else:
                policy[key] = value
            conn.execute(
                h.update()
                .where(h.c.id == holdout_id)
                .values(policy=orjson.dumps(policy, option=orjson.OPT_SORT_KEYS).decode())
            )
        record = self.get_holdout(holdout_id)
        assert record is not None
        return record

    def holdout_arrays(self, holdout_id: str) -> HoldoutArrays:
        """The sealed ids, labels and salt of a holdout (decoded once per process)."""
        engine = self.engine  # after a fork this also empties the inherited cache
        with self._lock:
            cached = self._cache.get(holdout_id)
            if cached is not None:
                self._cache.move_to_end(holdout_id)
        if cached is not None:
            if self.label_cache_observer is not None:
                self.label_cache_observer(True, cached)
            return cached
        d = schema.holdout_data
        with engine.connect() as conn:
            row = conn.execute(sa.select(d).where(d.c.holdout_id == holdout_id)).first()
        if row is None:
            raise KeyError(holdout_id)
        labels = decode_array(row.labels)
        if labels.dtype.kind in "iu":
            labels = labels.astype(np.intp)
        mask = None if row.feedback_mask is None else decode_array(row.feedback_mask).astype(bool)
        arrays = HoldoutArrays(
            ids=decode_text(row.ids),
            labels=labels,
            salt=bytes(row.salt),
            feedback_mask=mask,
            split_seed=row.split_seed,
        )
        with self._lock:
            self._cache[holdout_id] = arrays
            while len(self._cache) > self._cache_size:
                self._cache.popitem(last=False)
        if self.label_cache_observer is not None:
            self.label_cache_observer(False, arrays)
        return arrays

    # -- submissions ---------------------------------------------------------------------

    @staticmethod
    def _submission(row: Any, with_report: bool) -> SubmissionRecord:
        return SubmissionRecord(
            id=row.id,
            holdout_id=row.holdout_id,
            group=row.group_name,
            token_id=row.token_id,
            model=row.model,
            n_seeds=row.n_seeds,
            seeds=orjson.loads(row.seeds),
            sweep_name=row.sweep_name,
            sweep_complexity=row.sweep_complexity,
            primary_metric=row.primary_metric,
            primary_value=row.primary_value,
            created_at=_utc(row.created_at),
            report=orjson.loads(row.report) if with_report else None,
        )

    def insert_submission(self, new: NewSubmission) -> SubmissionRecord:
        """Store a scored submission and its per-row losses in one transaction."""
        with self.engine.begin() as conn:
            return self.insert_submission_rows(conn, new)

    @staticmethod
    def insert_submission_rows(conn: sa.Connection, new: NewSubmission) -> SubmissionRecord:
        """Insert a submission and its per-row losses within the caller's transaction."""
        record = SubmissionRecord(
            id=_new_id("sub_"),
            holdout_id=new.holdout_id,
            group=new.group,
            token_id=new.token_id,
            model=new.model,
            n_seeds=len(new.seeds),
            seeds=list(new.seeds),
            sweep_name=new.sweep_name,
            sweep_complexity=new.sweep_complexity,
            primary_metric=new.primary_metric,
            primary_value=new.primary_value,
            created_at=_now(),
            report=new.report,
        )
        conn.execute(
            schema.submissions.insert().values(
                id=record.id,
                holdout_id=record.holdout_id,
                group_name=record.group,
                token_id=record.token_id,
                model=record.model,
                n_seeds=record.n_seeds,
                seeds=orjson.dumps(record.seeds).decode(),
                sweep_name=record.sweep_name,
                sweep_complexity=record.sweep_complexity,
                primary_metric=record.primary_metric,
                primary_value=record.primary_value,
                report=orjson.dumps(record.report).decode(),
                created_at=record.created_at,
            )
        )
        conn.execute(
            schema.submission_data.insert().values(
                submission_id=record.id,
                row_loss=new.row_loss,
                row_losses=encode_array(np.asarray(new.row_losses, dtype=np.float64)),
            )
        )
        if new.idempotency_key is not None:
            # In the same transaction: a key already taken (a concurrent retry) rolls it all back.
            conn.execute(
                schema.idempotency_keys.insert().values(
                    submission_id=record.id,
                    holdout_id=record.holdout_id,
                    group_name=record.group,
                    key=new.idempotency_key,
                    request_digest=new.request_digest,
                    created_at=record.created_at,
                )
            )
        return record

    def get_submission(self, submission_id: str) -> SubmissionRecord | None:
        s = schema.submissions
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(s).where(s.c.id == submission_id)).first()
        return None if row is None else self._submission(row, with_report=True)

    def list_submissions(
        self,
        holdout_id: str,
        *,
        group: str | None = None,
        limit: int | None = None,
        offset: int = 0,
    ) -> list[SubmissionRecord]:
        """Submission summaries (no report), oldest first; only ``group``'s when given."""
        s = schema.submissions
        query = (
            sa.select(*_SUMMARY_COLUMNS)
            .where(s.c.holdout_id == holdout_id)
            .order_by(s.c.created_at, s.c.id)
            .offset(offset)
        )
        if group is not None:
            query = query.where(s.c.group_name == group)
        if limit is not None:
            query = query.limit(limit)
        with self.engine.connect() as conn:
            return [self._submission(row, with_report=False) for row in conn.execute(query)]

    def count_submissions(self, holdout_id: str, *, group: str | None = None) -> int:
        s = schema.submissions
        query = sa.select(sa.func.count()).select_from(s).where(s.c.holdout_id == holdout_id)
        if group is not None:
            query = query.where(s.c.group_name == group)
        with self.engine.connect() as conn:
            return int(conn.execute(query).scalar_one())

    def sweep_members(self, holdout_id: str, group: str, name: str) -> list[SweepMember]:
        """Every submission of one group's sweep, with its report and per-row losses."""
        s, d = schema.submissions, schema.submission_data
        query = (
            sa.select(s, d.c.row_loss, d.c.row_losses)
            .join(d, d.c.submission_id == s.c.id)
            .where(s.c.holdout_id == holdout_id, s.c.group_name == group, s.c.sweep_name == name)
            .order_by(s.c.created_at, s.c.id)
        )
        with self.engine.connect() as conn:
            rows = conn.execute(query).all()
        return [
            SweepMember(
                self._submission(row, with_report=True), row.row_loss, decode_array(row.row_losses)
            )
            for row in rows
        ]


__all__ = [
    "ROLES",
    "TOKEN_PREFIX",
    "DuplicateHoldoutNameError",
    "HoldoutArrays",
    "HoldoutRecord",
    "NewHoldout",
    "NewSubmission",
    "Store",
    "StoreError",
    "SubmissionRecord",
    "SweepMember",
    "TokenRecord",
    "UnknownTokenError",
    "hash_token",
    "make_engine",
    "new_token_secret",
]
