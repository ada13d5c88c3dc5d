"""Registering a holdout: checks, canonical form, fingerprint, idempotent insert.

Identical content under the same owner and name is the same holdout (200, same id);
anything different under that name is a conflict (409). "Identical" means the same task,
classes and normalized policy, and the same ids with the same labels in the same order:
the new rows are fingerprinted with the stored salt and compared with the stored
fingerprint, so the labels are never compared in the clear or held twice.
"""

from __future__ import annotations

import copy
from collections import Counter
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from marshmallow import ValidationError
from numpy.typing import NDArray

from service.ingest import (
    Limits,
    holdout_from_table,
    id_array,
    require_unique_ids,
    target_vector,
)
from service.scoring import catalog
from service.store import (
    DuplicateHoldoutNameError,
    HoldoutRecord,
    NewHoldout,
    Store,
    canonical_label_texts,
    fingerprint,
    new_salt,
)
from service.store.fingerprint import FORBIDDEN_CHARACTERS

from . import guarding, verdicts
from .errors import Conflict, ValidationFailed, problem_error
from .schemas import HoldoutPolicy

_MAX_EXAMPLES = 10


@dataclass(frozen=True)
class HoldoutInput:
    """A registration request after parsing, before any content check."""

    name: str
    task: str
    ids: NDArray  # (n,) str
    targets: NDArray  # (n,) float64 (regression) or canonical class strings
    classes: Any  # JSON value as sent, or None
    policy: dict[str, Any] | None  # loaded by HoldoutPolicy, or None


def from_json(data: dict[str, Any], limits: Limits) -> HoldoutInput:
    """From a ``HoldoutCreate``-validated JSON body."""
    task = data["task"]
    return HoldoutInput(
        name=data["name"],
        task=task,
        ids=id_array(data["ids"], field="ids", limits=limits),
        targets=target_vector(
            data["y_true"], field="y_true", task=catalog.kind(task), limits=limits
        ),
        classes=data["classes"],
        policy=data["policy"],
    )


def from_table(
    fields: dict[str, Any], table: pa.Table, classes: Any, policy: Any, limits: Limits
) -> HoldoutInput:
    """From a CSV/Parquet table and its ``HoldoutUploadFields`` (classes, policy parsed)."""
    task = fields["task"]
    if policy is not None:
        try:
            policy = HoldoutPolicy().load(policy)
        except ValidationError as exc:
            raise ValidationError({"policy": exc.messages}) from None
    if classes is not None and not isinstance(classes, list):
        raise ValidationFailed(
            "classes must be a JSON array.", [problem_error("classes", "expected a JSON array")]
        )
    ids, targets = holdout_from_table(
        table,
        task=catalog.kind(task),
        id_column=fields["id_column"],
        target_column=fields["target_column"],
        limits=limits,
    )
    return HoldoutInput(fields["name"], task, ids, targets, classes, policy)


def _examples(values: pa.Array | list[Any]) -> list[str]:
    items = values.to_pylist() if isinstance(values, (pa.Array, pa.ChunkedArray)) else values
    return [str(v) for v in items[:_MAX_EXAMPLES]]


def _separator_errors(values: NDArray, field: str, what: str) -> list[dict[str, Any]]:
    """Errors for values holding the separator characters the fingerprint encoding reserves."""
    arr = pa.array(values, type=pa.string())
    has_separator = pc.match_substring(arr, FORBIDDEN_CHARACTERS[0])
    for character in FORBIDDEN_CHARACTERS[1:]:
        has_separator = pc.or_(has_separator, pc.match_substring(arr, character))
    bad = arr.filter(has_separator)
    if not len(bad):
        return []
    return [
        problem_error(
            field,
            f"{len(bad)} {what} contain U+001E or U+001F, which the fingerprint's canonical "
            "encoding reserves as separators",
            len(bad),
            [repr(v)[:60] for v in bad.to_pylist()[:_MAX_EXAMPLES]],
        )
    ]


def _duplicate_errors(values: list[str], field: str, what: str) -> list[dict[str, Any]]:
    distinct = [v for v, count in Counter(values).items() if count > 1]
    if not distinct:
        return []
    return [
        problem_error(
            field,
            f"{len(distinct)} {what} appear more than once",
            len(distinct),
            distinct[:_MAX_EXAMPLES],
        )
    ]


def _sorted_classes(labels: NDArray) -> list[str]:
    """Distinct labels, sorted numerically when every one is a number, else as text."""
    distinct = pc.unique(pa.array(labels, type=pa.string())).to_pylist()
    try:
        return sorted(distinct, key=float)
    except ValueError:
        return sorted(distinct)


@dataclass(frozen=True)
class Prepared:
    """A checked registration, ready to compare or insert."""

    name: str
    task: str
    ids: NDArray
    labels: NDArray  # float64 or intp class indices
    classes: list[str] | None
    policy: dict[str, Any]
    label_texts: list[str]


