"""Verdicts in the API: the policy's gates, the reference submission, what each role sees.

The gates live in the holdout's policy (validated at registration by
``service.scoring.verdict.parse_gates``); the scoring core decides every gate
(``evaluate_gates``, ``compare_for_gate``). This module chooses the numbers each verdict may
read, and stores the verdicts with the submission so that every later read shows the same:

- at submission time, for each slice (``feedback``, ``reserve``, ``full``) the exact verdict
  (owners) is stored in that slice's report under ``"verdict"``; for ``feedback`` and
  ``reserve`` also the verdict as the group may see it (``"submitter_verdict"``): computed on
  the rounded report and on the rounded comparison (``policy.decimals``, unless the guard is
  ``none``), so that no verdict number, message or decision carries more precision than the
  numbers the group is shown;
- comparisons use the stored per-row losses (primary metric's ``row_loss``) of both
  submissions restricted to the slice's rows: a submitter's verdict before close reads the
  feedback rows only;
- under the Ladder a submission that did not improve is answered with the group's best's
  feedback view, and its verdict is the best's submitter verdict, unchanged (reasons,
  numbers, reference): its own bound, flag or comparison outcome would be a bit about the
  feedback losses the Ladder withholds. A reference must be a submission whose feedback
  numbers were released (``guard.improved``), else a comparison's difference would give away
  a withheld loss.

The holdout-wide reference (the owner's champion) is kept in the holdout's policy JSON under
``REFERENCE_KEY``: the one entry of the policy that changes after registration; it is not part
of the policy's wire form and not compared when a holdout is registered again.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.scoring import Comparison, Interval, catalog
from service.scoring.guard import round_nested
from service.scoring.verdict import (
    BoundGate,
    CompareGate,
    FlagGate,
    Gate,
    GateReason,
    GateSpecError,
    compare_for_gate,
    evaluate_gates,
    parse_gates,
    plan_comparison,
)
from service.store import HoldoutRecord, Store, SubmissionRecord, reuse
from service.store.reuse import FEEDBACK, FULL, RESERVE, GuardRecord, SliceReport

from .errors import ValidationFailed, problem_error

REFERENCE_KEY = "reference_submission_id"
"""Key of the holdout-wide reference submission in ``holdouts.policy`` (JSON)."""

OTHER_GROUP_REFERENCE = "holdout-reference"
"""What a group's verdict names a reference of another group (the owner's champion) by."""

VERDICT = "verdict"
SUBMITTER_VERDICT = "submitter_verdict"

WITHHELD_NOTE = (
    "This submission did not beat your group's best by the Ladder's margin: like its scores, "
    "its verdict is the best's, unchanged (its numbers, its reference)."
)
WITHHELD_PREFIX = (
    "withheld under the Ladder (this submission's own comparison is not reported); "
    "the group's best's: "
)

# Detail entries computed from the rows (rounded for submitters); the others are the
# gate's own settings or counts.
_ROW_DETAILS = ("confidence_bound", "p_value_one_sided")


# ------------------------------------------------------------------------------ gates


def comparable_row_losses(primary_metric: str) -> set[str]:
    """The per-row losses stored for reference submissions: the primary metric's."""
    return {catalog.METRICS[primary_metric].row_loss}


def gate_errors(raw: Any, *, task: str, primary_metric: str | None) -> list[dict[str, Any]]:
    """Problems of a registration's ``policy.gates`` (each named ``policy.gates[i].<key>``)."""
    comparable = None if primary_metric is None else comparable_row_losses(primary_metric)
    try:
        parse_gates(raw, task=task, comparable_row_losses=comparable)
    except GateSpecError as exc:
        return [problem_error(f"policy.{field}", message) for field, message in exc.problems]
    return []


def gates_of(holdout: HoldoutRecord) -> list[Gate]:
    """The holdout's gates, parsed (they were validated at registration)."""
    return parse_gates(
        holdout.policy.get("gates") or [],
        task=holdout.task,
        comparable_row_losses=comparable_row_losses(holdout.policy["primary_metric"]),
    )


def gate_text(gate: Gate) -> str:
    """A gate in one line, e.g. ``rmse <= 3.2`` (the reason's ``gate``)."""
    if isinstance(gate, BoundGate):
        text = f"{gate.metric} {gate.op} {gate.given.get('value', gate.value)}"
    elif isinstance(gate, FlagGate):
        text = f"flag {gate.flag} at {gate.min_severity}"
        text += "" if gate.min_severity == "critical" else " or worse"
    else:
        text = f"{gate.metric} {gate.compare}"
        if gate.compare == "non_inferior":
            text += f" margin {gate.given.get('margin', gate.margin)}"
        text += f" alpha {gate.given.get('alpha', gate.alpha)}"
    return text if gate.severity == "fail" else f"{text} (warn)"


