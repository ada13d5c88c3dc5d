"""A CSV submission read from the request stream a block at a time, never held whole.

Holding a large CSV body costs more than everything made from it: a million rows of ten
seeds are 213 MB of text for 80 MB of float64 predictions, and the body, Arrow's table and
the arrays alive together were 4.6 to 6 times the predictions (``tests/perf/bench_ingest.py``).
Here the body is read in ``block_size`` pieces by pyarrow's streaming CSV reader
(``pyarrow.csv.open_csv``); each block's prediction columns are copied straight into one
preallocated (K, n) float64 array and the block is dropped; only the ids are kept (as Arrow
text) until they are aligned, and the array is then put in holdout order row by row.

Every byte read is also written to an unlinked temporary file (the kernel's page cache,
not the worker's memory). That is the fallback: whenever the stream shows anything the
fast path does not settle (a header it cannot read, a layout problem, a cell that is not a
number, NaN or infinity, an id that is empty, too long or holds NUL, a row count that is
not the holdout's, ids that do not align, a classification holdout), the rest of the body
is read into the file and the whole body goes through ``read_table`` and
``submission_from_table`` exactly as if it had been read in one piece. Refusals are
therefore the same problems, word for word, with the same counts and examples; the fast
path only ever accepts what that path would accept, with the same arrays.
"""

from __future__ import annotations

import tempfile
import threading
import weakref
from collections.abc import Callable
from typing import Protocol

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
from numpy.typing import NDArray

from ._convert import TextStats
from .limits import DEFAULT_LIMITS, Limits

CSV_BLOCK_BYTES = 1 << 20
"""Bytes of CSV text per block (and record batch), here and in ``read_table`` (pyarrow's
default): a row longer than a block is refused alike by both."""

_HEADER_BYTES = 1 << 20
_SPOOL_PIECE = 1 << 20


class BodySource(Protocol):
    """A request body still on the wire: ``read(n)`` gives up to n bytes, b"" at its end.

    It may raise (a body shorter than its Content-Length, say); the exception is raised
    again from the call that was reading, not from inside pyarrow.
    """

    def read(self, n: int) -> bytes: ...


class _Spool:
    """What pyarrow reads: the source's bytes, each piece also appended to a temp file.

    Reads are serialized by a lock (should pyarrow ever read ahead on a thread of its own),
    so the file always holds exactly the bytes consumed so far, in order. A source error
    ends the stream (pyarrow sees b"") and is kept in ``error`` for the caller to raise.
    """

    closed = False

    def __init__(self, source: BodySource, first: bytes) -> None:
        self.source = source
        self.pending = first
        self.file = tempfile.TemporaryFile()  # noqa: SIM115 (closed by discard, or when dropped)
        self.discard = weakref.finalize(self, self.file.close)
        self.file.write(first)
        self.lock = threading.Lock()
        self.error: BaseException | None = None
        self.ended = False

    def _next(self, n: int) -> bytes:
        """Up to n bytes from the source (fewer only at its end), also appended to the file."""
        if self.ended:
            return b""
        pieces: list[bytes] = []
        got = 0
        while got < n:  # a short read would look like the end to pyarrow
            try:
                piece = self.source.read(n - got)
            except BaseException as exc:  # noqa: BLE001 (raised again by StreamedCsv)
                self.error = exc
                piece = b""
            if not piece:
                self.ended = True
                break
            pieces.append(piece)
            got += len(piece)
        data = pieces[0] if len(pieces) == 1 else b"".join(pieces)
        self.file.write(data)
        return data

    def read(self, n: int = -1) -> bytes:
        with self.lock:
            if self.pending:
                if n < 0 or n >= len(self.pending):
                    out, self.pending = self.pending, b""
                else:
                    out, self.pending = self.pending[:n], self.pending[n:]
                return out
            return self._next(_SPOOL_PIECE if n < 0 else n)

    def readable(self) -> bool:
        return True

    def everything(self) -> bytes:
        """The whole body: the rest of the stream read into the file, then the file."""
        with self.lock:
            self.pending = b""
            while self._next(_SPOOL_PIECE):
                pass
            self.file.seek(0)
            data = self.file.read()
            self.file.seek(0, 2)
            return data



def _header_names(first: bytes) -> list[str] | None:
    """Column names from the first piece of the body, or None when that cannot tell them
    the way ``read_table`` reads them (no complete first line, or Arrow refuses it)."""
    end = first.rfind(b"\n")
    if end < 0:
        return None
    try:
        reader = pacsv.open_csv(
            pa.BufferReader(first[: end + 1]),
            read_options=pacsv.ReadOptions(use_threads=False, block_size=_HEADER_BYTES),
        )
        return list(reader.schema.names)
    except (pa.ArrowException, OSError, ValueError, EOFError, IndexError, KeyError,
            TypeError, OverflowError, MemoryError):
        return None


