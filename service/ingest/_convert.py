"""Conversions shared by the JSON and the table readers.

Every function finds bad items with vectorized masks first and only then formats at most
``MAX_EXAMPLES`` of them, so a clean million-row input costs a few passes in C and a bad
one costs the same plus ten string formats. Python-level loops over rows run only on
the slow path of an input that already failed its fast path.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from .errors import MAX_EXAMPLES, IngestError, content_error, kind_of, show_text, show_value
from .limits import Limits

Locate = Callable[[int], str]
"""Maps a 0-based position to how the submitter finds it: ``ids[3]`` or ``row 4``."""

_ARROW_ERRORS = (pa.ArrowException, OverflowError, TypeError, ValueError, UnicodeEncodeError)

# Fixed-width unicode arrays are used when they cost at most this much memory, or at most
# twice what Python string objects would (about 64 bytes each plus the text).
_UNICODE_ALWAYS_BYTES = 64 * 1024 * 1024
_PY_STR_OVERHEAD = 64

# What Arrow's string-to-double cast accepts (checked by tests against pyarrow itself).
FLOAT_SYNTAX = r"^[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|(?i:nan|inf|infinity))$"

_MAX_INT_BITS = 14_000  # str(int) refuses above 4300 digits; such an id is far too long anyway


class Tally:
    """Counts bad items across seeds and keeps the first ``MAX_EXAMPLES`` formatted examples."""

    def __init__(self) -> None:
        self.count = 0
        self.examples: list[str] = []
        self.kinds: Counter[str] = Counter()

    def add(self, positions: NDArray[np.intp], describe: Callable[[int], str]) -> None:
        self.count += int(positions.size)
        room = MAX_EXAMPLES - len(self.examples)
        if room > 0:
            self.examples.extend(describe(int(i)) for i in positions[:room])

    def add_items(
        self,
        positions: NDArray[np.intp],
        values: Sequence[Any],
        locate: Locate,
        kind: Callable[[Any], str] = kind_of,
    ) -> None:
        """Add bad items whose values are known: examples read '<where> = <value>'."""
        self.count += int(positions.size)
        room = MAX_EXAMPLES - len(self.examples)
        if room > 0:
            pairs = zip(positions[:room], values, strict=False)
            self.examples.extend(f"{locate(int(p))} = {show_value(v)}" for p, v in pairs)
        self.kinds.update(kind(v) for v in values)

    def add_kinds(self, values: Sequence[Any]) -> None:
        self.kinds.update(kind_of(v) for v in values)

    def kinds_text(self) -> str:
        return ", ".join(f"{n} {k}" for k, n in self.kinds.most_common())

    def __bool__(self) -> bool:
        return self.count > 0


# ---------------------------------------------------------------------------------------------
# numbers


def _lenient_float(x: Any) -> float:
    try:
        return float(x)
    except OverflowError:
        return math.inf if x > 0 else -math.inf


def floats_from_python(
    seq: list[Any], types: set[type] | None = None
) -> tuple[NDArray[np.float64] | None, NDArray[np.intp]]:
    """Numbers of one JSON list as float64, or the positions of the items that are not numbers.

    Only exact ``int`` and ``float`` count as numbers: ``bool`` is a subclass of ``int`` in
    Python but means true/false in JSON, and numeric text like ``"1.5"`` stays text.

    Fast path (``types`` not given): Arrow converts the list in one C pass, refusing text,
    null, containers and huge integers; it does accept booleans (as 1.0 and 0.0), so only
    the items that came out as exactly 0 or 1 are looked at again in Python. Otherwise one
    pass learns the item types and a careful path finds the bad items.
    """
    n = len(seq)
    if types is None:
        try:
            arr = pa.array(seq, type=pa.float64())
        except _ARROW_ERRORS:
            arr = None
        if arr is not None and not arr.null_count:
            values = arr.to_numpy(zero_copy_only=False)
            suspects = np.flatnonzero((values == 0.0) | (values == 1.0))
            if suspects.size <= max(64, n // 16):
                if not any(isinstance(seq[i], _BOOLS) for i in suspects.tolist()):
                    return values, _NO_POS
        types = set(map(type, seq))
    if types <= {float, int}:
        try:
            return pa.array(seq, type=pa.float64()).to_numpy(zero_copy_only=False), _NO_POS
        except _ARROW_ERRORS:  # integers beyond int64, or not exactly representable
            return np.fromiter(map(_lenient_float, seq), dtype=np.float64, count=n), _NO_POS
    type_arr = np.fromiter(map(type, seq), dtype=object, count=n)
    good = np.equal(type_arr, float) | np.equal(type_arr, int)
    return None, np.flatnonzero(~good)


_BOOLS = (bool, np.bool_)
_NO_POS: NDArray[np.intp] = np.empty(0, dtype=np.intp)


def nonfinite_error(field: str, values: NDArray[np.float64], locate: Locate) -> IngestError | None:
    """422 naming NaN and infinite values, or None when all are finite."""
    flat = values.reshape(-1)
    finite = np.isfinite(flat)
    if finite.all():
        return None
    bad = np.flatnonzero(~finite)
    examples = [f"{locate(int(i))} = {show_value(float(flat[i]))}" for i in bad[:MAX_EXAMPLES]]
    return content_error(
        field, int(bad.size), "values are NaN or infinite", examples,
        hint="every value must be a finite number",
    )


def not_numbers_error(field: str, tally: Tally) -> IngestError:
    return content_error(
        field, tally.count, f"values are not numbers ({tally.kinds_text()})", tally.examples,
        hint="send JSON numbers; text such as \"1.5\", true/false and null are not accepted",
    )


# ---------------------------------------------------------------------------------------------
# text (ids and class labels)


def canonical_float_label(x: float) -> str:
    """The canonical text of a numeric class label: integral values without '.0', else repr."""
    if x.is_integer():
        return str(int(x))
    return repr(x)


def _canonical_floats(values: NDArray[np.float64]) -> pa.Array:
    """Canonical label text for finite float64 values (vectorized for the integral ones)."""
    n = values.size
    integral = np.trunc(values) == values
    small = integral & (np.abs(values) < 2.0**62)
    if small.all():
        return pc.cast(pa.array(values.astype(np.int64)), pa.string())
    out = np.empty(n, dtype=object)
    if small.any():
        out[small] = pc.cast(pa.array(values[small].astype(np.int64)), pa.string()).to_numpy(
            zero_copy_only=False
        )
    rest = np.flatnonzero(~small)
    out[rest] = [canonical_float_label(float(v)) for v in values[rest]]
    return pa.array(out, type=pa.string())


def text_from_python(
    seq: list[Any], *, labels: bool, types: set[type] | None = None
) -> tuple[pa.Array | None, NDArray[np.intp], list[Any]]:
    """A JSON list of ids (or class labels) as an Arrow string array.

    Ids: strings kept exactly, integers written in decimal. Labels additionally accept
    finite floats (``canonical_float_label``). Returns ``(array, bad positions, bad values)``;
    the array is None when any item is of a kind that is not accepted.
    """
    if types is None:
        try:  # the common case (all text) without a separate pass to learn the item types
            arr = pa.array(seq, type=pa.string())
            if not arr.null_count:
                return arr, _NO_POS, []
        except _ARROW_ERRORS:
            pass
        types = set(map(type, seq))
    try:
        if types == {str}:
            return pa.array(seq, type=pa.string()), _NO_POS, []
        if types == {int}:
            return pc.cast(pa.array(seq, type=pa.int64()), pa.string()), _NO_POS, []
        if labels and types == {float}:
            vals = np.asarray(seq, dtype=np.float64)
            if np.isfinite(vals).all():
                return _canonical_floats(vals), _NO_POS, []
    except _ARROW_ERRORS:
        pass
    # Slow path: mixed kinds, huge integers, or text that is not valid Unicode.
    out: list[str | None] = []
    bad: list[int] = []
    for i, x in enumerate(seq):
        t = type(x)
        if t is str:
            try:
                x.encode("utf-8")
            except UnicodeEncodeError:
                bad.append(i)
                out.append(None)
                continue
            out.append(x)
        elif t is int and x.bit_length() <= _MAX_INT_BITS:
            out.append(str(x))
        elif labels and t is float and math.isfinite(x):
            out.append(canonical_float_label(x))
        else:
            bad.append(i)
            out.append(None)
    if bad:
        pos = np.asarray(bad, dtype=np.intp)
        return None, pos, [seq[i] for i in bad]
    return pa.array(out, type=pa.string()), _NO_POS, []


def bad_text_kind(value: Any) -> str:
    if isinstance(value, str):
        return "text that is not valid Unicode"
    if type(value) is int:
        return "integer too long"
    if isinstance(value, float):
        return "number that is not an integer" if math.isfinite(value) else "non-finite number"
    return kind_of(value)


def _text_examples(arr: pa.Array, pos: NDArray[np.intp], locate: Locate) -> list[str]:
    return [f"{locate(int(i))} = {show_text(arr[int(i)].as_py())}" for i in pos[:MAX_EXAMPLES]]


def _string_buffers(arr: pa.Array) -> tuple[NDArray[np.int32], NDArray[np.uint8]]:
    """(offsets (n+1,), data bytes) of a ``string`` array, as zero-copy numpy views."""
    n = len(arr)
    buffers = arr.buffers()
    offsets = np.frombuffer(buffers[1], dtype=np.int32)[arr.offset : arr.offset + n + 1]
    if buffers[2] is None or len(buffers[2]) == 0:
        return offsets, np.zeros(0, dtype=np.uint8)
    data = np.frombuffer(buffers[2], dtype=np.uint8)[int(offsets[0]) : int(offsets[-1])]
    return offsets, data


class TextStats:
    """Per-entry lengths of a null-free string array, computed once and shared.

    ``chars`` are code point counts; for ASCII text they are the byte lengths taken from the
    offsets, so the common case costs one pass over the bytes (the ASCII/NUL scan).
    """

    def __init__(self, arr: pa.Array) -> None:
        offsets, data = _string_buffers(arr)
        self.byte_lengths = np.diff(offsets)
        self.has_nul = bool(data.size) and not bool(data.all())
        self.ascii = data.size == 0 or int(data.max()) < 128
        if self.ascii:
            self.chars = self.byte_lengths
        else:
            self.chars = pc.utf8_length(arr).to_numpy(zero_copy_only=False)


def text_problems(
    arr: pa.Array, field: str, locate: Locate, limits: Limits, noun: str
) -> tuple[list[IngestError], TextStats]:
    """Null, empty, too long, or NUL-containing entries of a string array (all found at once).

    Also returns the array's ``TextStats`` for ``text_to_numpy``.
    """
    problems: list[IngestError] = []
    if arr.type != pa.string():
        arr = pc.cast(arr, pa.string())
    if arr.null_count:
        pos = np.flatnonzero(arr.is_null().to_numpy(zero_copy_only=False))
        problems.append(
            content_error(field, int(pos.size), f"{noun} are missing (null or empty cell)",
                          [f"{locate(int(i))} = null" for i in pos[:MAX_EXAMPLES]])
        )
        arr = pc.fill_null(arr, "x")
    stats = TextStats(arr)
    for mask, what, hint in (
        (stats.byte_lengths == 0, f"{noun} are empty", ""),
        (
            stats.chars > limits.max_id_length,
            f"{noun} are longer than {limits.max_id_length} characters",
            "shorten them",
        ),
    ):
        if mask.any():
            pos = np.flatnonzero(mask)
            examples = _text_examples(arr, pos, locate)
            problems.append(content_error(field, int(pos.size), what, examples, hint=hint))
    if stats.has_nul:
        pos = np.flatnonzero(pc.match_substring(arr, "\x00").to_numpy(zero_copy_only=False))
        examples = _text_examples(arr, pos, locate)
        problems.append(content_error(field, int(pos.size), f"{noun} contain the NUL character",
                                      examples))
    return problems, stats


def raise_first(problems: list[IngestError]) -> None:
    """Raise the first problem carrying all the others (and theirs) in ``more``."""
    flat = [q for p in problems for q in (p, *p.more)]
    if flat:
        first = flat[0]
        raise IngestError(first.status, first.field, first.message, count=first.count,
                          examples=first.examples, more=flat[1:])


def text_to_numpy(arr: pa.Array, stats: TextStats | None = None) -> NDArray[Any]:
    """A NUL-free, null-free Arrow string array as numpy text.

    Fixed-width ``<U{L}`` with L even (what ``align_ids`` hashes fastest) unless one long
    entry would make that cost much more memory than Python strings; then an object array
    of ``str``. ASCII text is widened to UTF-32 straight from Arrow's byte buffer.
    """
    n = len(arr)
    if n == 0:
        return np.empty(0, dtype="<U2")
    if arr.type != pa.string():
        arr = pc.cast(arr, pa.string())
    if stats is None:
        stats = TextStats(arr)
    longest = max(1, int(stats.chars.max()))
    width = longest + longest % 2  # even width: align_ids then works on 64-bit words
    fixed_bytes = 4 * width * n
    object_bytes = n * (_PY_STR_OVERHEAD + float(stats.chars.mean()))
    if fixed_bytes > max(_UNICODE_ALWAYS_BYTES, 2 * object_bytes):
        return arr.to_numpy(zero_copy_only=False)
    if not stats.ascii:
        out = np.empty(n, dtype=f"<U{width}")
        out[...] = arr.to_numpy(zero_copy_only=False)
        return out
    out = np.zeros(n, dtype=f"<U{width}")
    units = out.view(np.uint32).reshape(n, width)
    if (stats.byte_lengths == longest).all():
        # Every id has the same length: Arrow's data buffer already is an (n, L) byte matrix.
        _, data = _string_buffers(arr)
        units[:, :longest] = data.reshape(n, longest)
    else:
        # Pad every entry with NUL to `width` bytes (ids never contain NUL), then the buffer
        # is an (n, width) byte matrix: widen it to UTF-32 code units in one step.
        _, data = _string_buffers(pc.utf8_rpad(arr, width=width, padding="\x00"))
        units[...] = data.reshape(n, width)
    return out


# ---------------------------------------------------------------------------------------------
# Arrow columns (CSV and Parquet)


def plain_chunks(column: pa.Array | pa.ChunkedArray) -> pa.ChunkedArray:
    """A column as a chunked array without dictionary encoding or string views."""
    if isinstance(column, pa.Array):
        column = pa.chunked_array([column], type=column.type)
    t = column.type
    if pa.types.is_dictionary(t):
        column = column.cast(t.value_type)
        t = column.type
    if pa.types.is_large_string(t) or pa.types.is_string_view(t):
        column = column.cast(pa.string())
    return column


def _null_error(field: str, column: pa.ChunkedArray, locate: Locate, noun: str) -> IngestError:
    pos = np.flatnonzero(column.is_null().to_numpy())
    return content_error(field, int(pos.size), f"{noun} are missing (null or empty cell)",
                         [f"{locate(int(i))} = null" for i in pos[:MAX_EXAMPLES]])


def _type_error(field: str, column: pa.ChunkedArray, expected: str) -> IngestError:
    return IngestError(
        422, field, f"{field}: the column holds {column.type} values; expected {expected}",
        count=len(column), examples=[],
    )


def _bad_float_text(chunk: pa.Array) -> NDArray[np.intp]:
    """Positions in a string chunk that Arrow's double parser rejects."""
    syntax_ok = pc.match_substring_regex(chunk, FLOAT_SYNTAX).to_numpy(zero_copy_only=False)
    bad = np.flatnonzero(~syntax_ok)
    good_idx = np.flatnonzero(syntax_ok)
    try:
        pc.cast(chunk.take(pa.array(good_idx)), pa.float64())
        return bad
    except pa.ArrowInvalid:
        pass
    # The syntax check let something through that the parser refuses: find it by bisection.
    extra: list[int] = []

    def bisect(idx: NDArray[np.intp]) -> None:
        try:
            pc.cast(chunk.take(pa.array(idx)), pa.float64())
        except pa.ArrowInvalid:
            if idx.size == 1:
                extra.append(int(idx[0]))
            else:
                half = idx.size // 2
                bisect(idx[:half])
                bisect(idx[half:])

    bisect(good_idx)
    return np.sort(np.concatenate([bad, np.asarray(extra, dtype=np.intp)]))