# -------------------------------------------------------------------------- reference


@dataclass(frozen=True)
class Reference:
    """The reference submission of one scored submission, with its per-row losses."""

    record: SubmissionRecord
    row_losses: NDArray[np.float64] | None  # (n,) all rows, holdout order; None if not needed


def _released_or_refuse(
    store: Store, holdout: HoldoutRecord, record: SubmissionRecord, field: str
) -> None:
    """Under the Ladder only a submission whose feedback numbers were shown may be compared
    with: the difference would otherwise give away a withheld feedback loss."""
    if holdout.policy.get("guard", "ladder") != "ladder":
        return
    guard = reuse.guard_records(store, [record.id]).get(record.id)
    if guard is not None and guard.improved is False:
        raise ValidationFailed(
            "Under the Ladder a reference must be a submission whose feedback scores were "
            "reported.",
            [
                problem_error(
                    field,
                    f"{record.id} did not improve on its group's best (guard.improved false), "
                    "so its feedback scores were never reported; name a submission with "
                    "guard.improved true, e.g. the group's best",
                    1,
                    [record.id],
                )
            ],
        )


def check_reference(
    store: Store,
    holdout: HoldoutRecord,
    submission_id: str,
    *,
    group: str | None,
    field: str,
) -> SubmissionRecord:
    """The submission ``submission_id`` if it may serve as a reference on ``holdout``.

    ``group``: a submitter's group (only its own submissions; another group's is refused
    exactly like one that does not exist), or None for owners and admins (any submission
    on the holdout). Raises ``ValidationFailed`` (422) naming ``field`` with the reason.
    """
    record = store.get_submission(submission_id)
    if record is None or (group is not None and record.group != group):
        whose = "of your group " if group is not None else ""
        rule = (
            "a submitter may compare only with its own group's submissions on the same holdout"
            if group is not None
            else "name a submission to this holdout"
        )
        raise ValidationFailed(
            f"No submission {submission_id!r} {whose}is visible to this token.",
            [
                problem_error(
                    field, f"unknown submission {submission_id!r}: {rule}", 1, [submission_id]
                )
            ],
        )
    if record.holdout_id != holdout.id:
        raise ValidationFailed(
            "A reference must be a submission to the same holdout.",
            [
                problem_error(
                    field,
                    f"{submission_id} is a submission to holdout {record.holdout_id}, not "
                    f"{holdout.id}; name a submission to the same holdout (the same rows)",
                    1,
                    [submission_id],
                )
            ],
        )
    _released_or_refuse(store, holdout, record, field)
    return record


def resolve_reference(
    store: Store,
    holdout: HoldoutRecord,
    gates: Sequence[Gate],
    *,
    group: str,
    named: str | None,
) -> Reference | None:
    """The reference of a new submission: the one it names (checked for ``group``), else the
    holdout-wide one, else None. Its per-row losses are read only when a gate compares."""
    if named is not None:
        record = check_reference(store, holdout, named, group=group, field="reference")
    else:
        wide = holdout.policy.get(REFERENCE_KEY)
        record = None if wide is None else store.get_submission(wide)
        if record is None:
            return None
    if not any(isinstance(g, CompareGate) for g in gates):
        return Reference(record, None)
    return Reference(record, reuse.row_losses(store, [record.id])[record.id])


# ---------------------------------------------------------------------------- computing


def _round(x: float | None, decimals: int | None) -> float | None:
    if x is None or decimals is None or not math.isfinite(x):
        return x
    return round(x, decimals)


def _finite(x: Any) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _rounded_comparison(c: Comparison, decimals: int) -> Comparison:
    """The comparison with every number computed from the rows rounded (the level kept)."""
    i = c.interval
    return replace(
        c,
        difference=_round(c.difference, decimals),  # type: ignore[arg-type]
        interval=Interval(
            _round(i.low, decimals),  # type: ignore[arg-type]
            _round(i.high, decimals),  # type: ignore[arg-type]
            i.level,
            i.method,
            i.note,
        ),
        p_value=_round(c.p_value, decimals),  # type: ignore[arg-type]
        details={
            k: (_round(v, decimals) if k not in ("df", "n_effective") else v)
            for k, v in c.details.items()
        },
    )


