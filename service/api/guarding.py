"""Reusing a holdout safely: feedback and reserve slices, guards, quotas, closing.

A holdout's rows are split once, at registration, into a feedback slice and a sealed reserve
(``service.scoring.split.feedback_mask``, stratified by class for classification; the seed
and the mask are stored beside the salt). Every submission is scored three times, on the
feedback rows, on the reserve rows and on all rows.

- Owners and admins see all three views of every submission, and standings with each
  group's feedback and reserve values side by side and the ``feedback_tuned`` test.
- Submitters see the feedback view only, through the holdout's guard (``policy.guard``):
  ``none`` (exact), ``rounded`` (every number rounded to ``policy.decimals``) or ``ladder``
  (Blum & Hardt 2015, parameter-free, per group, on the primary metric's per-row loss from
  ``service.scoring.catalog``): a submission that does not beat the group's best by the
  Ladder's margin is answered with the best's feedback view, so its own feedback numbers,
  which would leak labels, are never shown. Nothing computed on reserve rows reaches a
  submitter before the holdout is closed.
- ``policy.daily_quota`` bounds scored submissions per group per UTC day (429 with
  ``Retry-After``); the count is taken atomically with storing (``service.store.reuse``).
- ``POST /v1/holdouts/{id}/close`` ends submissions (409 afterwards), reveals the salt and
  the split seed, shows the groups that took part the final standings on the reserve
  slice, and lets submitters see the reserve views of their own submissions. Closing is
  idempotent: closing again answers 200 with the first ``closed_at``.
"""

from __future__ import annotations

import logging
import math
import secrets
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta
from types import MappingProxyType
from typing import Any

import numpy as np
from flask import Blueprint, Response
from numpy.typing import NDArray

from service.scoring import ScoringInputError, ScoringOptions, catalog
from service.scoring.guard import (
    GUARDS,
    LadderState,
    adaptive_overfit_test,
    ladder_step,
    round_nested,
)
from service.scoring.split import feedback_counts, feedback_mask
from service.store import (
    HoldoutArrays,
    HoldoutRecord,
    NewSubmission,
    Store,
    SubmissionRecord,
    SweepMember,
    reuse,
)
from service.store.reuse import (
    FEEDBACK,
    FULL,
    RESERVE,
    Decide,
    GroupState,
    GuardOutcome,
    GuardRecord,
    HoldoutClosedError,
    LadderUpdate,
    QuotaExceededError,
    SliceReport,
)

from . import evaluate, verdicts
from .auth import Principal, current_principal, get_store, requires, visible_holdout
from .errors import Conflict, NotFound, TooManyRequests, ValidationFailed, problem_error
from .openapi import operation
from .present import holdout_out, redact, submission_out, summary_out
from .responses import respond
from .schemas import HoldoutOut

log = logging.getLogger("heldout.api")

POLICY_DEFAULTS: Mapping[str, Any] = MappingProxyType(
    {
        "feedback_fraction": 0.3,
        "guard": "ladder",
        "decimals": 4,
        "daily_quota": None,
        "min_rows": 30,
    }
)
"""Reuse settings of a holdout's policy when the owner leaves them out. ``min_rows`` 30: the
common-practice size for the normal intervals on a mean of per-row losses."""

IMPROVED_FIRST = (
    "First scored submission of your group on this holdout: its feedback-slice scores are reported."
)
IMPROVED = (
    "Beat your group's best by more than the Ladder's margin: its feedback-slice scores are "
    "reported and it is the group's new best."
)
NOT_IMPROVED = (
    "did not beat your group's best by the required margin; the best is reported unchanged"
)
_REPORT_KEYS = (
    "scores",
    "intervals",
    "seed_spread",
    "ensemble",
    "bias_variance",
    "flags",
    "train_scores",
    "details",
)
_SWEEP_NUMBERS = ("test_loss", "test_loss_se", "train_loss", "bias", "variance")


# ------------------------------------------------------------------------------- the policy


def policy_of(holdout: HoldoutRecord) -> dict[str, Any]:
    """The holdout's policy with every reuse setting present (and ``gates``), without the
    holdout-wide reference kept beside it (``verdicts.REFERENCE_KEY``)."""
    policy = {**POLICY_DEFAULTS, "gates": [], **holdout.policy}
    policy.pop(verdicts.REFERENCE_KEY, None)
    return policy


