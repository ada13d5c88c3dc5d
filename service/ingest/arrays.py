"""JSON values (already parsed by orjson) to checked numpy arrays.

Layouts (``K`` seeds, ``n`` rows, ``C`` classes):

- ids: a list of ``n`` strings or integers. Strings are kept exactly as sent: any Unicode
  is accepted and compared code point by code point, so two spellings that look the same
  but differ in Unicode normalization (NFC "é" U+00E9 and NFD "e" + U+0301) are two
  DIFFERENT ids; leading and trailing spaces are part of the id. Integers become their
  decimal text (``7`` and ``"7"`` are the same id). Empty ids and the NUL character are
  refused.
- predictions: one seed as a list of ``n`` numbers, or ``K`` seeds as a list of ``K`` such
  lists. Only JSON numbers count: booleans, numeric text and null are refused.
- probabilities: one seed as ``n`` rows of ``C`` numbers, or ``K`` such seeds. Each value
  lies in [0, 1] and each row sums to 1 within ``PROBABILITY_SUM_TOLERANCE`` (1e-6,
  absolute; ``service.scoring``).
- labels: like predictions, but each value is a class label: a string, an integer or a
  number, compared by its canonical text (strings as sent; integers in decimal; integral
  floats without ".0", so ``1``, ``1.0`` and ``"1"`` are one class; other floats by their
  shortest round-trip repr).

Fast path first (one C-level pass to learn the item types, one to convert), and a slow
path that finds and formats the bad items only when the fast path fails.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from service.scoring import PROBABILITY_SUM_TOLERANCE

from ._convert import (
    Locate,
    Tally,
    bad_text_kind,
    floats_from_python,
    nonfinite_error,
    not_numbers_error,
    raise_first,
    text_from_python,
    text_problems,
    text_to_numpy,
)
from .errors import MAX_EXAMPLES, IngestError, content_error, show_value, whole_field_error
from .limits import DEFAULT_LIMITS, Limits

TASKS = ("regression", "classification")


def _require_list(value: object, field: str, expected: str) -> list[Any]:
    if not isinstance(value, list):
        raise whole_field_error(field, f"expected {expected}", value=value, show=True)
    if not value:
        raise whole_field_error(field, f"is empty; expected {expected}")
    return value


def _check_rows(field: str, n: int, limits: Limits) -> None:
    if n > limits.max_rows:
        raise whole_field_error(
            field, f"has {n} rows, more than the limit of {limits.max_rows}", status=413, count=n
        )


def _bad_items_error(field: str, noun: str, accepted: str, tally: Tally) -> IngestError:
    return content_error(
        field, tally.count, f"{noun} are not {accepted} ({tally.kinds_text()})", tally.examples
    )


def id_array(value: object, *, field: str = "ids", limits: Limits) -> NDArray[Any]:
    """Submitted or holdout ids as numpy text, shape (n,), in the order sent.

    Returns fixed-width ``<U`` text (what ``align_ids`` hashes fastest), or an object array of
    ``str`` when one very long id would make fixed width wasteful. See the module docstring
    for what counts as the same id. Duplicates are not checked here (``align_ids`` and
    ``require_unique_ids`` do that with the right message for each side).
    """
    seq = _require_list(value, field, "a list of ids (strings or integers)")
    _check_rows(field, len(seq), limits)
    arr, bad, bad_values = text_from_python(seq, labels=False)
    if arr is None:
        tally = Tally()
        tally.add_items(bad, bad_values, lambda i: f"{field}[{i}]", kind=bad_text_kind)
        raise _bad_items_error(field, "ids", "strings or integers", tally)
    problems, stats = text_problems(arr, field, lambda i: f"{field}[{i}]", limits, "ids")
    raise_first(problems)
    return text_to_numpy(arr, stats)


def _seed_lists(
    value: object, field: str, limits: Limits, item: str
) -> tuple[list[Any], bool, set[type] | None]:
    """Split one-seed (flat) from K-seed (list of lists) input; returns (seeds, nested, types)."""
    outer = _require_list(
        value, field, f"a list of {item} (one seed) or a list of such lists (one per seed)"
    )
    if not isinstance(outer[0], list):
        return [outer], False, None  # one seed; a stray list inside is "not a number"
    types = set(map(type, outer))
    if types != {list}:
        type_arr = np.fromiter(map(type, outer), dtype=object, count=len(outer))
        bad = np.flatnonzero(np.not_equal(type_arr, list))
        raise content_error(
            field, int(bad.size), "entries are not lists while others are",
            [f"{field}[{int(i)}] = {show_value(outer[int(i)])}" for i in bad[:MAX_EXAMPLES]],
            hint=f"send either one list of {item} (one seed) or only lists (one per seed)",
        )
    if len(outer) > limits.max_seeds:
        past = range(limits.max_seeds, min(len(outer), limits.max_seeds + MAX_EXAMPLES))
        raise IngestError(
            422, field,
            f"{field}: has {len(outer)} seeds, more than the limit of {limits.max_seeds}; "
            f"send at most {limits.max_seeds} prediction sets",
            count=len(outer),
            examples=[f"{field}[{i}] = {show_value(outer[i])}" for i in past],
        )
    return outer, True, None


def _seed_length(
    seeds: list[list[Any]], nested: bool, field: str, n_rows: int | None, limits: Limits,
    unit: str = "values",
) -> int:
    """The common seed length n; 422 naming the seeds whose length is wrong."""
    lengths = np.fromiter(map(len, seeds), dtype=np.intp, count=len(seeds))
    expected = int(n_rows) if n_rows is not None else int(lengths[0])
    bad = np.flatnonzero(lengths != expected)
    if bad.size:
        if n_rows is not None:
            hint = f"expected {expected} {unit} per seed, one per id"
        else:
            hint = f"every seed needs as many {unit} as the first ({expected})"
        if nested:
            examples = [
                f"{field}[{int(k)}] has {int(lengths[k])} {unit}" for k in bad[:MAX_EXAMPLES]
            ]
            raise content_error(field, int(bad.size), "seeds have the wrong length", examples,
                                hint=hint)
        raise content_error(field, 1, "seed has the wrong length",
                            [f"{field} has {int(lengths[0])} {unit}"], hint=hint)
    if expected == 0:
        raise whole_field_error(field, f"has no {unit}; expected at least one row")
    _check_rows(field, expected, limits)
    return expected


def _locator(field: str, nested: bool, k: int) -> Locate:
    if nested:
        return lambda i: f"{field}[{k}][{i}]"
    return lambda i: f"{field}[{i}]"


def float_matrix(
    value: object, *, field: str, n_rows: int | None, limits: Limits
) -> NDArray[np.float64]:
    """Predictions of K seeds as finite float64, shape (K, n); a flat list is one seed.

    ``n_rows`` (the number of ids) fixes n when given; otherwise every seed must be as long
    as the first. Refused with 422 and examples: ragged seeds, booleans, text, null, NaN and
    infinity (orjson already rejects NaN literals; this catches the rest).
    """
    seeds, nested, types0 = _seed_lists(value, field, limits, "numbers")
    n = _seed_length(seeds, nested, field, n_rows, limits)
    out = np.empty((len(seeds), n), dtype=np.float64)
    tally = Tally()
    for k, seed in enumerate(seeds):
        vals, bad = floats_from_python(seed, types0 if not nested else None)
        if vals is None:
            locate = _locator(field, nested, k)
            tally.add(bad, lambda i, s=seed, loc=locate: f"{loc(i)} = {show_value(s[i])}")
            tally.add_kinds([seed[int(i)] for i in bad])
        else:
            out[k] = vals
    if tally:
        raise not_numbers_error(field, tally)
    _raise_nonfinite(field, out, nested)
    return out


def _raise_nonfinite(field: str, values: NDArray[np.float64], nested: bool) -> None:
    shape = values.shape

    def locate(flat: int) -> str:
        idx = np.unravel_index(flat, shape)
        parts = idx if nested else idx[1:]
        return field + "".join(f"[{int(j)}]" for j in parts)

    err = nonfinite_error(field, values, locate)
    if err is not None:
        raise err


def probability_tensor(
    value: object, *, field: str, n_rows: int | None, n_classes: int, limits: Limits
) -> NDArray[np.float64]:
    """Class probabilities of K seeds, shape (K, n, C); an (n, C) list of rows is one seed.

    Each row has exactly ``n_classes`` numbers (in the holdout's class order), each in
    [0, 1], summing to 1 within ``PROBABILITY_SUM_TOLERANCE`` (absolute).
    """
    if n_classes < 1:
        raise ValueError(f"n_classes must be at least 1, got {n_classes}")
    outer = _require_list(
        value, field, "a list of rows of probabilities (one seed) or a list of such seeds"
    )
    first = outer[0]
    nested = isinstance(first, list) and len(first) > 0 and isinstance(first[0], list)
    if nested:
        seeds, _, _ = _seed_lists(outer, field, limits, "rows")
    else:
        seeds = [outer]
    n = _seed_length(seeds, nested, field, n_rows, limits, unit="rows")
    c = int(n_classes)
    out = np.empty((len(seeds), n, c), dtype=np.float64)
    not_rows = Tally()
    wrong_width = Tally()
    not_numbers = Tally()
    for k, seed in enumerate(seeds):
        locate = _locator(field, nested, k)
        row_types = set(map(type, seed))
        if row_types != {list}:
            type_arr = np.fromiter(map(type, seed), dtype=object, count=n)
            bad = np.flatnonzero(np.not_equal(type_arr, list))
            not_rows.add(bad, lambda i, s=seed, loc=locate: f"{loc(i)} = {show_value(s[i])}")
            continue
        widths = np.fromiter(map(len, seed), dtype=np.intp, count=n)
        bad = np.flatnonzero(widths != c)
        if bad.size:
            wrong_width.add(bad, lambda i, w=widths, loc=locate: f"{loc(i)} has {int(w[i])} values")
            continue
        flat = list(itertools.chain.from_iterable(seed))
        vals, bad = floats_from_python(flat)
        if vals is None:
            not_numbers.add(
                bad, lambda i, f=flat, loc=locate: f"{loc(i // c)}[{i % c}] = {show_value(f[i])}"
            )
            not_numbers.add_kinds([flat[int(i)] for i in bad])
        else:
            out[k] = vals.reshape(n, c)
    if not_rows:
        raise content_error(field, not_rows.count, "rows are not lists of probabilities",
                            not_rows.examples, hint=f"each row is a list of {c} numbers")
    if wrong_width:
        raise content_error(field, wrong_width.count, "rows have the wrong number of values",
                            wrong_width.examples, hint=f"expected {c}, one per class")
    if not_numbers:
        raise not_numbers_error(field, not_numbers)
    if nested:
        def locate_row(k: int, i: int) -> str:
            return f"{field}[{k}][{i}]"
    else:
        def locate_row(k: int, i: int) -> str:
            return f"{field}[{i}]"

    check_probabilities(field, out, locate_row)
    return out


def _bracket(k: int, c: int) -> str:
    return f"[{c}]"


def check_probabilities(
    field: str,
    q: NDArray[np.float64],
    locate_row: Callable[[int, int], str],
    describe_class: Callable[[int, int], str] = _bracket,
) -> None:
    """422 for non-finite values, values outside [0, 1], and rows not summing to 1.

    ``q`` has shape (K, n, C); ``locate_row(k, i)`` names a row as the submitter sees it and
    ``describe_class(k, c)`` names a class position within it (default ``[c]``).
    """

    shape = q.shape
    finite = np.isfinite(q)
    if not finite.all():
        bad = np.flatnonzero(~finite.reshape(-1))
        examples = []
        for f in bad[:MAX_EXAMPLES]:
            k, i, c = np.unravel_index(int(f), shape)
            examples.append(f"{locate_row(int(k), int(i))}{describe_class(int(k), int(c))} = "
                            f"{show_value(float(q[k, i, c]))}")
        raise content_error(field, int(bad.size), "probabilities are NaN or infinite", examples)
    problems: list[IngestError] = []
    outside = (q < 0.0) | (q > 1.0)
    if outside.any():
        bad = np.flatnonzero(outside.reshape(-1))
        examples = []
        for f in bad[:MAX_EXAMPLES]:
            k, i, c = np.unravel_index(int(f), shape)
            examples.append(f"{locate_row(int(k), int(i))}{describe_class(int(k), int(c))} = "
                            f"{show_value(float(q[k, i, c]))}")
        problems.append(content_error(field, int(bad.size), "probabilities are outside [0, 1]",
                                      examples))
    sums = q.sum(axis=2)
    off = np.abs(sums - 1.0) > PROBABILITY_SUM_TOLERANCE
    if off.any():
        bad = np.flatnonzero(off.reshape(-1))
        examples = []
        for f in bad[:MAX_EXAMPLES]:
            k, i = np.unravel_index(int(f), sums.shape)
            examples.append(f"{locate_row(int(k), int(i))} sums to {float(sums[k, i]):.10g}")
        problems.append(content_error(
            field, int(bad.size), "rows do not sum to 1", examples,
            hint=f"each row must sum to 1 within {PROBABILITY_SUM_TOLERANCE:g} (absolute)",
        ))
    raise_first(problems)


def class_array(classes: Sequence[str]) -> pa.Array:
    """The holdout's classes as an Arrow string array (a programming error if not unique text)."""
    if isinstance(classes, str) or not all(isinstance(c, str) for c in classes):
        raise TypeError("classes must be a sequence of str")
    arr = pa.array(list(classes), type=pa.string())
    if len(arr) == 0 or pc.count_distinct(arr).as_py() != len(arr):
        raise ValueError("classes must be a non-empty sequence of distinct strings")
    return arr


def unknown_labels_error(field: str, tally: Tally) -> IngestError:
    return content_error(
        field, tally.count, "labels are not classes of this holdout", tally.examples,
        hint="labels are compared as text: 1, 1.0 and \"1\" are the same class, \"01\" is not",
    )


def label_matrix(
    value: object, *, field: str, classes: Sequence[str], n_rows: int | None, limits: Limits
) -> NDArray[np.intp]:
    """Predicted class labels of K seeds as indices into ``classes``, shape (K, n).

    Labels are JSON strings or numbers, matched to ``classes`` by canonical text (module
    docstring). A label that is not one of the holdout's classes is a 422 whose examples are
    the submitter's labels; the holdout's classes never appear in the message.
    """
    class_arr = class_array(classes)
    seeds, nested, types0 = _seed_lists(value, field, limits, "labels")
    n = _seed_length(seeds, nested, field, n_rows, limits)
    out = np.empty((len(seeds), n), dtype=np.intp)
    not_labels = Tally()
    unknown = Tally()
    for k, seed in enumerate(seeds):
        locate = _locator(field, nested, k)
        arr, bad, bad_values = text_from_python(seed, labels=True,
                                                types=None if nested else types0)
        if arr is None:
            not_labels.add_items(bad, bad_values, locate, kind=bad_text_kind)
            continue
        idx = pc.index_in(arr, value_set=class_arr)
        if idx.null_count:
            pos = np.flatnonzero(idx.is_null().to_numpy(zero_copy_only=False))
            unknown.add(pos, lambda i, s=seed, loc=locate: f"{loc(i)} = {show_value(s[i])}")
            continue
        out[k] = idx.to_numpy(zero_copy_only=False)
    if not_labels:
        raise _bad_items_error(field, "labels", "strings or finite numbers", not_labels)
    if unknown:
        raise unknown_labels_error(field, unknown)
    return out


def target_vector(
    value: object, *, field: str = "y_true", task: str, limits: Limits | None = None
) -> NDArray[Any]:
    """Holdout targets, shape (n,): finite float64 (regression) or canonical text (classification).

    Classification targets follow the label rules of the module docstring and are returned
    like ids (fixed-width ``<U`` text, or object ``str`` when very long); empty text, NUL and
    labels longer than ``limits.max_id_length`` are refused.
    """
    limits = limits or DEFAULT_LIMITS
    check_task(task)
    seq = _require_list(value, field, "a list of targets, one per id")
    _check_rows(field, len(seq), limits)
    locate: Locate = lambda i: f"{field}[{i}]"  # noqa: E731
    if task == "regression":
        vals, bad = floats_from_python(seq)
        if vals is None:
            tally = Tally()
            tally.add(bad, lambda i: f"{locate(i)} = {show_value(seq[i])}")
            tally.add_kinds([seq[int(i)] for i in bad])
            raise not_numbers_error(field, tally)
        err = nonfinite_error(field, vals, locate)
        if err is not None:
            raise err
        return np.array(vals, dtype=np.float64)
    arr, bad, bad_values = text_from_python(seq, labels=True)
    if arr is None:
        tally = Tally()
        tally.add_items(bad, bad_values, locate, kind=bad_text_kind)
        raise _bad_items_error(field, "labels", "strings or finite numbers", tally)
    problems, stats = text_problems(arr, field, locate, limits, "labels")
    raise_first(problems)
    return text_to_numpy(arr, stats)


def check_task(task: str) -> None:
    if task not in TASKS:
        raise ValueError(f"task must be one of {TASKS}, got {task!r}")
