"""Arrays to compressed bytes and back, for the binary columns of the store.

Format: one Arrow IPC stream holding a one-column table named ``v``, with the IPC body
compressed by zstd. Arrow keeps strings compact (no fixed-width padding as numpy's ``U``
dtype would), decodes without a Python loop, and round-trips float64 bit for bit.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
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


def decode_array(blob: bytes) -> NDArray:
    """Decode bytes from ``encode_array``: strings come back as an object array of str."""
    with pa.ipc.open_stream(pa.py_buffer(blob)) as reader:
        table = reader.read_all()
    column = table.column("v")
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object)
    return column.to_numpy()


__all__ = ["decode_array", "encode_array"]