class StreamedCsv:
    """A CSV body whose header has been read and whose rows are still on the wire.

    Made by ``open_csv_stream``; ``submission_from_table`` and ``holdout_from_table``
    accept it in place of a table. ``column_names`` is the header (None when the first
    piece did not show it; the body is then read whole). Use it once.
    """

    def __init__(self, source: BodySource, first: bytes, names: list[str] | None,
                 limits: Limits, task: str | None, on_read: Callable[[], None] | None) -> None:
        self.spool = _Spool(source, first)
        self.column_names = names
        self.limits = limits
        self.task = task
        self.on_read = on_read
        self.used = False

    def _raise_source_error(self) -> None:
        if self.spool.error is not None:
            error, self.spool.error = self.spool.error, None
            raise error

    def _read_done(self) -> None:
        self._raise_source_error()
        if self.on_read is not None:
            self.on_read()

    def whole_body(self) -> bytes:
        """Every byte of the body (what ``read_table`` takes), the rest read from the wire."""
        data = self.spool.everything()
        self._read_done()
        self.spool.discard()
        return data

    def table(self) -> pa.Table:
        """The body read whole by ``read_table``: its table, or its exact refusal (also
        after ``regression_predictions``, whatever it returned)."""
        from .tables import CSV_MEDIA_TYPE, read_table

        if self.spool.file.closed:
            raise RuntimeError("this streamed CSV body was closed")
        return read_table(self.whole_body(), CSV_MEDIA_TYPE, limits=self.limits, task=self.task)

    def regression_predictions(
        self, column_types: dict[str, pa.DataType], id_column: str, pred_columns: list[str],
        n: int,
    ) -> tuple[pa.Array, NDArray[np.float64]] | None:
        """(ids as sent, predictions (K, n) in the order sent) for a clean body of exactly n
        rows, or None when the whole body must decide (``table`` then reads it).

        ``column_types`` gives every header column its type as ``read_table`` would; the
        blocks are read as ``read_table`` reads them (same options and block size), so a
        block that converts here converts there. Afterwards call ``close`` or ``table``.
        """
        if self.used:
            raise RuntimeError("a streamed CSV body is streamed once")
        self.used = True
        k = len(pred_columns)
        predictions = np.empty((k, n), dtype=np.float64)
        id_chunks: list[pa.Array] = []
        rows = 0
        limits = self.limits
        try:
            reader = pacsv.open_csv(
                self.spool,
                # One thread: the body is read on the caller's thread (a server's input
                # stream need not be safe to read from another), parsing as fast here.
                read_options=pacsv.ReadOptions(use_threads=False, block_size=CSV_BLOCK_BYTES),
                convert_options=pacsv.ConvertOptions(
                    column_types=column_types, null_values=[], strings_can_be_null=False,
                    quoted_strings_can_be_null=False, true_values=[], false_values=[],
                ),
            )
            if reader.schema.names != self.column_names:
                return self._give_back()
            id_at = reader.schema.get_field_index(id_column)
            pred_at = [reader.schema.get_field_index(c) for c in pred_columns]
            while True:
                try:
                    batch = reader.read_next_batch()
                except StopIteration:
                    break
                m = batch.num_rows
                if rows + m > n:
                    return self._give_back()
                ids = batch.column(id_at)
                if ids.null_count or not _clean_ids(ids, limits):
                    return self._give_back()
                id_chunks.append(ids)
                for s, at in enumerate(pred_at):
                    column = batch.column(at)
                    if column.null_count or column.type != pa.float64():
                        return self._give_back()
                    target = predictions[s, rows : rows + m]
                    target[...] = column.to_numpy(zero_copy_only=False)
                    if not np.isfinite(target).all():
                        return self._give_back()
                rows += m
                del batch, ids
        except (pa.ArrowException, OSError, ValueError, EOFError, IndexError, KeyError,
                TypeError, OverflowError, MemoryError):
            return self._give_back()
        self._read_done()
        if rows != n:
            return self._give_back()
        id_text = pa.chunked_array(id_chunks, type=pa.string()).combine_chunks()
        return id_text, predictions

    def _give_back(self) -> None:
        """The fast path stops here: ``table`` then reads the body whole."""
        self._raise_source_error()

    def close(self) -> None:
        """Drop the copy of the body (the fast path's arrays were used)."""
        self.spool.discard()


def _clean_ids(ids: pa.Array, limits: Limits) -> bool:
    """True when no id of this block is empty, longer than the limit, or holds NUL (what
    ``text_problems`` refuses); the whole body then decides how to say so."""
    if ids.type != pa.string() or len(ids) == 0:
        return ids.type == pa.string()
    stats = TextStats(ids)
    return not (
        stats.has_nul
        or bool((stats.byte_lengths == 0).any())
        or bool((stats.chars > limits.max_id_length).any())
    )


def open_csv_stream(
    source: BodySource,
    *,
    limits: Limits | None = None,
    task: str | None = None,
    on_read: Callable[[], None] | None = None,
) -> StreamedCsv:
    """Read a CSV body's first piece and header from ``source``; the rows stay on the wire.

    ``task`` is ``read_table``'s (the types it gives number columns). ``on_read`` is called
    once the last byte has been read (the service marks a ``Server-Timing`` phase there).
    The caller has checked the media type. A header with repeated names is refused here,
    as ``read_table`` refuses it; a first piece that does not show the header leaves
    ``column_names`` None, and the body is then read whole before anything is decided.
    """
    from .tables import _duplicate_columns

    limits = limits or DEFAULT_LIMITS
    first = b""
    while len(first) < _HEADER_BYTES:
        piece = source.read(_HEADER_BYTES - len(first))
        if not piece:
            break
        first += piece
    names = _header_names(first)
    if names is not None:
        _duplicate_columns(names)
    return StreamedCsv(source, first, names, limits, task, on_read)


__all__ = ["CSV_BLOCK_BYTES", "BodySource", "StreamedCsv", "open_csv_stream"]
