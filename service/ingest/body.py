"""Request body bytes: identity or gzip, never more than ``Limits.max_body_bytes``.

gzip is inflated in pieces of at most 1 MiB, counting as it goes, so a small body that
unpacks to gigabytes (a "gzip bomb") is stopped with 413 after at most the limit plus one
piece has been produced. Several gzip members one after another are one body (RFC 1952,
section 2.2). Content codings other than identity and gzip are 415 (RFC 9110, 15.5.16).
"""

from __future__ import annotations

import zlib

from .errors import IngestError
from .limits import Limits

_PIECE = 1 << 20
_GZIP_MAGIC = b"\x1f\x8b"


def _too_large(what: str, limits: Limits) -> IngestError:
    return IngestError(
        413, "body",
        f"body: {what} more than the limit of {limits.max_body_bytes} bytes",
        count=1,
    )


def _empty() -> IngestError:
    return IngestError(400, "body", "body: the request body is empty", count=1)


def _codings(content_encoding: str | None) -> list[str]:
    if content_encoding is None:
        return []
    names = [c.strip().lower() for c in content_encoding.split(",")]
    return [c for c in names if c and c != "identity"]


def _gunzip(raw: bytes, limits: Limits) -> bytes:
    pieces: list[bytes] = []
    total = 0
    data = raw
    first = True
    while True:
        if not data.startswith(_GZIP_MAGIC):
            where = "" if first else " after the end of the gzip data"
            raise IngestError(
                400, "body", f"body: not gzip data{where} (Content-Encoding says gzip)", count=1
            )
        first = False
        inflater = zlib.decompressobj(wbits=16 + zlib.MAX_WBITS)
        pending = data
        while not inflater.eof:
            try:
                piece = inflater.decompress(pending, _PIECE)
            except zlib.error as exc:
                raise IngestError(400, "body", f"body: broken gzip data ({exc})", count=1) from None
            pending = inflater.unconsumed_tail
            if not piece and not pending and not inflater.eof:
                raise IngestError(400, "body", "body: gzip data ends before its end marker",
                                  count=1)
            total += len(piece)
            if total > limits.max_body_bytes:
                raise _too_large("gzip body unpacks to", limits)
            pieces.append(piece)
        data = inflater.unused_data
        if not data:
            break
    return b"".join(pieces)


def decode_body(raw: bytes, content_encoding: str | None, *, limits: Limits) -> bytes:
    """The body as sent before any content coding, checked against ``limits.max_body_bytes``.

    Parameters
    ----------
    raw : bytes
        The body exactly as received.
    content_encoding : str or None
        The Content-Encoding header: absent, ``identity`` or ``gzip`` (``x-gzip`` is read as
        gzip, RFC 9110 section 8.4.1.3).

    Raises
    ------
    IngestError
        400 for an empty body or broken gzip, 413 for too many bytes before or after
        inflating, 415 for any other content coding.
    """
    codings = _codings(content_encoding)
    if len(raw) > limits.max_body_bytes:
        raise _too_large("the body has", limits)
    if not raw:
        raise _empty()
    if not codings:
        return bytes(raw)
    if len(codings) > 1 or codings[0] not in ("gzip", "x-gzip"):
        raise IngestError(
            415, "Content-Encoding",
            f"Content-Encoding: {content_encoding!r} is not supported; send identity or gzip",
            count=1, examples=[content_encoding or ""],
        )
    out = _gunzip(bytes(raw), limits)
    if not out:
        raise _empty()
    return out
