"""Stored records to response objects (then dumped through their schemas).

Submitters never see the metrics whose value is a single row's residual
(``catalog.REVEALS_ROW``: the maximum and the median absolute error): with predictions of
zero those would be a label's magnitude. Owners and admins see every metric.
"""

from __future__ import annotations

from typing import Any

from service.scoring import catalog
from service.store import HoldoutRecord, SubmissionRecord

from .auth import Principal

_METRIC_KEYED = ("scores", "intervals", "seed_spread", "ensemble", "train_scores")


def holdout_out(record: HoldoutRecord) -> dict[str, Any]:
    return {
        "id": record.id,
        "name": record.name,
        "task": record.task,
        "n_rows": record.n_rows,
        "classes": record.classes,
        "fingerprint": record.fingerprint,
        "policy": record.policy,
        "owner": record.owner,
        "created_at": record.created_at,
    }


def _sweep(record: SubmissionRecord) -> dict[str, Any] | None:
    if record.sweep_name is None:
        return None
    return {"name": record.sweep_name, "complexity": record.sweep_complexity}


def redact(report: dict[str, Any]) -> dict[str, Any]:
    """The report without the single-row metrics (``catalog.REVEALS_ROW``): what submitters see."""
    out = dict(report)
    for key in _METRIC_KEYED:
        if isinstance(out.get(key), dict):
            out[key] = {k: v for k, v in out[key].items() if k not in catalog.REVEALS_ROW}
    details = dict(out.get("details") or {})
    if isinstance(details.get("per_seed"), dict):
        details["per_seed"] = {
            k: v for k, v in details["per_seed"].items() if k not in catalog.REVEALS_ROW
        }
    out["details"] = details
    return out


def submission_out(
    record: SubmissionRecord, holdout: HoldoutRecord, principal: Principal
) -> dict[str, Any]:
    assert record.report is not None
    report = record.report if principal.role != "submitter" else redact(record.report)
    return {
        "id": record.id,
        "holdout_id": record.holdout_id,
        "group": record.group,
        "model": record.model,
        "task": holdout.task,
        "n_rows": report["n_rows"],
        "n_seeds": record.n_seeds,
        "seeds": record.seeds,
        "created_at": record.created_at,
        "primary_metric": record.primary_metric,
        "primary_value": record.primary_value,
        "scores": report["scores"],
        "intervals": report["intervals"],
        "seed_spread": report["seed_spread"],
        "ensemble": report["ensemble"],
        "bias_variance": report["bias_variance"],
        "flags": report["flags"],
        "train_scores": report["train_scores"],
        "details": report["details"],
        "sweep": _sweep(record),
        "fingerprint": holdout.fingerprint,
    }


def summary_out(record: SubmissionRecord) -> dict[str, Any]:
    return {
        "id": record.id,
        "holdout_id": record.holdout_id,
        "group": record.group,
        "model": record.model,
        "n_seeds": record.n_seeds,
        "created_at": record.created_at,
        "primary_metric": record.primary_metric,
        "primary_value": record.primary_value,
        "sweep": _sweep(record),
    }


__all__ = ["holdout_out", "redact", "submission_out", "summary_out"]
