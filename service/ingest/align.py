"""Put a submission's rows in the holdout's order, exactly, in time linear in the rows.

Fast path (text arrays of fixed width, what ``id_array`` and the table readers return):

1. view each id as a row of UTF-32 code units (two per 64-bit word) and hash the rows to
   64-bit integers (a random linear combination of the words, modulo 2**64);
2. keep the hash's high bits and the row index in the low bits of one uint64 key and sort
   the keys of each side (one ``np.sort`` of uint64: about three times faster than an
   ``argsort`` of the hashes here);
3. equal multisets of ids give equal sequences of hash prefixes: pair rows position by
   position to get a candidate order;
4. verify the candidate exactly, code unit by code unit. Rows whose hashes collide may be
   paired wrongly; they fail the check and are re-paired by exact string lookup. Nothing
   is ever accepted on a hash alone.

The holdout side's sorted keys are kept for the last few holdout arrays seen (the service
keeps each holdout's ids in memory), so a repeat submission costs only its own side.

Exact path (every input with missing, unknown or duplicate ids, and anything the fast path
could not settle): a hash join, the holdout's full 64-bit hashes sorted and each submitted
id compared exactly with its single candidate, which also finds everything an error
message needs; where that cannot decide (two holdout ids with one hash, or text that is not
fixed-width), Arrow's hash table (``pyarrow.compute.index_in``) on the strings themselves.
"""

from __future__ import annotations

import functools
import threading
import weakref
from collections import OrderedDict
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from ._convert import _string_buffers, text_to_numpy
from .errors import MAX_EXAMPLES, IngestError, content_error, show_text

_HASH_SEED = 0x1D5_EED_2026
_CHUNK_ROWS = 1 << 16
_REPAIR_LIMIT = 100_000
_UNICODE_ALWAYS_BYTES = 64 * 1024 * 1024


@functools.lru_cache(maxsize=64)
def _multipliers(width: int) -> NDArray[np.uint64]:
    rng = np.random.default_rng(_HASH_SEED)
    r = rng.integers(0, np.iinfo(np.uint64).max, size=width, dtype=np.uint64, endpoint=True)
    r |= np.uint64(1)
    r.flags.writeable = False
    return r


