"""Arrays to compressed bytes and back, for the binary columns of the store.

Format: one Arrow IPC stream holding a one-column table named ``v``, with the IPC body
compressed by zstd. Arrow keeps strings compact (no fixed-width padding as numpy's ``U``
dtype would), decodes without a Python loop, and round-trips float64 bit for bit.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

_WRITE_OPTIONS = pa.ipc.IpcWriteOptions(compression="zstd")


def encode_array(values: NDArray) -> bytes:
    """Encode a 1-d array of strings, floats or integers as compressed Arrow IPC bytes."""
    if values.ndim != 1:
        raise ValueError(f"expected a 1-d array, got shape {values.shape}")
    if values.dtype.kind in "OUS":
        column = pa.array(values, type=pa.string())
    else:
        column = pa.array(values)
    table = pa.table({"v": column})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema, options=_WRITE_OPTIONS) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


_FIXED_WIDTH_ALWAYS_BYTES = 64 * 1024 * 1024
_PY_STR_BYTES = 64  # rough size of a small Python str object


def decode_array(blob: bytes) -> NDArray:
    """Decode bytes from ``encode_array``: strings come back as an object array of str."""
    with pa.ipc.open_stream(pa.py_buffer(blob)) as reader:
        table = reader.read_all()
    column = table.column("v")
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object)
    return column.to_numpy()


def decode_text(blob: bytes) -> NDArray:
    """Decode a string array as fixed-width ``<U`` text when that is compact enough.

    Fixed-width text is what id alignment hashes fastest; it is used unless one long id
    would make it cost more than 64 MiB and twice what Python strings would, or an id holds
    a NUL (which fixed-width numpy text cannot keep at the end of a string). Otherwise an
    object array of ``str``.
    """
    with pa.ipc.open_stream(pa.py_buffer(blob)) as reader:
        column = reader.read_all().column("v")
    n = len(column)
    if n == 0:
        return np.empty(0, dtype="<U2")
    lengths = pc.utf8_length(column)
    longest = max(1, int(pc.max(lengths).as_py() or 0))
    width = longest + longest % 2
    object_bytes = n * (_PY_STR_BYTES + float(pc.mean(lengths).as_py() or 0.0))
    values = column.to_numpy(zero_copy_only=False)
    has_nul = bool(pc.any(pc.match_substring(column, "\x00")).as_py())
    if has_nul or 4 * width * n > max(_FIXED_WIDTH_ALWAYS_BYTES, 2 * object_bytes):
        return np.asarray(values, dtype=object)
    return values.astype(f"<U{width}")


__all__ = ["decode_array", "decode_text", "encode_array"]