def _reason_out(
    gate: Gate, reason: GateReason, reference: str | None, decimals: int | None
) -> dict[str, Any]:
    """A ``GateReason`` as the wire's ``GateReasonOut``."""
    kind = (
        "bound"
        if isinstance(gate, BoundGate)
        else "flag"
        if isinstance(gate, FlagGate)
        else "compare"
    )
    details: dict[str, Any] = {}
    for key, value in reason.details.items():
        if isinstance(value, float):
            value = _finite(value)
            if key in _ROW_DETAILS:
                value = _round(value, decimals)
        details[key] = value
    op: str | None = None
    interval = None
    alpha = None
    if isinstance(gate, BoundGate):
        op = gate.op
    elif isinstance(gate, CompareGate):
        op = ">" if catalog.METRICS[gate.metric].higher_is_better else "<"
        alpha = gate.alpha
        if reason.interval is not None:
            low, high = reason.interval
            interval = {
                "low": _round(_finite(low), decimals),
                "high": _round(_finite(high), decimals),
                "level": gate.level,
            }
    return {
        "gate": gate_text(gate),
        "spec": dict(reason.gate),
        "kind": kind,
        "status": reason.status,
        "severity": gate.severity,
        "metric": reason.metric,
        "value": _round(_finite(reason.value), decimals),
        "op": op,
        "bound": _finite(reason.bound),
        "message": reason.message,
        "difference": _round(_finite(reason.difference), decimals),
        "interval": interval,
        "p_value": _round(_finite(reason.p_value), decimals),
        "alpha": alpha,
        "reference": reference if kind == "compare" else None,
        "details": details,
    }


def slice_verdict(
    gates: Sequence[Gate],
    report: Mapping[str, Any],
    *,
    slice_name: str,
    rows: NDArray[np.bool_] | None,
    labels: NDArray,
    candidate_losses: NDArray[np.float64],
    reference: Reference | None,
    decimals: int | None,
) -> dict[str, Any]:
    """The verdict on one slice (``VerdictOut`` without ``based_on``).

    ``report``: the core's report on the slice's rows (JSON form). ``rows``: the slice's rows
    in holdout order (None: all). ``decimals``: None for the exact verdict; else the report
    and the comparisons are rounded first, so the verdict reads only rounded numbers.
    """
    if not gates:  # nothing to read: pass, and no rounding of the report
        return {"status": "pass", "slice": slice_name, "reference": None, "note": "", "reasons": []}
    shown = report if decimals is None else round_nested(dict(report), decimals)
    comparisons: dict[int, Comparison] = {}
    if reference is not None and reference.row_losses is not None:
        take = (lambda a: a) if rows is None else (lambda a: a[rows])
        cand, ref = take(candidate_losses), take(reference.row_losses)
        for i, gate in enumerate(gates):
            if not isinstance(gate, CompareGate):
                continue
            needs_y = "y_true" in plan_comparison(gate.metric).needs
            c = compare_for_gate(
                gate,
                row_losses_candidate=cand,
                row_losses_reference=ref,
                y_true=take(labels) if needs_y else None,
            )
            comparisons[i] = c if decimals is None else _rounded_comparison(c, decimals)
    verdict = evaluate_gates(
        gates,
        scores=shown.get("scores") or {},
        bias_variance=shown.get("bias_variance") or {},
        flags=shown.get("flags") or [],
        comparisons=comparisons,
    )
    ref_id = None
    if reference is not None and any(isinstance(g, CompareGate) for g in gates):
        ref_id = reference.record.id
    return {
        "status": verdict.status,
        "slice": slice_name,
        "reference": ref_id,
        "note": "",
        "reasons": [
            _reason_out(g, r, ref_id, decimals) for g, r in zip(gates, verdict.reasons, strict=True)
        ],
    }


