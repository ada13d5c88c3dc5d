"""Recompute a holdout's fingerprint from its labels and the salt revealed at close.

At registration the service publishes ``fingerprint = SHA-256(salt || encoding)``
(``service.store.fingerprint``); closing the holdout reveals ``salt``. Anyone holding the ids
and labels in registration order can then check that the labels used for scoring are the
ones committed to: ``heldout verify-fingerprint --salt HEX --fingerprint HEX FILE``.

The file is read the way registration reads it (``service.ingest``), so the labels get the
same canonical text: CSV (``.csv``, optionally ``.csv.gz``), Parquet (``.parquet``) or JSON
(``.json``: the registration body's ``{"ids": [...], "y_true": [...]}``, the same with an
``id`` key, or a list of ``{"id": ..., "y_true": ...}`` rows). Regression labels are encoded
as Python's ``repr`` of the float, classification labels as their class name; without
``task`` both encodings are tried (regression only when every label is a number).
"""

from __future__ import annotations

import gzip
import hmac
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
from numpy.typing import NDArray

from service.ingest import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    IngestError,
    holdout_from_table,
    id_array,
    read_table,
    target_vector,
)
from service.ingest.limits import DEFAULT_LIMITS
from service.store.fingerprint import SALT_BYTES, canonical_label_texts, fingerprint

KINDS = ("regression", "classification")


class VerifyError(Exception):
    """The inputs cannot be checked (unreadable file, malformed hex): not a mismatch."""


@dataclass(frozen=True)
class Verification:
    """The outcome: ``matched``, under which label encoding, over how many rows."""

    matched: bool
    kind: str | None  # the encoding that matched: regression or classification
    n_rows: int


def _hex(value: str, name: str, n_bytes: int) -> bytes:
    try:
        raw = bytes.fromhex(value.strip())
    except ValueError:
        raise VerifyError(f"--{name} must be hexadecimal, got {value[:80]!r}") from None
    if len(raw) != n_bytes:
        raise VerifyError(f"--{name} must be {n_bytes} bytes ({2 * n_bytes} hex digits)")
    return raw


def _json_columns(data: Any, id_column: str, target_column: str) -> tuple[Any, Any]:
    if isinstance(data, list):
        try:
            return [row[id_column] for row in data], [row[target_column] for row in data]
        except (KeyError, TypeError):
            raise VerifyError(
                f"a JSON list must hold objects with {id_column!r} and {target_column!r}"
            ) from None
    if isinstance(data, dict):
        ids = data.get(id_column, data.get("ids"))
        if ids is not None and target_column in data:
            return ids, data[target_column]
    raise VerifyError(
        f"JSON must be an object with the arrays {id_column!r} (or 'ids') and "
        f"{target_column!r}, or a list of row objects"
    )


def read_rows(
    path: Path, kind: str, *, id_column: str = "id", target_column: str = "y_true"
) -> tuple[NDArray, NDArray]:
    """Ids (n,) and targets (n,) of a labels file, read as registration reads them."""
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise VerifyError(f"cannot read {path}: {exc.strerror}") from None
    name = path.name.lower()
    if name.endswith(".gz"):
        try:
            raw = gzip.decompress(raw)
        except (OSError, EOFError) as exc:
            raise VerifyError(f"{path} is not valid gzip: {exc}") from None
        name = name[:-3]
    try:
        if name.endswith(".json"):
            try:
                data = orjson.loads(raw)
            except orjson.JSONDecodeError as exc:
                raise VerifyError(f"{path} is not valid JSON: {exc}") from None
            ids, targets = _json_columns(data, id_column, target_column)
            return (
                id_array(ids, field=id_column, limits=DEFAULT_LIMITS),
                target_vector(targets, field=target_column, task=kind, limits=DEFAULT_LIMITS),
            )
        if name.endswith(".csv"):
            media = CSV_MEDIA_TYPE
        elif name.endswith(".parquet") or name.endswith(".pq"):
            media = PARQUET_MEDIA_TYPE
        else:
            raise VerifyError(f"{path}: name the file .csv, .parquet or .json")
        table = read_table(raw, media, task=kind, id_column=id_column, target_column=target_column)
        return holdout_from_table(
            table, task=kind, id_column=id_column, target_column=target_column
        )
    except IngestError as exc:
        raise VerifyError(f"{path}: {exc.message}") from None


def verify_file(
    path: Path,
    *,
    salt: str,
    expected: str,
    kind: str | None = None,
    id_column: str = "id",
    target_column: str = "y_true",
) -> Verification:
    """Whether ``SHA-256(salt || encoding of the file's rows)`` equals ``expected``.

    ``kind``: ``regression`` or ``classification`` (``binary`` and ``multiclass`` mean
    classification); None tries both. Raises ``VerifyError`` for unusable input.
    """
    salt_bytes = _hex(salt, "salt", SALT_BYTES)
    want = _hex(expected, "fingerprint", 32).hex()
    if kind in ("binary", "multiclass"):
        kind = "classification"
    if kind is not None and kind not in KINDS:
        raise VerifyError("--task must be regression, binary, multiclass or classification")
    kinds = [kind] if kind is not None else list(KINDS)
    n_rows = 0
    last_error: VerifyError | None = None
    for k in kinds:
        try:
            ids, targets = read_rows(path, k, id_column=id_column, target_column=target_column)
        except VerifyError as exc:
            last_error = exc
            continue
        n_rows = int(ids.shape[0])
        if k == "regression":
            texts = canonical_label_texts("regression", targets)
        else:
            texts = [str(t) for t in targets.tolist()]
        got = fingerprint(salt_bytes, [str(i) for i in ids.tolist()], texts)
        if hmac.compare_digest(got, want):
            return Verification(True, k, n_rows)
    if n_rows == 0 and last_error is not None:
        raise last_error
    return Verification(False, None, n_rows)


__all__ = ["KINDS", "Verification", "VerifyError", "read_rows", "verify_file"]