def _code_units(u: NDArray[np.str_]) -> NDArray[np.uint32] | NDArray[np.uint64]:
    """A native-order, contiguous ``<U{L}`` array as an integer matrix, one row per id.

    (n, L/2) uint64 words of two UTF-32 code units when L is even (``id_array`` makes it
    so: half as many columns to hash and compare), else (n, L) uint32 code units.
    """
    if u.dtype.itemsize % 8 == 0:
        return u.view(np.uint64).reshape(u.size, u.dtype.itemsize // 8)
    return u.view(np.uint32).reshape(u.size, u.dtype.itemsize // 4)


def _row_hash(units: NDArray[np.uint32] | NDArray[np.uint64]) -> NDArray[np.uint64]:
    """64-bit hash per row: a random linear combination (mod 2**64) of the row's words.

    Only its high bits are used (``_fast_order`` keeps the row index in the low bits), and
    those are the well-mixed ones: carries propagate upwards from every word. Zero padding
    adds nothing, so the hash does not depend on the array's width (for one word size).
    Collisions are possible and harmless: every pairing is verified exactly.
    """
    return np.einsum("ij,j->i", units, _multipliers(units.shape[1]))


def _as_unicode(ids: NDArray[Any]) -> NDArray[np.str_] | None:
    """Native fixed-width text for the fast path, or None when only the exact path fits."""
    if ids.dtype.kind == "U":
        if ids.dtype.itemsize == 0:
            return None
        u = ids.astype(ids.dtype.newbyteorder("="), copy=False)
        return np.ascontiguousarray(u)
    if ids.dtype.kind not in ("O", "T") or ids.size == 0:
        return None
    values = ids.tolist()
    if not all(isinstance(v, str) for v in values):
        return None
    lengths = np.fromiter(map(len, values), dtype=np.intp, count=len(values))
    width = max(1, int(lengths.max()))
    object_bytes = len(values) * (64 + float(lengths.mean()))
    if 4 * width * len(values) > max(_UNICODE_ALWAYS_BYTES, 2 * object_bytes):
        return None
    if any("\x00" in v for v in values):  # numpy text drops trailing NUL: keep such ids exact
        return None
    return np.asarray(values, dtype=f"<U{width + width % 2}")


def _same_rows(hu: NDArray[Any], su: NDArray[Any], order: NDArray[np.intp],
               rows: NDArray[np.intp] | None = None) -> NDArray[np.intp]:
    """Holdout positions j where the submitted id at order[j] differs from holdout id j."""
    if rows is not None:
        eq = (np.take(su, order[rows], axis=0) == hu[rows]).all(axis=1)
        return rows[~eq]
    bad: list[NDArray[np.intp]] = []
    n = hu.shape[0]
    for start in range(0, n, _CHUNK_ROWS):  # chunks stay in cache; ~16 chunks per million
        stop = min(n, start + _CHUNK_ROWS)
        got = np.take(su, order[start:stop], axis=0)
        want = hu[start:stop]
        if not np.array_equal(got, want):
            bad.append(start + np.flatnonzero((got != want).any(axis=1)))
    return np.concatenate(bad) if bad else np.empty(0, dtype=np.intp)


class _HoldoutKeys:
    """Sorted hash keys of recently seen holdout arrays, by array identity (a small LRU).

    The service keeps each holdout's decoded ids in memory and aligns many submissions to
    them; hashing and sorting that side again for every submission would repeat a third of
    the work. Safe by construction: a cached key only proposes a pairing, which is verified
    exactly against the arrays as they are now; on any failure the keys are recomputed.
    """

    def __init__(self, size: int = 4) -> None:
        self.size = size
        self.entries: OrderedDict[int, tuple[weakref.ref[Any], tuple[Any, ...], Any]] = (
            OrderedDict()
        )
        self.lock = threading.Lock()

    @staticmethod
    def _signature(arr: NDArray[Any]) -> tuple[Any, ...]:
        return (arr.__array_interface__["data"][0], arr.shape, arr.strides, arr.dtype.str)

    def get(self, arr: NDArray[Any]) -> NDArray[np.uint64] | None:
        with self.lock:
            entry = self.entries.get(id(arr))
            if entry is None or entry[0]() is not arr or entry[1] != self._signature(arr):
                return None
            self.entries.move_to_end(id(arr))
            return entry[2]

    def put(self, arr: NDArray[Any], keys: Any) -> None:
        for part in keys if isinstance(keys, tuple) else (keys,):
            if isinstance(part, np.ndarray):
                part.flags.writeable = False
        try:
            ref = weakref.ref(arr)
        except TypeError:
            return
        with self.lock:
            self.entries[id(arr)] = (ref, self._signature(arr), keys)
            self.entries.move_to_end(id(arr))
            while len(self.entries) > self.size:
                self.entries.popitem(last=False)

    def drop(self, arr: NDArray[Any]) -> None:
        with self.lock:
            self.entries.pop(id(arr), None)


_holdout_keys = _HoldoutKeys()
# For ASCII holdouts aligned to Arrow text: (sorted byte-hash keys, longest id in bytes).
_holdout_byte_keys = _HoldoutKeys()


def _sorted_keys(units: NDArray[Any], bits: int) -> NDArray[np.uint64]:
    """Row hashes with the row index in the low ``bits`` bits, sorted."""
    n = units.shape[0]
    low = np.uint64((1 << bits) - 1)
    return np.sort((_row_hash(units) & ~low) | np.arange(n, dtype=np.uint64))


def _holdout_sorted_keys(
    hu: NDArray[Any], bits: int, owner: NDArray[Any] | None
) -> tuple[NDArray[np.uint64], bool]:
    """The holdout's sorted keys, from the cache when ``owner`` is known; (keys, cached)."""
    kh = _holdout_keys.get(owner) if owner is not None else None
    if kh is not None:
        return kh, True
    kh = _sorted_keys(hu, bits)
    if owner is not None:
        _holdout_keys.put(owner, kh)
    return kh, False


def _fast_order(
    h: NDArray[np.str_], s: NDArray[np.str_], owner: NDArray[Any] | None = None
) -> NDArray[np.intp] | None:
    """The order for a clean submission, or None when the exact path must decide.

    ``owner`` is the caller's holdout array when ``h`` is that very array, so its sorted
    keys may be taken from (and kept in) the cache.
    """
    n = h.size
    if s.size != n or n == 0:
        return None
    if h.dtype.itemsize != s.dtype.itemsize:  # hashing and checking need rows of equal width
        width = max(h.dtype.itemsize, s.dtype.itemsize) // 4
        width += width % 2
        h = h.astype(f"<U{width}")
        s = s.astype(f"<U{width}")
        owner = None
    hu = _code_units(h)
    su = _code_units(s)
    head = min(n, 64)
    if np.array_equal(hu[:head], su[:head]) and np.array_equal(hu, su):
        return np.arange(n, dtype=np.intp)  # already in holdout order (a common case)
    bits = max(1, (n - 1).bit_length())
    kh, cached = _holdout_sorted_keys(hu, bits, owner)

    def same_rows(order: NDArray[np.intp], rows: NDArray[np.intp] | None) -> NDArray[np.intp]:
        return _same_rows(hu, su, order, rows)

    order = _pair_and_verify(h, kh, _sorted_keys(su, bits), bits, same_rows,
                             lambda rows: s[rows].tolist())
    if order is None and cached:
        _holdout_keys.drop(owner)  # the cached keys may be stale: decide on fresh ones
        return _fast_order(h, s, owner)
    return order


def _byte_row_hash(rows: NDArray[np.uint8]) -> NDArray[np.uint64]:
    """64-bit hash per row of a C-contiguous (n, L) byte matrix: a random linear combination
    (mod 2**64) of the row's whole 64-bit little-endian words and of its last L % 8 bytes,
    like ``_row_hash`` on text. Both sides of an alignment hash rows of one length L, so
    equal ids hash equally. The words are read in place (rows need not be 8-byte aligned),
    a chunk of rows at a time: no copy of the matrix is made."""
    n, length = rows.shape
    n_words, n_tail = divmod(length, 8)
    multipliers = _multipliers(n_words + n_tail)
    flat = np.ascontiguousarray(rows).reshape(-1)
    out = np.zeros(n, dtype=np.uint64)
    for start in range(0, n, _CHUNK_ROWS):
        stop = min(n, start + _CHUNK_ROWS)
        if n_words:
            words = np.ndarray((stop - start, n_words), dtype="<u8", buffer=flat,
                               offset=start * length, strides=(length, 8))
            out[start:stop] = np.einsum("ij,j->i", words, multipliers[:n_words])
        if n_tail:
            tail = rows[start:stop, 8 * n_words:]
            out[start:stop] += np.einsum("ij,j->i", tail, multipliers[n_words:])
    return out


def _ascii_rows(arr: pa.Array) -> tuple[NDArray[np.uint8], int] | None:
    """An ASCII, NUL-free Arrow string array as (n, L) NUL-padded byte rows, L its longest
    entry (a view of Arrow's buffer when every entry has L bytes), and L; None for other
    text."""
    offsets, data = _string_buffers(arr)
    if data.size == 0 or int(data.max()) >= 128 or not data.all():
        return None
    lengths = np.diff(offsets)
    longest = int(lengths.max())
    n = lengths.size
    if (lengths == longest).all():
        return data.reshape(n, longest), longest
    rows = np.zeros((n, longest), dtype=np.uint8)
    rows[np.arange(longest) < lengths[:, None]] = data
    return rows, longest


def _holdout_ascii_keys(
    h: NDArray[np.str_], bits: int, owner: NDArray[Any] | None
) -> tuple[NDArray[np.uint64], int, bool] | None:
    """Sorted byte-hash keys of an ASCII holdout, its longest id in bytes, and whether they
    came from the cache; None when some holdout id is not ASCII."""
    cached = _holdout_byte_keys.get(owner) if owner is not None else None
    if cached is not None:
        keys, longest = cached
        return keys, int(longest), True
    n = h.size
    units = h.view(np.uint32).reshape(n, h.dtype.itemsize // 4)
    column_max = units.max(axis=0)  # one pass: ASCII or not, and the longest id
    if int(column_max.max()) >= 128:
        return None
    used = np.flatnonzero(column_max)
    longest = int(used[-1]) + 1 if used.size else 0
    if longest == 0:
        return None
    low = np.uint64((1 << bits) - 1)
    keys = np.empty(n, dtype=np.uint64)
    for start in range(0, n, _CHUNK_ROWS):  # (rows, longest) bytes: the layout Arrow ids have
        stop = min(n, start + _CHUNK_ROWS)
        keys[start:stop] = _byte_row_hash(units[start:stop, :longest].astype(np.uint8))
    keys &= ~low
    keys |= np.arange(n, dtype=np.uint64)
    keys.sort()
    if owner is not None:
        _holdout_byte_keys.put(owner, (keys, np.int64(longest)))
    return keys, longest, False


def _fast_order_ascii(
    h: NDArray[np.str_], arr: pa.Array, owner: NDArray[Any] | None = None
) -> NDArray[np.intp] | None:
    """``_fast_order`` for submitted ids still in Arrow form, when both sides are ASCII.

    Ids are hashed as NUL-padded UTF-8 bytes, read as 64-bit words in place (a 25-character
    id is three words and a byte; as numpy's UTF-32 text it would be thirteen words), and
    never widened to numpy text (four times the memory). The holdout's byte-hash keys are
    kept per holdout array like its text keys; every pairing is verified exactly against
    the holdout's text as it is.
    """
    n = h.size
    if len(arr) != n or n == 0 or arr.null_count:
        return None
    ascii_rows = _ascii_rows(arr)
    if ascii_rows is None:
        return None
    sb, length = ascii_rows
    width = h.dtype.itemsize // 4
    if length > width:
        return None  # some submitted id is longer than every holdout id
    bits = max(1, (n - 1).bit_length())
    held = _holdout_ascii_keys(h, bits, owner)
    if held is None or held[1] != length:
        return None  # a holdout id is not ASCII, or the longest ids differ: not the same set
    kh, _, cached = held
    keys = _byte_row_hash(sb)
    low = np.uint64((1 << bits) - 1)
    keys &= ~low
    keys |= np.arange(n, dtype=np.uint64)
    keys.sort()
    h32 = h.view(np.uint32).reshape(n, width)
    cols = length  # <= width; the holdout's columns past it must be padding

    def differing(got: NDArray[np.uint8], want: NDArray[np.uint32]) -> NDArray[np.bool_]:
        """Rows of ``got`` (bytes) that differ from ``want`` (the holdout's code units)."""
        bad = ~(got[:, :cols] == want[:, :cols]).all(axis=1)
        if cols < width:
            bad |= want[:, cols:].any(axis=1)
        return bad

    def same_rows(order: NDArray[np.intp], rows: NDArray[np.intp] | None) -> NDArray[np.intp]:
        if rows is not None:
            return rows[differing(np.take(sb, order[rows], axis=0), h32[rows])]
        bad: list[NDArray[np.intp]] = []
        for start in range(0, n, _CHUNK_ROWS):  # chunks stay in cache
            stop = min(n, start + _CHUNK_ROWS)
            got = np.take(sb, order[start:stop], axis=0)
            want = h32[start:stop]
            # The common case, every row equal, by one memory comparison of bytes: exact
            # when every holdout code unit in the chunk is below 128 (checked here, on the
            # holdout's text as it is now) and its columns past `cols` are padding.
            if (
                int(want.max()) < 128
                and (cols == width or not want[:, cols:].any())
                and got.tobytes() == want[:, :cols].astype(np.uint8).tobytes()
            ):
                continue
            bad.append(start + np.flatnonzero(differing(got, want)))
        return np.concatenate(bad) if bad else np.empty(0, dtype=np.intp)

    def texts(rows: NDArray[np.intp]) -> list[str]:
        return arr.take(pa.array(rows, type=pa.int64())).to_pylist()

    order = _pair_and_verify(h, kh, keys, bits, same_rows, texts)
    if order is None and cached:
        _holdout_byte_keys.drop(owner)
        return _fast_order_ascii(h, arr, owner)
    return order


def _pair_and_verify(
    h: NDArray[np.str_],
    kh: NDArray[np.uint64],
    ks: NDArray[np.uint64],
    bits: int,
    same_rows: Any,
    submitted_text: Any,
) -> NDArray[np.intp] | None:
    """Pair the sorted keys position by position and verify every pairing exactly.

    ``same_rows(order, rows)`` gives the holdout positions whose paired submitted id differs
    (among ``rows``, or all); ``submitted_text(rows)`` the submitted ids at those rows.
    """
    n = h.size
    low = np.uint64((1 << bits) - 1)
    high = ~low
    ph = kh & high
    if not np.array_equal(ph, ks & high):
        return None
    hpos = (kh & low).view(np.int64).astype(np.intp, copy=False)
    order = np.empty(n, dtype=np.intp)
    order[hpos] = (ks & low).view(np.int64)
    # Holdout ids must be unique: equal ids have equal hashes, so only tied prefixes can hide
    # duplicates; check those few exactly.
    tied = np.flatnonzero(ph[1:] == ph[:-1])
    if tied.size:
        group = np.unique(np.concatenate([hpos[tied], hpos[tied + 1]]))
        if len(set(h[group].tolist())) < group.size:
            raise ValueError("holdout ids are not unique")
    bad = same_rows(order, None)
    if bad.size == 0:
        return order
    if bad.size > _REPAIR_LIMIT:
        return None
    # Re-pair the rows a hash collision mixed up, by exact lookup among the same rows.
    candidates = order[bad]
    lookup: dict[str, int] = {}
    for i, text in zip(candidates.tolist(), submitted_text(candidates), strict=True):
        if text in lookup:
            return None
        lookup[text] = i
    for j, text in zip(bad.tolist(), h[bad].tolist(), strict=True):
        i = lookup.get(text)
        if i is None:
            return None
        order[j] = i
    if same_rows(order, bad).size:
        return None
    return order


def _unicode_to_arrow(u: NDArray[np.str_]) -> pa.Array:
    """Fixed-width text as an Arrow string array; ASCII without a Python object per id."""
    n = u.size
    width = u.dtype.itemsize // 4
    units = np.ascontiguousarray(u).view(np.uint32).reshape(n, width)
    if n == 0 or width == 0 or int(units.max()) >= 128:
        return pa.array(u, type=pa.string())
    lengths = np.strings.str_len(u).astype(np.int32)
    offsets = np.zeros(n + 1, dtype=np.int32)
    np.cumsum(lengths, out=offsets[1:])
    data = units[np.arange(width) < lengths[:, None]].astype(np.uint8)
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(data))


def _arrow_text(ids: NDArray[Any], name: str) -> pa.Array:
    try:
        if ids.dtype.kind == "U":
            return _unicode_to_arrow(ids)
        return pa.array(ids.tolist(), type=pa.string())
    except (pa.ArrowException, TypeError, ValueError, UnicodeEncodeError) as exc:
        raise TypeError(f"{name} must hold text ids (use id_array): {exc}") from None


def _surely_unique(ids: NDArray[Any]) -> bool:
    """True when the ids are certainly distinct (hash prefixes differ, or the few rows whose
    prefixes tie are distinct strings); False means "not shown": check exactly."""
    u = _as_unicode(ids)
    if u is None:
        return False
    n = u.size
    if n < 2:
        return True
    bits = max(1, (n - 1).bit_length())
    low = np.uint64((1 << bits) - 1)
    keys = np.sort((_row_hash(_code_units(u)) & ~low) | np.arange(n, dtype=np.uint64))
    prefixes = keys & ~low
    tied = np.flatnonzero(prefixes[1:] == prefixes[:-1])
    if tied.size == 0:
        return True
    if tied.size > _REPAIR_LIMIT:
        return False
    rows = np.unique(np.concatenate([keys[tied], keys[tied + 1]]) & low).astype(np.intp)
    return len(set(u[rows].tolist())) == rows.size


def _distinct_examples(values: list[str], limit: int = MAX_EXAMPLES) -> list[str]:
    seen: dict[str, None] = {}
    for v in values:
        seen.setdefault(v, None)
        if len(seen) >= limit:
            break
    return list(seen)


def _hash_join(h: NDArray[Any], s: NDArray[Any]) -> NDArray[np.intp] | None:
    """For each submitted id, its holdout position or -1, exactly; None if this cannot tell.

    Full 64-bit row hashes, the holdout's sorted; each submitted hash has at most one
    candidate (None when two holdout hashes are equal), and every candidate is compared
    with the submitted id code unit by code unit. A submitted id with no equal candidate
    is in no holdout row: equal ids have equal hashes.
    """
    hu_arr, su_arr = _as_unicode(h), _as_unicode(s)
    if hu_arr is None or su_arr is None or hu_arr.size == 0 or su_arr.size == 0:
        return None
    if hu_arr.dtype.itemsize != su_arr.dtype.itemsize:
        width = max(hu_arr.dtype.itemsize, su_arr.dtype.itemsize) // 4
        width += width % 2
        hu_arr, su_arr = hu_arr.astype(f"<U{width}"), su_arr.astype(f"<U{width}")
    hu, su = _code_units(hu_arr), _code_units(su_arr)
    hh = _row_hash(hu)
    by_hash = np.argsort(hh)
    sorted_hh = hh[by_hash]
    if (sorted_hh[1:] == sorted_hh[:-1]).any():
        return None
    hs = _row_hash(su)
    by_submitted_hash = np.argsort(hs)
    where = np.empty(hs.size, dtype=np.intp)
    # sorted needles make every binary search start where the last one ended (cache-friendly)
    where[by_submitted_hash] = np.searchsorted(sorted_hh, hs[by_submitted_hash])
    where[where == sorted_hh.size] = 0
    candidate = by_hash[where]
    idx = np.full(su.shape[0], -1, dtype=np.intp)
    for start in range(0, su.shape[0], _CHUNK_ROWS):
        stop = min(su.shape[0], start + _CHUNK_ROWS)
        hit = np.flatnonzero(sorted_hh[where[start:stop]] == hs[start:stop]) + start
        same = (su[hit] == np.take(hu, candidate[hit], axis=0)).all(axis=1)
        idx[hit[same]] = candidate[hit[same]]
    return idx


def _exact_order(h: NDArray[Any], s: NDArray[Any], field: str) -> NDArray[np.intp]:
    """The order, or every problem with the submitted ids (the path that writes messages)."""
    n_h, n_s = h.size, s.size
    idx = _hash_join(h, s) if _surely_unique(h) else None
    if idx is not None:
        def submitted_text(pos: NDArray[np.intp]) -> list[str]:
            return [str(v) for v in s[pos].tolist()]

        def holdout_text(pos: NDArray[np.intp]) -> list[str]:
            return [str(v) for v in h[pos].tolist()]
    else:
        ha = _arrow_text(h, "holdout_ids")
        sa = _arrow_text(s, "submitted_ids")
        first = pc.index_in(ha, value_set=ha).to_numpy(zero_copy_only=False)
        if not np.array_equal(first, np.arange(n_h)):
            raise ValueError("holdout ids are not unique")
        idx = pc.fill_null(pc.index_in(sa, value_set=ha), -1).to_numpy(zero_copy_only=False)
        idx = idx.astype(np.intp)

        def submitted_text(pos: NDArray[np.intp]) -> list[str]:
            return sa.take(pa.array(pos, type=pa.int64())).to_pylist()

        def holdout_text(pos: NDArray[np.intp]) -> list[str]:
            return ha.take(pa.array(pos, type=pa.int64())).to_pylist()

    known = idx >= 0
    counts = np.bincount(idx[known], minlength=n_h)
    problems: list[IngestError] = []
    if not known.all():
        pos = np.flatnonzero(~known)
        sample = submitted_text(pos[: 50 * MAX_EXAMPLES])
        problems.append(content_error(
            field, int(pos.size), "submitted ids are not in the holdout",
            [show_text(v) for v in _distinct_examples(sample)],
            hint="every row's id must be one of the holdout's ids",
        ))
    dup_ids = np.flatnonzero(counts > 1)
    if dup_ids.size:
        in_dup = np.zeros(n_h, dtype=bool)
        in_dup[dup_ids] = True
        pos = np.flatnonzero(known & in_dup[np.where(known, idx, 0)])
        sample_pos = pos[: 50 * MAX_EXAMPLES]
        texts = submitted_text(sample_pos)
        times = {t: int(counts[idx[p]]) for t, p in zip(texts, sample_pos.tolist(), strict=True)}
        problems.append(content_error(
            field, int(dup_ids.size),
            f"ids appear more than once ({int(counts[dup_ids].sum())} rows in all)",
            [f"{show_text(t)} ({times[t]} times)" for t in _distinct_examples(texts)],
            hint="send exactly one row per id",
        ))
    missing = np.flatnonzero(counts == 0)
    if missing.size:
        # Holdout ids are public (anyone allowed to submit can list them); labels never appear.
        problems.append(content_error(
            field, int(missing.size), "holdout ids have no row in the submission",
            [show_text(v) for v in holdout_text(missing[:MAX_EXAMPLES])],
            hint="send exactly one row for every holdout id",
        ))
    if problems:
        first_problem = problems[0]
        raise IngestError(
            first_problem.status, first_problem.field, first_problem.message,
            count=first_problem.count, examples=first_problem.examples, more=problems[1:],
        )
    order = np.empty(n_h, dtype=np.intp)
    order[idx] = np.arange(n_s, dtype=np.intp)
    if not np.array_equal(s[order], h):
        raise AssertionError("exact alignment failed its own check")  # cannot happen
    return order


def _as_1d(ids: Any, name: str) -> NDArray[Any]:
    if isinstance(ids, (pa.Array, pa.ChunkedArray)):
        ids = ids.to_numpy(zero_copy_only=False)
    arr = np.asarray(ids) if not isinstance(ids, np.ndarray) else ids
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    return arr


def align_ids(
    holdout_ids: NDArray[Any],
    submitted_ids: NDArray[Any] | pa.Array | pa.ChunkedArray,
    *,
    field: str = "ids",
) -> NDArray[np.intp]:
    """Row order that puts a submission in holdout order: ``submitted_ids[order] == holdout_ids``.

    Parameters
    ----------
    holdout_ids : array of str, shape (n,)
        The holdout's ids, unique (a ValueError otherwise: that is our bug, not the user's).
    submitted_ids : array of str, shape (m,), or a pyarrow string array
        The submission's ids as sent (``id_array`` or a table reader's ``ids``). An Arrow
        array of ASCII ids is aligned from its UTF-8 bytes, without a numpy copy.
    field : str
        Name of the submitted field, for messages.

    Returns
    -------
    order : ndarray of intp, shape (n,)
        ``predictions[:, order]`` are the predictions in holdout order.

    Raises
    ------
    IngestError (422)
        For unknown, duplicate and missing ids, all reported together: examples of unknown
        and duplicate ids come from the submission; missing ones are holdout ids, which are
        public. Ids match exactly (no Unicode normalization, no trimming).
    """
    h = _as_1d(holdout_ids, "holdout_ids")
    if isinstance(submitted_ids, pa.ChunkedArray):
        submitted_ids = submitted_ids.combine_chunks()
    if isinstance(submitted_ids, pa.Array) and pa.types.is_string(submitted_ids.type):
        hu_fast = _as_unicode(h)
        if hu_fast is not None:
            order = _fast_order_ascii(hu_fast, submitted_ids, owner=h if hu_fast is h else None)
            if order is not None:
                return order
        submitted_ids = text_to_numpy(submitted_ids) if not submitted_ids.null_count else \
            submitted_ids
    s = _as_1d(submitted_ids, "submitted_ids")
    hu = _as_unicode(h)
    su = _as_unicode(s) if hu is not None else None
    order = None
    if hu is not None and su is not None:
        order = _fast_order(hu, su, owner=h if hu is h else None)
    if order is None:
        order = _exact_order(h, s, field)
    return order


def require_unique_ids(ids: NDArray[Any], *, field: str = "ids") -> None:
    """422 naming repeated ids (for a holdout built from JSON; tables check this themselves)."""
    arr = _as_1d(ids, field)
    if _surely_unique(arr):
        return
    a = _arrow_text(arr, field)
    first = pc.index_in(a, value_set=a).to_numpy(zero_copy_only=False)
    repeated = np.flatnonzero(first != np.arange(len(a)))
    if repeated.size == 0:
        return
    texts = a.take(pa.array(repeated[: 50 * MAX_EXAMPLES])).to_pylist()
    distinct = int(np.unique(first[repeated]).size)
    raise content_error(
        field, distinct, f"ids appear more than once ({distinct + int(repeated.size)} rows in all)",
        [show_text(t) for t in _distinct_examples(texts)], hint="every id must be unique",
    )