def reuse_policy(policy_in: Mapping[str, Any]) -> dict[str, Any]:
    """The reuse settings of a registration's policy, defaults filled in (normalized form)."""
    out = {}
    for key, default in POLICY_DEFAULTS.items():
        value = policy_in.get(key)
        out[key] = default if value is None else value
    out["feedback_fraction"] = float(out["feedback_fraction"])
    return out


def slice_sizes(task: str, labels: NDArray, feedback_fraction: float) -> tuple[int, int]:
    """Rows in the feedback and reserve slices; they do not depend on the split's seed."""
    n = int(labels.shape[0])
    if task == catalog.REGRESSION:
        sizes = np.array([n])
    else:
        sizes = np.unique(np.asarray(labels), return_counts=True)[1]
    feedback = int(feedback_counts(sizes, feedback_fraction=feedback_fraction).sum())
    return feedback, n - feedback


def split_errors(policy: Mapping[str, Any], task: str, labels: NDArray) -> list[dict[str, Any]]:
    """Problems with splitting these rows under ``policy`` (registration answers 422)."""
    n = int(labels.shape[0])
    if n == 0 or policy["guard"] not in GUARDS:
        return []
    feedback, reserve = slice_sizes(task, labels, policy["feedback_fraction"])
    errors = []
    if min(feedback, reserve) < policy["min_rows"]:
        errors.append(
            problem_error(
                "policy.min_rows",
                f"feedback_fraction {policy['feedback_fraction']} splits the {n} rows into "
                f"{feedback} feedback and {reserve} reserve rows, and each slice needs at "
                f"least min_rows={policy['min_rows']}: register more rows, change "
                "feedback_fraction or lower min_rows",
            )
        )
    if policy["guard"] == "ladder" and feedback < 2:
        errors.append(
            problem_error(
                "policy.guard",
                f"the Ladder compares per-row losses and needs at least 2 feedback rows; "
                f"this split has {feedback}",
            )
        )
    return errors


def new_split_seed() -> int:
    """A fresh 63-bit split seed from the operating system's CSPRNG.

    Module-level so that a test can fix it (``monkeypatch.setattr``) and replay a split.
    """
    return secrets.randbits(63)


def draw_split(task: str, labels: NDArray, feedback_fraction: float) -> tuple[int, NDArray]:
    """A fresh random seed and the feedback mask it gives (stratified for classification)."""
    seed = new_split_seed()
    strata = None if task == catalog.REGRESSION else np.asarray(labels)
    mask = feedback_mask(
        int(labels.shape[0]), feedback_fraction=feedback_fraction, seed=seed, strata=strata
    )
    return seed, mask


def _mask(arrays: HoldoutArrays) -> NDArray[np.bool_]:
    if arrays.feedback_mask is None:
        raise Conflict(
            "This holdout was registered without a feedback/reserve split; register it again."
        )
    return arrays.feedback_mask


def submitter_decimals(holdout: HoldoutRecord) -> int | None:
    """Decimals of every number the holdout's submitters see (None: exact, guard ``none``)."""
    return _decimals(policy_of(holdout))


def _decimals(policy: Mapping[str, Any]) -> int | None:
    """Decimals of what submitters see: the policy's, except under guard ``none``."""
    return None if policy["guard"] == "none" else int(policy["decimals"])


def _round(value: float | None, decimals: int | None) -> float | None:
    if value is None or decimals is None or not math.isfinite(value):
        return value
    return round(value, decimals)


# ---------------------------------------------------------------------------- scoring


def _c_order(a: NDArray | None) -> NDArray | None:
    return None if a is None else np.ascontiguousarray(a)


def _rows(
    sub: evaluate.SubmissionInput, rows: NDArray[np.bool_] | None
) -> evaluate.SubmissionInput:
    """The submission on ``rows`` (all rows when None), its arrays C-ordered.

    C order whatever the ingest path produced (fancy indexing along the rows axis need not
    give it): the core's sums run in memory order, so the same numbers must reach it in the
    same layout for a report to be bit-identical however the submission arrived.
    """
    return replace(
        sub,
        predictions=_c_order(None if sub.predictions is None else _take(sub.predictions, rows)),
        labels=_c_order(None if sub.labels is None else _take(sub.labels, rows)),
        probabilities=_c_order(
            None if sub.probabilities is None else _take(sub.probabilities, rows)
        ),
    )