def floats_from_arrow(
    column: pa.Array | pa.ChunkedArray,
    field: str,
    locate: Locate,
    out: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    """A numeric (or, from CSV, text) column as finite-or-not float64 values, shape (n,).

    Raises 422 for nulls, booleans, text that is not a number, and non-numeric types.
    Non-finite values are returned; the caller reports them with the other values.
    ``out`` (n,) float64, if given, receives the values (a buffer reused across columns
    saves allocating fresh memory per column); it is also what is returned.
    """
    col = plain_chunks(column)
    t = col.type
    n = len(col)
    if pa.types.is_boolean(t):
        raise content_error(
            field, n, "values are booleans where numbers belong",
            [f"{locate(i)} = {show_value(col[i].as_py())}" for i in range(min(n, MAX_EXAMPLES))],
            hint="send numbers",
        )
    if pa.types.is_null(t) or col.null_count:
        raise _null_error(field, col, locate, "values")
    if out is None:
        out = np.empty(n, dtype=np.float64)
    elif out.shape != (n,) or out.dtype != np.float64:
        raise ValueError(f"out must be float64 of shape ({n},), got {out.dtype} {out.shape}")
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_decimal(t):
        pos = 0
        for chunk in col.chunks:
            if chunk.type != pa.float64():
                chunk = pc.cast(chunk, pa.float64(), safe=False)
            out[pos : pos + len(chunk)] = chunk.to_numpy(zero_copy_only=False)
            pos += len(chunk)
        return out
    if pa.types.is_string(t):
        try:
            parsed = pc.cast(col, pa.float64())
        except pa.ArrowInvalid:
            parsed = None
        if parsed is not None:
            pos = 0
            for chunk in parsed.chunks:
                out[pos : pos + len(chunk)] = chunk.to_numpy(zero_copy_only=False)
                pos += len(chunk)
            return out
        tally = Tally()
        pos = 0
        for chunk in col.chunks:
            try:
                pc.cast(chunk, pa.float64())
            except pa.ArrowInvalid:
                bad = _bad_float_text(chunk)
                base = pos
                tally.add(
                    bad, lambda i, c=chunk, b=base: f"{locate(b + i)} = {show_text(c[i].as_py())}"
                )
            pos += len(chunk)
        raise content_error(field, tally.count, "values are not numbers", tally.examples,
                            hint="write plain decimal numbers such as 0.25 or -3e-2")
    raise _type_error(field, col, "numbers")


def text_from_arrow(
    column: pa.Array | pa.ChunkedArray, field: str, locate: Locate, limits: Limits, *,
    labels: bool, noun: str,
) -> pa.Array:
    """An id (or class label) column as one checked Arrow string array.

    Text is kept exactly; integers are written in decimal; labels may also be finite floats
    (``canonical_float_label``). Floats as ids, booleans and nested types are refused.
    """
    col = plain_chunks(column)
    t = col.type
    if pa.types.is_null(t) or (col.null_count and not pa.types.is_string(t)):
        raise _null_error(field, col, locate, noun)
    if pa.types.is_string(t):
        arr = col.combine_chunks()
    elif pa.types.is_integer(t):
        arr = pc.cast(col.combine_chunks(), pa.string())
    elif labels and pa.types.is_floating(t):
        values = col.combine_chunks().to_numpy(zero_copy_only=False).astype(np.float64)
        finite = np.isfinite(values)
        if not finite.all():
            bad = np.flatnonzero(~finite)
            raise content_error(
                field, int(bad.size), f"{noun} are NaN or infinite",
                [f"{locate(int(i))} = {show_value(float(values[i]))}" for i in bad[:MAX_EXAMPLES]],
            )
        arr = _canonical_floats(values)
    elif pa.types.is_boolean(t):
        raise IngestError(
            422, field,
            f"{field}: {len(col)} {noun} are booleans; write them as text or integers instead",
            count=len(col),
            examples=[show_value(v) for v in col.slice(0, MAX_EXAMPLES).to_pylist()],
        )
    else:
        expected = "text, integers or numbers" if labels else "text or integers"
        raise _type_error(field, col, expected)
    problems, _ = text_problems(arr, field, locate, limits, noun)
    raise_first(problems)
    return arr
