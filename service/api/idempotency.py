"""``Idempotency-Key`` on ``POST /v1/holdouts/{id}/submissions``: a retry gets the first result.

Following the IETF HTTPAPI working group's draft "The Idempotency-Key HTTP Header Field"
(draft-ietf-httpapi-idempotency-key-header):

- The value is a Structured Field String (RFC 8941): ``Idempotency-Key: "9f3c..."``; a bare
  token of the same characters is accepted too. 1 to 255 printable ASCII characters;
  anything else, or the header twice, is 400 naming ``Idempotency-Key``.
- A key is scoped to the token's group and the holdout: the same text in another group or
  on another holdout is another key. Keys do not expire while the holdout exists.
- A request whose key is stored with the same request (same digest: media type, query or
  form fields, body bytes after Content-Encoding) is neither scored nor stored again: the
  answer is the stored submission, with status 201 as the first time, the same body and
  ``Location``, and ``Idempotent-Replayed: true``. Nothing is counted against a quota.
- The same key with a different request: 422 naming ``Idempotency-Key`` (the draft's
  choice). A request that failed stored nothing, so its key stays free for a corrected one.
- Two requests with one key at the same time, on any processes: both may be scored, one is
  stored (the database's unique constraint on holdout, group and key decides, in the
  transaction that stores the submission), and both answer with that one.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import orjson
from flask import request

from service.store import Store, SubmissionRecord
from service.store.idempotency import find_key

from .bodies import ReceivedBody
from .errors import BadRequest, ValidationFailed, problem_error

HEADER = "Idempotency-Key"
REPLAYED_HEADER = "Idempotent-Replayed"
MAX_KEY_LENGTH = 255
_DIGEST_PREFIX = b"heldout submission request v1\x00"


@dataclass(frozen=True)
class RequestKey:
    """The client's key and the digest of the request it came with."""

    key: str
    digest: str


def _bad_key(message: str, raw: str) -> BadRequest:
    return BadRequest(
        f"{HEADER}: {message}.",
        [problem_error(HEADER, message, 1, [raw[:100]])],
    )


def parse_key(raw: str) -> str:
    """The key in an ``Idempotency-Key`` value: an RFC 8941 String or a bare token."""
    text = raw.strip(" \t")
    if text.startswith('"'):
        if len(text) < 2 or not text.endswith('"'):
            raise _bad_key("an unterminated quoted string", raw)
        out: list[str] = []
        chars = iter(text[1:-1])
        for ch in chars:
            if ch == "\\":
                ch = next(chars, "")
                if ch not in ('"', "\\"):
                    raise _bad_key('only \\" and \\\\ may be escaped in a quoted key', raw)
            elif ch == '"':
                raise _bad_key("a quote inside a quoted key must be escaped", raw)
            out.append(ch)
        key = "".join(out)
        allowed = all(" " <= c <= "~" for c in key)
    else:
        key = text
        allowed = all("!" <= c <= "~" and c != '"' for c in key)
    if not key:
        raise _bad_key("the key is empty", raw)
    if not allowed:
        raise _bad_key("a key holds printable ASCII characters only", raw)
    if len(key) > MAX_KEY_LENGTH:
        raise _bad_key(f"a key has at most {MAX_KEY_LENGTH} characters, got {len(key)}", raw)
    return key


def header_key() -> str | None:
    """The request's ``Idempotency-Key``, checked, or None when it has none."""
    values = request.headers.getlist(HEADER)
    if not values:
        return None
    if len(values) > 1:
        raise _bad_key("send the header once", ", ".join(values))
    return parse_key(values[0])


def request_digest(media_type: str, fields: Mapping[str, Any], body: bytes) -> str:
    """SHA-256 (hex) of what a submission request asks for, as the service read it."""
    h = hashlib.sha256(_DIGEST_PREFIX)
    h.update(media_type.encode("ascii") + b"\x00")
    h.update(orjson.dumps(dict(fields), option=orjson.OPT_SORT_KEYS) + b"\x00")
    h.update(body)
    return h.hexdigest()


def request_key(received: ReceivedBody) -> RequestKey | None:
    """The key with the digest of ``received``, or None when the request has no key."""
    key = header_key()
    if key is None:
        return None
    return RequestKey(key, request_digest(received.media_type, received.fields, received.data))


def stored_submission(
    store: Store, holdout_id: str, group: str, key: RequestKey
) -> SubmissionRecord | None:
    """The submission this key already created, or None; 422 if it came with another request."""
    found = find_key(store, holdout_id, group, key.key)
    if found is None:
        return None
    if found.request_digest != key.digest:
        raise ValidationFailed(
            f"{HEADER} {key.key!r} was used for another request to this holdout; a retry must "
            "repeat the request exactly, and a new request needs a new key.",
            [
                problem_error(
                    HEADER,
                    "already used by this group on this holdout for a different request",
                    1,
                    [key.key[:100]],
                )
            ],
        )
    record = store.get_submission(found.submission_id)
    assert record is not None, "an idempotency key names a stored submission"
    return record


__all__ = [
    "HEADER",
    "MAX_KEY_LENGTH",
    "REPLAYED_HEADER",
    "RequestKey",
    "header_key",
    "parse_key",
    "request_digest",
    "request_key",
    "stored_submission",
]