def _take(a: NDArray, rows: NDArray[np.bool_] | None) -> NDArray:
    return a if rows is None else a[:, rows]


def score_slices(
    holdout: HoldoutRecord,
    arrays: HoldoutArrays,
    sub: evaluate.SubmissionInput,
    options: ScoringOptions,
) -> tuple[evaluate.Evaluation, list[SliceReport]]:
    """The core's report on all rows, and on the feedback and reserve rows.

    The aligned arrays are sliced by the stored mask; the training rows stay whole.
    """
    full = evaluate.evaluate(holdout, arrays, _rows(sub, None), options)
    mask = _mask(arrays)
    parts = []
    for name, rows in ((FEEDBACK, mask), (RESERVE, ~mask)):
        part = HoldoutArrays(ids=arrays.ids[rows], labels=arrays.labels[rows], salt=b"")
        result = evaluate.evaluate(holdout, part, _rows(sub, rows), options)
        parts.append(SliceReport(name, int(rows.sum()), result.primary_value, result.report))
    return full, parts


# ------------------------------------------------------------------------ guard and quota


def make_decide(
    holdout: HoldoutRecord, arrays: HoldoutArrays, evaluation: evaluate.Evaluation
) -> Decide:
    """The guard's decision for one scored submission, run inside the storing transaction."""
    policy = policy_of(holdout)
    kind = policy["guard"]
    if kind != "ladder":
        message = (
            f"Feedback-slice scores, every number rounded to {policy['decimals']} decimals."
            if kind == "rounded"
            else "Exact feedback-slice scores (this holdout's policy sets no guard)."
        )

        def unguarded(
            state: GroupState, best: NDArray[np.float64] | None, record: SubmissionRecord
        ) -> GuardOutcome:
            return GuardOutcome(kind, None, record.id, None, message)

        return unguarded

    mask = _mask(arrays)
    new_losses = evaluation.row_losses[mask]

    def ladder(
        state: GroupState, best: NDArray[np.float64] | None, record: SubmissionRecord
    ) -> GuardOutcome:
        has_best = state.best_submission_id is not None
        before = LadderState(
            best_loss=state.best_loss if has_best and state.best_loss is not None else math.inf,
            best_submission_id=state.best_submission_id,
            reported=state.reported_loss if has_best else None,
            n_improvements=state.n_improvements,
        )
        decision, after = ladder_step(
            new_losses,
            None if best is None else best[mask],
            before,
            decimals=int(policy["decimals"]),
            submission_id=record.id,
        )
        if not decision.improved:
            assert state.best_submission_id is not None
            return GuardOutcome(
                "ladder", False, state.best_submission_id, decision.reported_loss, NOT_IMPROVED
            )
        assert after.reported is not None
        return GuardOutcome(
            "ladder",
            True,
            record.id,
            decision.reported_loss,
            IMPROVED if has_best else IMPROVED_FIRST,
            update=LadderUpdate(record.id, after.best_loss, after.reported, after.n_improvements),
        )

    return ladder


def _closed(holdout: HoldoutRecord, closed_at: datetime) -> Conflict:
    return Conflict(
        f"Holdout {holdout.id} was closed at {closed_at.isoformat()}; it takes no further "
        "submissions.",
        [problem_error("holdout", "closed")],
    )


def _over_quota(quota: int, day: str, now: datetime) -> TooManyRequests:
    midnight = datetime.combine(now.astimezone(UTC).date() + timedelta(days=1), datetime.min.time())
    seconds = max(1, math.ceil((midnight.replace(tzinfo=UTC) - now).total_seconds()))
    return TooManyRequests(
        f"Your group has used this holdout's daily quota of {quota} scored submissions for "
        f"{day} (UTC). Submit again after midnight UTC, in {seconds} seconds.",
        [problem_error("daily_quota", f"{quota} scored submissions per group per UTC day")],
        headers={"Retry-After": str(seconds)},
    )


def check_can_submit(store: Store, holdout: HoldoutRecord, group: str) -> None:
    """409 if closed, 429 if the quota is used up: cheap checks before scoring.

    The same checks run again, atomically, in the transaction that stores the submission.
    """
    if holdout.closed_at is not None:
        raise _closed(holdout, holdout.closed_at)
    quota = policy_of(holdout)["daily_quota"]
    if quota is not None:
        now = datetime.now(UTC)
        day = reuse.utc_day(now)
        if reuse.quota_used(store, holdout.id, group, day) >= quota:
            raise _over_quota(int(quota), day, now)