def with_verdicts(
    gates: Sequence[Gate],
    *,
    full_report: dict[str, Any],
    slices: Sequence[SliceReport],
    mask: NDArray[np.bool_],
    labels: NDArray,
    row_losses: NDArray[np.float64],
    reference: Reference | None,
    decimals: int | None,
    group: str | None = None,
) -> tuple[dict[str, Any], list[SliceReport]]:
    """The full report and the slice reports with their verdicts, ready to store.

    Full: the exact verdict. Feedback and reserve: the exact verdict and the one the group
    may see (``decimals``: the guard's rounding, None under guard ``none``). When the
    reference is another group's (the owner's holdout-wide reference), the group's verdict
    names it ``OTHER_GROUP_REFERENCE`` instead of its id: submitters never see another
    group's submission ids.
    """
    common = {"labels": labels, "candidate_losses": row_losses, "reference": reference}
    full = dict(full_report)
    full[VERDICT] = slice_verdict(
        gates, full_report, slice_name=FULL, rows=None, decimals=None, **common
    )
    out = []
    for part in slices:
        rows = mask if part.slice == FEEDBACK else ~mask
        report = dict(part.report)
        exact = slice_verdict(
            gates, part.report, slice_name=part.slice, rows=rows, decimals=None, **common
        )
        report[VERDICT] = exact
        shown = (
            exact
            if decimals is None
            else slice_verdict(
                gates, part.report, slice_name=part.slice, rows=rows, decimals=decimals, **common
            )
        )
        if reference is not None and reference.record.group != group:
            shown = _without_reference_id(shown)
        report[SUBMITTER_VERDICT] = shown
        out.append(replace(part, report=report))
    return full, out


def _without_reference_id(verdict: Mapping[str, Any]) -> dict[str, Any]:
    """``verdict`` with the reference's id replaced by ``OTHER_GROUP_REFERENCE``."""
    out = dict(verdict)
    if out.get("reference") is not None:
        out["reference"] = OTHER_GROUP_REFERENCE
    out["reasons"] = [
        {**r, "reference": OTHER_GROUP_REFERENCE} if r.get("reference") is not None else r
        for r in verdict.get("reasons", [])
    ]
    return out


# ------------------------------------------------------------------------------- views


def _stored(report: Mapping[str, Any] | None, key: str, slice_name: str) -> dict[str, Any]:
    """A stored verdict, or for a submission stored before verdicts existed (no gates then)
    the verdict of no gates."""
    found = None if report is None else report.get(key)
    if found is not None:
        return dict(found)
    return {"status": "pass", "slice": slice_name, "reference": None, "note": "", "reasons": []}


def group_verdict(
    parts_by_id: Mapping[str, Mapping[str, SliceReport]],
    record: SubmissionRecord,
    guard: GuardRecord | None,
) -> dict[str, Any]:
    """The verdict as the group was told: the submitter verdict of the submission whose
    feedback view the guard shows (this one, or the group's best under the Ladder)."""
    shown_id = record.id if guard is None else guard.shown_submission_id
    part = parts_by_id.get(shown_id, {}).get(FEEDBACK)
    verdict = _stored(None if part is None else part.report, SUBMITTER_VERDICT, FEEDBACK)
    verdict["based_on"] = shown_id
    if shown_id != record.id:
        verdict["note"] = WITHHELD_NOTE
        verdict["reasons"] = [
            {**r, "message": WITHHELD_PREFIX + r["message"]} if r["kind"] == "compare" else r
            for r in verdict["reasons"]
        ]
    return verdict


def slice_verdicts(
    parts: Mapping[str, SliceReport],
    record: SubmissionRecord,
    *,
    submitter: bool,
    closed: bool,
) -> dict[str, dict[str, Any]]:
    """``verdicts_by_slice``: owners every slice, exact; submitters the reserve (their
    rounded verdict) once the holdout is closed, else nothing."""
    out: dict[str, dict[str, Any]] = {}
    if submitter:
        if closed and RESERVE in parts:
            out[RESERVE] = _stored(parts[RESERVE].report, SUBMITTER_VERDICT, RESERVE)
    else:
        for name in (FEEDBACK, RESERVE):
            if name in parts:
                out[name] = _stored(parts[name].report, VERDICT, name)
        out[FULL] = _stored(record.report, VERDICT, FULL)
    for verdict in out.values():
        verdict["based_on"] = record.id
    return out


def status_of(part: SliceReport | None, key: str) -> str | None:
    """A stored verdict's status (standings), None when the slice is missing."""
    if part is None:
        return None
    return str(_stored(part.report, key, part.slice)["status"])


__all__ = [
    "REFERENCE_KEY",
    "SUBMITTER_VERDICT",
    "VERDICT",
    "WITHHELD_NOTE",
    "WITHHELD_PREFIX",
    "Reference",
    "check_reference",
    "comparable_row_losses",
    "gate_errors",
    "gate_text",
    "gates_of",
    "group_verdict",
    "resolve_reference",
    "slice_verdict",
    "slice_verdicts",
    "status_of",
    "with_verdicts",
]