def prepare(data: HoldoutInput, limits: Limits) -> Prepared:
    """Check a registration and bring it to canonical form; 422 listing every problem."""
    task = data.task
    n = int(data.ids.shape[0])
    errors: list[dict[str, Any]] = []
    if n == 0:
        errors.append(problem_error("ids", "a holdout needs at least one row"))
    if n > limits.max_rows:
        errors.append(problem_error("ids", f"{n} rows exceed HELDOUT_MAX_ROWS={limits.max_rows}"))
    if data.targets.shape[0] != n:
        errors.append(
            problem_error("y_true", f"{data.targets.shape[0]} labels for {n} ids; give one per id")
        )
    if errors:
        raise ValidationFailed("The holdout's rows are invalid.", errors)
    require_unique_ids(data.ids, field="ids")
    errors.extend(_separator_errors(data.ids, "ids", "ids"))

    policy_in = data.policy or {}
    try:
        metric = catalog.primary_metric(task, policy_in.get("primary_metric"))
    except ValueError as exc:
        errors.append(problem_error("policy.primary_metric", str(exc)))
        metric = None
    groups = policy_in.get("groups")
    gates = policy_in.get("gates")
    errors.extend(
        verdicts.gate_errors(gates, task=task, primary_metric=metric.name if metric else None)
    )
    policy = {
        "primary_metric": metric.name if metric else None,
        "groups": None if groups is None else sorted(set(groups)),
        **guarding.reuse_policy(policy_in),
        "gates": [] if gates is None else copy.deepcopy(list(gates)),
    }

    classes: list[str] | None = None
    labels: NDArray
    if task == catalog.REGRESSION:
        if data.classes is not None:
            errors.append(problem_error("classes", "classes apply to binary and multiclass only"))
        labels = np.asarray(data.targets, dtype=np.float64)
    else:
        if data.classes is not None:
            classes = [
                str(c)
                for c in target_vector(
                    data.classes, field="classes", task=catalog.kind(task), limits=limits
                )
            ]
            errors.extend(_duplicate_errors(classes, "classes", "classes"))
            errors.extend(
                _separator_errors(np.asarray(classes, dtype=object), "classes", "classes")
            )
        else:
            classes = _sorted_classes(data.targets)
        wanted = "exactly 2" if task == catalog.BINARY else "at least 3"
        if (task == catalog.BINARY) != (len(classes) == 2) or len(classes) < 2:
            hint = " (use task multiclass)" if len(classes) > 2 else ""
            if task == catalog.MULTICLASS and len(classes) == 2:
                hint = " (use task binary)"
            source = "classes" if data.classes is not None else "y_true"
            errors.append(
                problem_error(
                    source,
                    f"task {task} needs {wanted} classes, found {len(classes)}{hint}; list "
                    "every class in 'classes' if some are absent from the labels",
                )
            )
        index = pc.index_in(
            pa.array(data.targets, type=pa.string()), value_set=pa.array(classes, type=pa.string())
        )
        unknown_mask = pc.is_null(index)
        n_unknown = int(pc.sum(unknown_mask).as_py() or 0)
        if n_unknown:
            unknown = pc.unique(pa.array(data.targets, type=pa.string()).filter(unknown_mask))
            errors.append(
                problem_error(
                    "y_true",
                    f"{n_unknown} labels are not among the classes {classes}",
                    n_unknown,
                    _examples(unknown),
                )
            )
            labels = np.zeros(n, dtype=np.intp)
        else:
            labels = index.to_numpy(zero_copy_only=False).astype(np.intp)
    if not errors:
        errors.extend(guarding.split_errors(policy, task, labels))
    if errors:
        raise ValidationFailed("The holdout is invalid.", errors)
    return Prepared(
        name=data.name,
        task=task,
        ids=data.ids,
        labels=labels,
        classes=classes,
        policy=policy,
        label_texts=canonical_label_texts(task, labels, classes),
    )


def _differences(existing: HoldoutRecord, prepared: Prepared, store: Store) -> list[str]:
    diffs = []
    if existing.task != prepared.task:
        diffs.append("task")
    if existing.classes != prepared.classes:
        diffs.append("classes")
    registered = {k: v for k, v in existing.policy.items() if k != verdicts.REFERENCE_KEY}
    if {"gates": [], **registered} != prepared.policy:
        diffs.append("policy")
    if not diffs:
        salt = store.holdout_arrays(existing.id).salt
        if fingerprint(salt, prepared.ids.tolist(), prepared.label_texts) != existing.fingerprint:
            diffs.append("ids or labels")
    return diffs


def _same_or_conflict(existing: HoldoutRecord, prepared: Prepared, store: Store) -> HoldoutRecord:
    diffs = _differences(existing, prepared, store)
    if diffs:
        raise Conflict(
            f"This owner already has a holdout named {prepared.name!r} ({existing.id}) whose "
            f"{', '.join(diffs)} differ. Labels are immutable: register under a new name.",
            [problem_error(d.split(" ")[0], "differs from the registered holdout") for d in diffs],
        )
    return existing


def register(
    store: Store, prepared: Prepared, *, owner: str, token_id: str
) -> tuple[HoldoutRecord, bool]:
    """Insert the holdout, or return the identical one already registered.

    Returns ``(record, created)``; raises ``Conflict`` when the name is taken by different
    content (also when a concurrent registration won the race).
    """
    existing = store.holdout_by_name(owner, prepared.name)
    if existing is not None:
        return _same_or_conflict(existing, prepared, store), False
    salt = new_salt()
    split_seed, mask = guarding.draw_split(
        prepared.task, prepared.labels, prepared.policy["feedback_fraction"]
    )
    new = NewHoldout(
        owner=owner,
        name=prepared.name,
        task=prepared.task,
        classes=prepared.classes,
        policy=prepared.policy,
        created_by=token_id,
        ids=prepared.ids,
        labels=prepared.labels,
        salt=salt,
        fingerprint=fingerprint(salt, prepared.ids.tolist(), prepared.label_texts),
        split_seed=split_seed,
        feedback_mask=mask,
    )
    try:
        return store.insert_holdout(new), True
    except DuplicateHoldoutNameError:
        existing = store.holdout_by_name(owner, prepared.name)
        assert existing is not None
        return _same_or_conflict(existing, prepared, store), False


__all__ = ["HoldoutInput", "Prepared", "from_json", "from_table", "prepare", "register"]