def store_submission(
    store: Store,
    holdout: HoldoutRecord,
    arrays: HoldoutArrays,
    new: NewSubmission,
    evaluation: evaluate.Evaluation,
    slices: Sequence[SliceReport],
) -> tuple[SubmissionRecord, GuardRecord]:
    """Store the scored submission under the quota and the guard (one transaction)."""
    policy = policy_of(holdout)
    now = datetime.now(UTC)
    try:
        return reuse.store_scored_submission(
            store,
            new,
            slices,
            day=reuse.utc_day(now),
            daily_quota=policy["daily_quota"],
            decide=make_decide(holdout, arrays, evaluation),
        )
    except QuotaExceededError as exc:
        raise _over_quota(exc.quota, exc.day, now) from None
    except HoldoutClosedError as exc:
        raise _closed(holdout, exc.closed_at) from None


# ------------------------------------------------------------------------------- views


def _slice_view(
    name: str,
    report: Mapping[str, Any],
    primary_value: float | None,
    *,
    submitter: bool,
    decimals: int | None,
) -> dict[str, Any]:
    shown = redact(dict(report)) if submitter else report
    view = {
        "slice": name,
        "n_rows": shown["n_rows"],
        "primary_value": primary_value,
        **{key: shown[key] for key in _REPORT_KEYS},
    }
    return view if decimals is None else round_nested(view, decimals)


def _guard_out(guard: GuardRecord | None, policy: Mapping[str, Any]) -> dict[str, Any] | None:
    if guard is None:
        return None
    return {
        "kind": guard.kind,
        "improved": guard.improved,
        "message": guard.message,
        "best_submission_id": guard.shown_submission_id if guard.kind == "ladder" else None,
        "reported_loss": guard.reported_loss,
        "decimals": None if guard.kind == "none" else int(policy["decimals"]),
    }


def submission_view(
    store: Store,
    record: SubmissionRecord,
    holdout: HoldoutRecord,
    principal: Principal,
    guard: GuardRecord | None = None,
) -> dict[str, Any]:
    """A submission as ``principal`` may see it (``SubmissionResult``).

    Owners and admins: the full-set report at the top level and ``views`` of all three
    slices. Submitters: the feedback view of the submission the guard shows (this one, or
    under the Ladder the group's best when this one did not improve), rounded unless the
    guard is ``none``; after close also the reserve view of this submission.
    """
    policy = policy_of(holdout)
    if guard is None:
        guard = reuse.guard_records(store, [record.id]).get(record.id)
    shown_id = record.id if guard is None else guard.shown_submission_id
    if principal.role != "submitter":
        parts_by_id = reuse.slice_reports(store, [record.id, shown_id])
        parts = parts_by_id.get(record.id, {})
        out = submission_out(record, holdout, principal)
        views = {
            name: _slice_view(name, part.report, part.primary_value, submitter=False, decimals=None)
            for name, part in parts.items()
        }
        assert record.report is not None
        views[FULL] = _slice_view(
            FULL, record.report, record.primary_value, submitter=False, decimals=None
        )
        out.update(
            slice=FULL,
            guard=_guard_out(guard, policy),
            views=views,
            verdict=verdicts.group_verdict(parts_by_id, record, guard),
            verdicts_by_slice=verdicts.slice_verdicts(
                parts, record, submitter=False, closed=holdout.closed_at is not None
            ),
        )
        return out

    decimals = _decimals(policy)
    parts_by_id = reuse.slice_reports(store, [shown_id, record.id])
    feedback = parts_by_id[shown_id][FEEDBACK]
    report = feedback.report if decimals is None else round_nested(feedback.report, decimals)
    shown = replace(record, report=report, primary_value=_round(feedback.primary_value, decimals))
    out = submission_out(shown, holdout, principal)
    views = {}
    if holdout.closed_at is not None:
        reserve = parts_by_id[record.id][RESERVE]
        views[RESERVE] = _slice_view(
            RESERVE, reserve.report, reserve.primary_value, submitter=True, decimals=decimals
        )
    out.update(
        slice=FEEDBACK,
        guard=_guard_out(guard, policy),
        views=views,
        verdict=verdicts.group_verdict(parts_by_id, record, guard),
        verdicts_by_slice=verdicts.slice_verdicts(
            parts_by_id[record.id], record, submitter=True, closed=holdout.closed_at is not None
        ),
    )
    return out


