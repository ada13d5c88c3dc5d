"""CSV and Parquet bodies to checked arrays: holdouts and submissions.

Media types: ``text/csv`` (RFC 4180, UTF-8, first line is the header; a UTF-8 byte order
mark is skipped) and ``application/vnd.apache.parquet``.

Holdout table: column ``id`` and column ``y_true`` (names can be changed by the caller),
nothing else.

Submission table, one row per id, any row order:

- ``id``: the row's id (text or integers; CSV ids are always read as text, so ``007``
  stays ``007``);
- regression: ``pred`` (one seed) or ``pred.<seed>`` for each of K seeds, where ``<seed>``
  is any label without dots (``pred.0``, ``pred.seed-17``...), holding numbers;
- classification: ``pred`` / ``pred.<seed>`` hold predicted class labels, and
  ``prob.<class>`` (one seed) or ``prob.<seed>.<class>`` hold the predicted probability
  of each class (one column per class of the holdout, each row summing to 1 within
  ``PROBABILITY_SUM_TOLERANCE``). Labels, probabilities or both may be sent; when both,
  every seed needs both. Class labels may contain dots; seed labels may not.

Every other column is refused (422), as are repeated column names. Numbers in CSV are
plain decimal text (``0.25``, ``-3e-2``); ``nan`` and ``inf`` parse but are refused as
non-finite, and an empty cell is a missing value, not zero. Rows are counted from 1 after
the header in messages.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from numpy.typing import NDArray

from ._convert import (
    Tally,
    floats_from_arrow,
    nonfinite_error,
    raise_first,
    text_from_arrow,
    text_to_numpy,
)
from .align import align_ids, require_unique_ids
from .arrays import check_probabilities, check_task, class_array, unknown_labels_error
from .errors import MAX_EXAMPLES, IngestError, content_error, show_text, show_value
from .limits import DEFAULT_LIMITS, Limits
from .streaming import CSV_BLOCK_BYTES, StreamedCsv

CSV_MEDIA_TYPE = "text/csv"
PARQUET_MEDIA_TYPE = "application/vnd.apache.parquet"
ID_COLUMN = "id"
SINGLE_SEED_LABEL = "0"
"""Seed label reported for a table with one unlabeled seed (``pred`` / ``prob.<class>``)."""

_PARSE_ERRORS = (pa.ArrowException, OSError, ValueError, EOFError, IndexError, KeyError,
                 TypeError, OverflowError, MemoryError)
_HEADER_BLOCK = 1 << 20


@dataclass(frozen=True)
class SubmissionArrays:
    """A submission in the order it was sent (align with ``align_ids`` before scoring), or
    in the holdout's order when ``submission_from_table`` was given the holdout's ids.

    ``ids`` (n,); ``predictions`` (K, n) for regression; ``labels`` (K, n) class indices and
    ``probabilities`` (K, n, C) for classification, each None when not sent; ``seeds`` the
    K seed labels in column order.
    """

    ids: NDArray[Any]
    predictions: NDArray[np.float64] | None
    labels: NDArray[np.intp] | None
    probabilities: NDArray[np.float64] | None
    seeds: list[str]


def _row(i: int) -> str:
    return f"row {i + 1}"


# --------------------------------------------------------------------------------- reading


def _media_type(media_type: str) -> str:
    main, _, params = (media_type or "").partition(";")
    main = main.strip().lower()
    if main not in (CSV_MEDIA_TYPE, PARQUET_MEDIA_TYPE):
        raise IngestError(
            415, "Content-Type",
            f"Content-Type: {media_type!r} is not supported; send {CSV_MEDIA_TYPE} or "
            f"{PARQUET_MEDIA_TYPE}",
            count=1, examples=[media_type or ""],
        )
    for param in params.split(";"):
        key, _, value = param.partition("=")
        if key.strip().lower() == "charset":
            charset = value.strip().strip('"').lower()
            if charset not in ("utf-8", "utf8", "us-ascii"):
                raise IngestError(
                    415, "Content-Type",
                    f"Content-Type: charset {charset!r} is not supported; send UTF-8",
                    count=1, examples=[media_type],
                )
    return main


def _duplicate_columns(names: Sequence[str]) -> None:
    repeated = [name for name, n in Counter(names).items() if n > 1]
    if repeated:
        raise content_error(
            "columns", len(repeated), "column names appear more than once",
            [show_text(name) for name in repeated], hint="every column needs its own name",
        )


def _unreadable(kind: str, exc: BaseException) -> IngestError:
    detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    detail = re.sub(r"\bRow #(\d+)", r"line \1", detail)  # Arrow counts the header line too
    return IngestError(400, "body", f"body: not a readable {kind} file ({detail[:300]})", count=1)


def _csv_column_types(
    names: Sequence[str], task: str | None, id_column: str, target_column: str
) -> dict[str, pa.DataType]:
    types: dict[str, pa.DataType] = {}
    for name in names:
        numeric = name.startswith("prob.") or (
            task == "regression"
            and (name == "pred" or name.startswith("pred.") or name == target_column)
        )
        types[name] = pa.float64() if numeric and name != id_column else pa.string()
    return types


def _read_csv(body: bytes, limits: Limits, task: str | None, id_column: str,
              target_column: str) -> pa.Table:
    source = pa.py_buffer(body)
    try:
        header = pacsv.open_csv(
            pa.BufferReader(source),
            read_options=pacsv.ReadOptions(use_threads=False, block_size=_HEADER_BLOCK),
        )
        names = header.schema.names
    except _PARSE_ERRORS as exc:
        raise _unreadable("CSV", exc) from None
    _duplicate_columns(names)
    typed = _csv_column_types(names, task, id_column, target_column)
    as_text = {name: pa.string() for name in names}
    read_options = pacsv.ReadOptions(use_threads=True, block_size=CSV_BLOCK_BYTES)
    table = None
    for column_types in ((typed, as_text) if typed != as_text else (as_text,)):
        convert = pacsv.ConvertOptions(
            column_types=column_types, null_values=[], strings_can_be_null=False,
            quoted_strings_can_be_null=False, true_values=[], false_values=[],
        )
        try:
            table = pacsv.read_csv(pa.BufferReader(source), read_options=read_options,
                                   convert_options=convert)
            break
        except _PARSE_ERRORS as exc:
            # A number column that does not parse is read again as text, so the checks
            # below can name every bad cell; anything else is a malformed file.
            if column_types is as_text:
                raise _unreadable("CSV", exc) from None
    assert table is not None
    return table


def _read_parquet(body: bytes, limits: Limits) -> pa.Table:
    try:
        parquet = pq.ParquetFile(pa.BufferReader(pa.py_buffer(body)))
        meta = parquet.metadata
        names = parquet.schema_arrow.names
        n_rows = meta.num_rows
        unpacked = sum(meta.row_group(i).total_byte_size for i in range(meta.num_row_groups))
    except _PARSE_ERRORS as exc:
        raise _unreadable("Parquet", exc) from None
    if n_rows > limits.max_rows:
        raise IngestError(
            413, "body", f"body: the table has {n_rows} rows, more than the limit of "
            f"{limits.max_rows}", count=1,
        )
    if unpacked > limits.max_body_bytes:
        raise IngestError(
            413, "body", f"body: the Parquet data unpacks to {unpacked} bytes, more than the "
            f"limit of {limits.max_body_bytes}", count=1,
        )
    _duplicate_columns(names)
    try:
        return parquet.read(use_threads=True)
    except _PARSE_ERRORS as exc:
        raise _unreadable("Parquet", exc) from None


def read_table(
    body: bytes,
    media_type: str,
    *,
    limits: Limits | None = None,
    task: str | None = None,
    id_column: str = ID_COLUMN,
    target_column: str = "y_true",
) -> pa.Table:
    """Parse a CSV or Parquet body into an Arrow table (content is checked later).

    Parameters
    ----------
    body : bytes
        The decoded body (``decode_body``).
    media_type : str
        The Content-Type: ``text/csv`` (optionally ``; charset=utf-8``) or
        ``application/vnd.apache.parquet``; anything else is 415.
    task : {"regression", "classification"} or None
        Optional. For CSV it lets number columns (``pred*`` and the target for regression,
        ``prob.*`` always) be parsed straight to float64, which is faster; without it they
        are read as text and parsed later. The id column is always read as text.

    Raises
    ------
    IngestError
        400 for an empty or malformed file, 413 for too many rows (or, for Parquet, too
        many bytes once unpacked), 415 for other media types, 422 for repeated column names.
    """
    limits = limits or DEFAULT_LIMITS
    if task is not None:
        check_task(task)
    kind = _media_type(media_type)
    if not body:
        raise IngestError(400, "body", "body: the request body is empty", count=1)
    if kind == CSV_MEDIA_TYPE:
        table = _read_csv(body, limits, task, id_column, target_column)
    else:
        table = _read_parquet(body, limits)
    if table.num_rows > limits.max_rows:
        raise IngestError(
            413, "body", f"body: the table has {table.num_rows} rows, more than the limit of "
            f"{limits.max_rows}", count=1,
        )
    return table


# ------------------------------------------------------------------------------ columns


def _check_columns(table: pa.Table, limits: Limits) -> list[str]:
    names = list(table.column_names)
    _duplicate_columns(names)
    if table.num_rows == 0:
        raise IngestError(422, "body", "body: the table has no rows", count=0)
    if table.num_rows > limits.max_rows:
        raise IngestError(
            413, "body", f"body: the table has {table.num_rows} rows, more than the limit of "
            f"{limits.max_rows}", count=1,
        )
    return names


def _missing_column(name: str, names: Sequence[str]) -> IngestError:
    return IngestError(
        422, "columns",
        f"columns: the required column {name!r} is missing; the table has "
        f"{len(names)} columns" + (": " + ", ".join(show_text(c) for c in names[:MAX_EXAMPLES])
                                    if names else ""),
        count=1, examples=[show_text(c) for c in names[:MAX_EXAMPLES]],
    )


def _unknown_columns(unknown: Sequence[str], hint: str) -> IngestError:
    return content_error("columns", len(unknown), "columns are not part of the layout",
                         [show_text(c) for c in unknown], hint=hint)


def _ids(table: pa.Table, id_column: str, limits: Limits) -> NDArray[Any]:
    arr = text_from_arrow(table.column(id_column), id_column, _row, limits, labels=False,
                          noun="ids")
    return text_to_numpy(arr)


def holdout_from_table(
    table: pa.Table | StreamedCsv,
    *,
    task: str,
    id_column: str = ID_COLUMN,
    target_column: str = "y_true",
    limits: Limits | None = None,
) -> tuple[NDArray[Any], NDArray[Any]]:
    """A holdout's ids (n,) and targets (n,) from a table with exactly those two columns.

    Ids must be unique. Targets are finite float64 for regression, canonical label text for
    classification (see ``service.ingest.arrays``).
    """
    limits = limits or DEFAULT_LIMITS
    check_task(task)
    if isinstance(table, StreamedCsv):
        table = table.table()
    names = _check_columns(table, limits)
    for required in (id_column, target_column):
        if required not in names:
            raise _missing_column(required, names)
    unknown = [c for c in names if c not in (id_column, target_column)]
    if unknown:
        raise _unknown_columns(
            unknown, f"a holdout table has exactly the columns {id_column!r} and "
            f"{target_column!r}",
        )
    ids = _ids(table, id_column, limits)
    require_unique_ids(ids, field=id_column)
    column = table.column(target_column)
    if task == "regression":
        targets = floats_from_arrow(column, target_column, _row)
        err = nonfinite_error(target_column, targets, _row)
        if err is not None:
            raise err
        return ids, targets
    labels = text_from_arrow(column, target_column, _row, limits, labels=True, noun="labels")
    return ids, text_to_numpy(labels)


@dataclass
class _Layout:
    seeds: list[str]
    pred: dict[str, str]  # seed -> column
    prob: dict[str, list[str]]  # seed -> one column per class, in class order


_LAYOUT_HINT = (
    "expected 'id', then 'pred' or 'pred.<seed>' columns{extra}"
)


def _seed_label_problems(columns: Sequence[str], prefix: str) -> list[str]:
    return [c for c in columns if not c[len(prefix):] or "." in c[len(prefix):]]


def _layout(names: Sequence[str], task: str, classes: Sequence[str] | None) -> _Layout:
    others = [c for c in names if c != ID_COLUMN]
    single = "pred" in others
    multi = [c for c in others if c.startswith("pred.")]
    probs = [c for c in others if c.startswith("prob.")] if task == "classification" else []
    extra = " and 'prob.<class>' or 'prob.<seed>.<class>' columns" if task == "classification" \
        else " (prob.* columns are for classification)"
    hint = _LAYOUT_HINT.format(extra=extra)
    unknown = [c for c in others if c != "pred" and c not in multi and c not in probs]
    if unknown:
        raise _unknown_columns(unknown, hint)
    if single and multi:
        raise content_error(
            "columns", len(multi), "'pred.<seed>' columns appear beside a plain 'pred' column",
            [show_text(c) for c in multi],
            hint="use 'pred' for one seed, or only 'pred.<seed>' columns for several",
        )
    bad_labels = _seed_label_problems(multi, "pred.")
    if bad_labels:
        raise content_error("columns", len(bad_labels), "columns have an empty seed label or "
                            "one containing a dot", [show_text(c) for c in bad_labels],
                            hint="name them 'pred.<seed>' with a seed label without dots")
    pred = {SINGLE_SEED_LABEL: "pred"} if single else {c[5:]: c for c in multi}
    if task == "regression":
        if not pred:
            raise IngestError(422, "columns", f"columns: no prediction columns; {hint}",
                              count=0, examples=[show_text(c) for c in names[:MAX_EXAMPLES]])
        return _Layout(list(pred), pred, {})
    assert classes is not None
    class_set = {c: i for i, c in enumerate(classes)}
    if not pred and not probs:
        raise IngestError(422, "columns", f"columns: no prediction columns; {hint}",
                          count=0, examples=[show_text(c) for c in names[:MAX_EXAMPLES]])
    one_seed = single or (not multi and all(c[5:] in class_set for c in probs))
    found: dict[str, dict[int, str]] = {}
    bad_class: list[str] = []
    malformed: list[str] = []
    for column in probs:
        rest = column[5:]
        if one_seed:
            seed, cls = SINGLE_SEED_LABEL, rest
        else:
            seed, dot, cls = rest.partition(".")
            if not dot or not seed:
                malformed.append(column)
                continue
        if cls not in class_set:
            bad_class.append(column)
            continue
        found.setdefault(seed, {})[class_set[cls]] = column
    if malformed:
        raise content_error(
            "columns", len(malformed), "probability columns are not named "
            "'prob.<seed>.<class>'", [show_text(c) for c in malformed],
            hint="with several seeds, name them prob.<seed>.<class>; with one, prob.<class>",
        )
    if bad_class:
        raise content_error(
            "columns", len(bad_class), "probability columns name a class this holdout "
            "does not have", [show_text(c) for c in bad_class],
        )
    if pred and found:
        no_prob = [pred[s] for s in pred if s not in found]
        no_pred = [next(iter(found[s].values())) for s in found if s not in pred]
        if no_prob or no_pred:
            raise content_error(
                "columns", len(no_prob) + len(no_pred),
                "seeds have labels without probabilities or probabilities without labels",
                [show_text(c) for c in no_prob + no_pred],
                hint="send labels, probabilities, or both for every seed",
            )
    incomplete = [s for s, cols in found.items() if len(cols) != len(class_set)]
    if incomplete:
        examples = [f"seed {show_text(s)} has {len(found[s])} of {len(class_set)} class columns"
                    for s in incomplete]
        raise content_error(
            "columns", len(incomplete), "seeds lack a probability column for some classes",
            examples, hint="send one probability column per class of this holdout",
        )
    seeds = list(pred) if pred else list(found)
    prob = {s: [found[s][i] for i in range(len(class_set))] for s in found}
    return _Layout(seeds, pred, prob)


def _streamed_regression(
    stream: StreamedCsv, limits: Limits, holdout_ids: NDArray[Any]
) -> SubmissionArrays | None:
    """A clean regression CSV read block by block into (K, n) in holdout order, or None
    when the body must be read whole (anything unusual; ``streaming`` explains)."""
    names = stream.column_names
    n = len(holdout_ids)
    if names is None or stream.task != "regression" or n == 0 or n > limits.max_rows \
            or ID_COLUMN not in names:
        return None
    try:
        layout = _layout(names, "regression", None)
    except IngestError:
        return None
    if len(layout.seeds) > limits.max_seeds:
        return None
    column_types = _csv_column_types(names, stream.task, ID_COLUMN, "y_true")
    got = stream.regression_predictions(
        column_types, ID_COLUMN, [layout.pred[s] for s in layout.seeds], n
    )
    if got is None:
        return None
    id_text, predictions = got
    try:
        order = align_ids(holdout_ids, id_text, field=ID_COLUMN)
    except IngestError:
        return None
    del id_text
    scratch = np.empty(n, dtype=np.float64)
    for row in predictions:  # into holdout order, one seed at a time
        np.take(row, order, out=scratch)
        row[...] = scratch
    return SubmissionArrays(holdout_ids, predictions, None, None, list(layout.seeds))


def submission_from_table(
    table: pa.Table | StreamedCsv,
    *,
    task: str,
    classes: Sequence[str] | None,
    limits: Limits,
    holdout_ids: NDArray[Any] | None = None,
) -> SubmissionArrays:
    """A submission table (module docstring layout) as arrays, in the order sent or aligned.

    ``classes`` are the holdout's classes (canonical text, in the order probabilities are
    returned); required for classification, ignored for regression.

    With ``holdout_ids`` (n,), the ids are aligned to them (``align_ids``) before any value
    column is converted, and every array comes back in holdout order (``ids`` is then
    ``holdout_ids``): each column is gathered once into its row of the result, so no
    (K, n) array is copied afterwards, and the submitted ids' numpy form is released as
    soon as they are aligned. Problems with the ids are reported together with problems
    in the value columns (ids first); rows in messages are always the submitted rows.

    ``table`` may be a ``StreamedCsv`` (a CSV body still on the wire): a clean regression
    submission with ``holdout_ids`` is then read a block at a time, never held whole;
    anything else reads the body whole first and goes the same way as a table, so a
    refusal is the same either way.
    """
    check_task(task)
    if task == "classification" and classes is None:
        raise ValueError("classes are required for classification")
    if isinstance(table, StreamedCsv):
        if task == "regression" and holdout_ids is not None:
            streamed = _streamed_regression(table, limits, holdout_ids)
            if streamed is not None:
                table.close()
                return streamed
        table = table.table()
    names = _check_columns(table, limits)
    if ID_COLUMN not in names:
        raise _missing_column(ID_COLUMN, names)
    class_arr = class_array(classes) if task == "classification" and classes is not None \
        else None
    layout = _layout(names, task, classes)
    k = len(layout.seeds)
    if k > limits.max_seeds:
        past = layout.seeds[limits.max_seeds:limits.max_seeds + MAX_EXAMPLES]
        raise IngestError(
            422, "columns", f"columns: {k} seeds, more than the limit of {limits.max_seeds}; "
            f"send at most {limits.max_seeds} seeds",
            count=k,
            examples=[show_text(layout.pred.get(s) or layout.prob[s][0]) for s in past],
        )
    id_text = text_from_arrow(table.column(ID_COLUMN), ID_COLUMN, _row, limits, labels=False,
                              noun="ids")
    n = table.num_rows
    problems: list[IngestError] = []
    order: NDArray[np.intp] | None = None
    ids: NDArray[Any]
    if holdout_ids is None:
        ids = text_to_numpy(id_text)
    else:
        ids = holdout_ids
        try:
            # Arrow text: ASCII ids are aligned from their bytes, with no numpy copy.
            order = align_ids(holdout_ids, id_text, field=ID_COLUMN)
        except IngestError as exc:
            problems.append(exc)  # values are still checked, in the order sent
    del id_text
    # Values are converted into `scratch` (the order sent), checked, then gathered into
    # their row of the result; without an order they are converted in place.
    scratch = np.empty(n, dtype=np.float64) if order is not None else None
    predictions = labels = probabilities = None
    if task == "regression":
        predictions = np.empty((k, n), dtype=np.float64)
        for s, seed in enumerate(layout.seeds):
            column = layout.pred[seed]
            target = predictions[s] if scratch is None else scratch
            try:
                values = floats_from_arrow(table.column(column), column, _row, out=target)
            except IngestError as exc:
                problems.append(exc)
                continue
            err = nonfinite_error(column, values, _row)
            if err is not None:
                problems.append(err)
            elif order is not None:
                np.take(values, order, out=predictions[s])
        raise_first(problems)
        return SubmissionArrays(ids, predictions, None, None, list(layout.seeds))
    assert class_arr is not None and classes is not None
    if layout.pred:
        labels = np.empty((k, n), dtype=np.intp)
        for s, seed in enumerate(layout.seeds):
            column = layout.pred[seed]
            try:
                text = text_from_arrow(table.column(column), column, _row, limits, labels=True,
                                       noun="labels")
            except IngestError as exc:
                problems.append(exc)
                continue
            idx = pc.index_in(text, value_set=class_arr)
            if idx.null_count:
                pos = np.flatnonzero(idx.is_null().to_numpy(zero_copy_only=False))
                tally = Tally()
                original = table.column(column)
                tally.add(pos, lambda i, c=original: f"{_row(i)} = {show_value(c[i].as_py())}")
                problems.append(unknown_labels_error(column, tally))
                continue
            sent = idx.to_numpy(zero_copy_only=False)
            if order is None:
                labels[s] = sent
            else:
                labels[s] = sent[order]
    if layout.prob:
        c = len(classes)
        probabilities = np.empty((k, n, c), dtype=np.float64)
        unreadable = len(problems)
        for s, seed in enumerate(layout.seeds):
            for j, column in enumerate(layout.prob[seed]):
                try:
                    probabilities[s, :, j] = floats_from_arrow(table.column(column), column, _row)
                except IngestError as exc:
                    problems.append(exc)
        if len(problems) == unreadable:  # every probability column held numbers
            seeds = layout.seeds

            def locate_row(s: int, i: int) -> str:
                return _row(i) if k == 1 else f"seed {show_text(seeds[s])} {_row(i)}"

            def describe_class(s: int, j: int) -> str:
                return f" {layout.prob[seeds[s]][j]}"

            try:
                check_probabilities("probabilities", probabilities, locate_row, describe_class)
            except IngestError as exc:
                problems.append(exc)
    raise_first(problems)
    if probabilities is not None and order is not None:
        probabilities = np.take(probabilities, order, axis=1)
    return SubmissionArrays(ids, None, labels, probabilities, list(layout.seeds))