def summaries_view(
    store: Store, records: Sequence[SubmissionRecord], holdout: HoldoutRecord, principal: Principal
) -> list[dict[str, Any]]:
    """Submission summaries: full-set values for owners, guarded feedback values for groups."""
    policy = policy_of(holdout)
    guards = reuse.guard_records(store, [r.id for r in records])
    shown = {r.id: (guards[r.id].shown_submission_id if r.id in guards else r.id) for r in records}
    # The verdict as the group was told (the submission's ``verdict``), for every role.
    parts = reuse.slice_reports(store, shown.values())
    status = {
        r.id: str(verdicts.group_verdict(parts, r, guards.get(r.id))["status"]) for r in records
    }
    if principal.role != "submitter":
        return [
            {
                **summary_out(r),
                "slice": FULL,
                "guard": _guard_out(guards.get(r.id), policy),
                "verdict_status": status[r.id],
            }
            for r in records
        ]
    decimals = _decimals(policy)
    out = []
    for r in records:
        value = _round(parts[shown[r.id]][FEEDBACK].primary_value, decimals)
        out.append(
            {
                **summary_out(replace(r, primary_value=value)),
                "slice": FEEDBACK,
                "guard": _guard_out(guards.get(r.id), policy),
                "verdict_status": status[r.id],
            }
        )
    return out


def holdout_view(store: Store, record: HoldoutRecord, principal: Principal) -> dict[str, Any]:
    """A holdout's metadata (``HoldoutOut``), with the salt and split seed once it is closed.

    Owners and admins see the split seed at any time (they hold the labels and can
    recompute the stored mask with ``service.scoring.split.feedback_mask``).
    """
    out = holdout_out(record)
    out["policy"] = policy_of(record)
    closed = record.closed_at is not None
    salt: str | None = None
    seed: int | None = None
    if closed or principal.role != "submitter":
        salt_bytes, seed = reuse.revealed_secrets(store, record.id)
        salt = salt_bytes.hex() if closed else None
    feedback = record.feedback_rows
    out.update(
        closed_at=record.closed_at,
        salt=salt,
        split={
            "feedback_rows": feedback,
            "reserve_rows": None if feedback is None else record.n_rows - feedback,
            "seed": None if seed is None else str(seed),
        },
    )
    return out


# ---------------------------------------------------------------------------- standings


@dataclass(frozen=True)
class _Best:
    group: str
    record: SubmissionRecord
    n_submissions: int


def _group_bests(
    store: Store, holdout: HoldoutRecord, records: Sequence[SubmissionRecord]
) -> list[_Best]:
    """Each group's best submission: the Ladder's best, else the best feedback value."""
    policy = policy_of(holdout)
    metric = policy["primary_metric"]
    counts: dict[str, int] = {}
    by_id = {}
    for r in records:
        counts[r.group] = counts.get(r.group, 0) + 1
        by_id[r.id] = r
    best: dict[str, SubmissionRecord] = {}
    if policy["guard"] == "ladder":
        for group, state in reuse.group_states(store, holdout.id).items():
            if state.best_submission_id in by_id:
                best[group] = by_id[state.best_submission_id]
    else:
        values = reuse.slice_values(store, holdout.id, FEEDBACK)
        for r in records:  # oldest first: a later submission must be strictly better
            current = best.get(r.group)
            if current is None or catalog.ranking_key(metric, values.get(r.id)) < (
                catalog.ranking_key(metric, values.get(current.id))
            ):
                best[r.group] = r
    return [_Best(g, r, counts[g]) for g, r in best.items()]


def _ranked(entries: list[dict[str, Any]], metric: str) -> list[dict[str, Any]]:
    ordered = sorted(
        entries, key=lambda e: (catalog.ranking_key(metric, e["value"]), e["created_at"])
    )
    keys = [catalog.ranking_key(metric, e["value"]) for e in ordered]
    for i, e in enumerate(ordered):
        e["rank"] = 1 + sum(k < keys[i] for k in keys)
    return ordered


def _tuned(
    losses: NDArray[np.float64] | None, mask: NDArray[np.bool_], row_loss: str
) -> dict[str, Any] | None:
    if losses is None or mask.sum() < 2 or (~mask).sum() < 2:
        return None
    try:
        result = adaptive_overfit_test(losses[mask], losses[~mask])
    except ScoringInputError:
        return None
    return {**result, "loss": row_loss}


def standings_view(store: Store, holdout: HoldoutRecord, principal: Principal) -> dict[str, Any]:
    """Live standings on the feedback slice and, after close, final ones on the reserve.

    Live: each group's best (the Ladder's best, or the best feedback value under the other
    guards); submitters see the values their guard reports (rounded unless ``none``),
    owners the exact feedback value beside the reserve value and the ``feedback_tuned``
    test. Final (closed holdouts, shown to owners and to the groups that submitted): the
    same best submissions ranked by their reserve-slice value; the reserve slice picks no
    submission, so the final value carries no selection bias.
    """
    policy = policy_of(holdout)
    metric = policy["primary_metric"]
    submitter = principal.role == "submitter"
    decimals = _decimals(policy) if submitter else None
    bests = _group_bests(store, holdout, store.list_submissions(holdout.id))
    parts = reuse.slice_reports(store, [b.record.id for b in bests])
    mask = _mask(store.holdout_arrays(holdout.id))
    losses = {} if submitter else reuse.row_losses(store, [b.record.id for b in bests])
    row_loss = catalog.METRICS[metric].row_loss

    def entry(best: _Best, slice_name: str) -> dict[str, Any]:
        part = parts[best.record.id][slice_name]
        own = not submitter or best.group == principal.group
        interval = part.report.get("intervals", {}).get(metric)
        return {
            "group": best.group,
            "verdict_status": verdicts.status_of(
                part,
                verdicts.SUBMITTER_VERDICT
                if submitter or slice_name == FEEDBACK
                else verdicts.VERDICT,
            ),
            "value": _round(part.primary_value, decimals),
            "interval": None if interval is None else _rounded(interval, decimals),
            "submission_id": best.record.id if own else None,
            "model": best.record.model if own else None,
            "n_submissions": best.n_submissions,
            "created_at": best.record.created_at,
        }

    live = []
    for best in bests:
        e = entry(best, FEEDBACK)
        e.update(
            reserve_value=None,
            reserve_interval=None,
            feedback_tuned=None,
            reserve_verdict_status=None,
        )
        if not submitter:
            reserve = parts[best.record.id][RESERVE]
            e["reserve_verdict_status"] = verdicts.status_of(reserve, verdicts.VERDICT)
            e["reserve_value"] = reserve.primary_value
            e["reserve_interval"] = reserve.report.get("intervals", {}).get(metric)
            e["feedback_tuned"] = _tuned(losses.get(best.record.id), mask, row_loss)
        live.append(e)
    final = None
    took_part = not submitter or any(b.group == principal.group for b in bests)
    if holdout.closed_at is not None and took_part:
        final = _ranked([entry(b, RESERVE) for b in bests], metric)
    return {
        "holdout_id": holdout.id,
        "primary_metric": metric,
        "higher_is_better": catalog.METRICS[metric].higher_is_better,
        "slice": FEEDBACK,
        "guard": policy["guard"],
        "closed_at": holdout.closed_at,
        "entries": _ranked(live, metric),
        "final": final,
    }


def _rounded(value: Any, decimals: int | None) -> Any:
    return value if decimals is None else round_nested(value, decimals)


# ------------------------------------------------------------------------------- sweeps


@dataclass(frozen=True)
class SweepSource:
    """The rows and reports one complexity curve is built from."""

    slice: str
    members: list[tuple[SubmissionRecord, dict[str, Any], NDArray[np.float64]]]
    n_withheld: int
    decimals: int | None


def sweep_source(
    store: Store,
    holdout: HoldoutRecord,
    principal: Principal,
    members: Sequence[SweepMember],
    requested: str | None,
) -> SweepSource:
    """Which slice and which submissions a sweep may use for ``principal``.

    Submitters: the feedback slice (after close the reserve too, on request); under the
    Ladder only the submissions it accepted as improvements, because a sweep point is a
    submission's own feedback loss, which the Ladder withholds for the others; numbers
    rounded unless the guard is ``none``. Owners and admins: any slice, all rows by default.
    """
    policy = policy_of(holdout)
    submitter = principal.role == "submitter"
    if submitter:
        slice_name = requested or FEEDBACK
        allowed = (FEEDBACK, RESERVE) if holdout.closed_at is not None else (FEEDBACK,)
        if slice_name not in allowed:
            raise ValidationFailed(
                "This slice is sealed for submitters.",
                [
                    problem_error(
                        "slice",
                        f"submitters may ask for {' or '.join(allowed)} while the holdout is "
                        + ("closed" if holdout.closed_at is not None else "open"),
                    )
                ],
            )
    else:
        slice_name = requested or FULL
    chosen = list(members)
    withheld = 0
    if submitter and slice_name == FEEDBACK and policy["guard"] == "ladder":
        guards = reuse.guard_records(store, [m.submission.id for m in members])
        chosen = [m for m in members if guards.get(m.submission.id, None) is not None]
        chosen = [m for m in chosen if guards[m.submission.id].improved]
        withheld = len(members) - len(chosen)
    mask = _mask(store.holdout_arrays(holdout.id))
    chosen_ids = [m.submission.id for m in chosen]
    parts = {} if slice_name == FULL else reuse.slice_reports(store, chosen_ids)
    out = []
    for m in chosen:
        if slice_name == FULL:
            assert m.submission.report is not None
            out.append((m.submission, m.submission.report, m.row_losses))
        else:
            rows = mask if slice_name == FEEDBACK else ~mask
            report = parts[m.submission.id][slice_name].report
            out.append((m.submission, report, m.row_losses[rows]))
    return SweepSource(slice_name, out, withheld, _decimals(policy) if submitter else None)


def round_sweep_points(points: list[dict[str, Any]], decimals: int | None) -> list[dict[str, Any]]:
    """Round a sweep's loss numbers (not the submitter's own complexity values)."""
    if decimals is None:
        return points
    return [
        {k: (_round(v, decimals) if k in _SWEEP_NUMBERS else v) for k, v in p.items()}
        for p in points
    ]


# ------------------------------------------------------------------------------- close

bp = Blueprint("reuse", __name__)

_CLOSE_DESCRIPTION = """\
Ends the holdout's use: every later submission is refused with 409. The response is the
holdout with `closed_at`, the fingerprint's `salt` (hex) and the split seed, which everyone
who may see the holdout can now read: anyone holding the labels can recompute the
fingerprint (`heldout verify-fingerprint`). The standings gain `final`, the groups' best
submissions ranked on the reserve slice, shown to the groups that submitted; submitters may
read the reserve views of their own submissions. Closing a closed holdout changes nothing
and answers 200 with the first `closed_at`."""


@bp.post("/v1/holdouts/<holdout_id>/close")
@requires("owner", "admin")
@operation(
    summary="Close a holdout and reveal its salt and reserve scores",
    tag="holdouts",
    description=_CLOSE_DESCRIPTION,
    response=(200, HoldoutOut),
    errors=(404,),
)
def close_holdout(holdout_id: str) -> Response:
    principal = current_principal()
    holdout = visible_holdout(principal, holdout_id)
    store = get_store()
    closed_at, newly = reuse.close_holdout(store, holdout.id)
    if newly:
        log.info("holdout %s closed", holdout.id)
    view = holdout_view(store, replace(holdout, closed_at=closed_at), principal)
    return respond(HoldoutOut(), view)


def missing_sweep(group: str, name: str, withheld: int) -> NotFound:
    """404 for a sweep with no point the caller may see."""
    if withheld:
        return NotFound(
            f"None of group {group!r}'s {withheld} submissions in sweep {name!r} improved on "
            "the group's best; under the Ladder only those are shown."
        )
    return NotFound(f"Group {group!r} has no sweep named {name!r} on this holdout.")


__all__ = [
    "IMPROVED",
    "IMPROVED_FIRST",
    "NOT_IMPROVED",
    "POLICY_DEFAULTS",
    "SweepSource",
    "bp",
    "check_can_submit",
    "draw_split",
    "holdout_view",
    "make_decide",
    "missing_sweep",
    "new_split_seed",
    "policy_of",
    "reuse_policy",
    "round_sweep_points",
    "score_slices",
    "slice_sizes",
    "split_errors",
    "standings_view",
    "store_submission",
    "submitter_decimals",
    "submission_view",
    "summaries_view",
    "sweep_source",
]
