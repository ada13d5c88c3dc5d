"""The one exception of the ingest layer, and how its examples are written.

Every problem with a request body becomes an ``IngestError`` whose ``status`` says which
HTTP answer fits (RFC 9110 status semantics; the body is an RFC 9457 problem whose
``errors`` member is ``IngestError.to_problem_errors()``):

- 400: the body cannot be read at all (empty, broken gzip, not CSV or Parquet);
- 413: the body, or what it unpacks to, is larger than ``Limits`` allow;
- 415: the media type or content coding is not one we read;
- 422: the body reads fine but its content is wrong (bad ids, non-numbers, wrong lengths...).

A message names the field, says how many items are wrong and shows up to ten examples.
Examples are always taken from the submitter's own input (their ids, values, column
names), never from the holdout's labels.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import orjson

MAX_EXAMPLES = 10
"""At most this many examples are shown per problem."""

_SHOW_CHARS = 60


class IngestError(Exception):
    """A request body we cannot turn into arrays, with what the submitter needs to fix it.

    ``more`` holds further problems found in the same pass (for example unknown and
    missing ids together); ``to_problem_errors`` lists this problem first, then those.
    """

    def __init__(
        self,
        status: int,
        field: str,
        message: str,
        *,
        count: int = 0,
        examples: Iterable[str] = (),
        more: Sequence[IngestError] = (),
    ) -> None:
        super().__init__(message)
        self.status = int(status)
        self.field = field
        self.message = message
        self.count = int(count)
        self.examples = [str(e) for e in examples][:MAX_EXAMPLES]
        self.more = tuple(more)

    def to_problem_errors(self) -> list[dict[str, Any]]:
        """Entries for the RFC 9457 ``errors`` member: field, message, count, examples."""
        return [
            {"field": e.field, "message": e.message, "count": e.count, "examples": list(e.examples)}
            for e in (self, *self.more)
        ]

    def __repr__(self) -> str:
        return f"IngestError({self.status}, {self.field!r}, {self.message!r})"


def show_text(text: str) -> str:
    """A submitter's string as a short JSON string literal (quotes, escapes, cut at 60 chars)."""
    cut = text[:_SHOW_CHARS]
    try:
        shown = orjson.dumps(cut).decode()
    except TypeError:  # lone surrogates: fall back to ASCII escapes
        shown = json.dumps(cut)
    if len(text) > _SHOW_CHARS:
        shown += f"... ({len(text)} characters)"
    return shown


def show_value(value: Any) -> str:
    """Any submitted value written the way the submitter wrote it (JSON spelling), briefly."""
    if isinstance(value, np.generic):
        value = value.item()
    if value is None:
        return "null"
    if value is True:
        return "true"
    if value is False:
        return "false"
    if isinstance(value, str):
        return show_text(value)
    if isinstance(value, int):
        if value.bit_length() > 200:
            digits = int(value.bit_length() * math.log10(2)) + 1
            return f"an integer of about {digits} digits"
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "NaN"
        if math.isinf(value):
            return "Infinity" if value > 0 else "-Infinity"
        return repr(value)
    if isinstance(value, list):
        return f"a list of {len(value)} items"
    if isinstance(value, dict):
        return f"an object with {len(value)} keys"
    if isinstance(value, (bytes, bytearray)):
        return f"{len(value)} bytes"
    return f"a value of type {type(value).__name__}"


def kind_of(value: Any) -> str:
    """The JSON kind of a value, in words (for 'where a number belongs' messages)."""
    if value is None:
        return "null"
    if isinstance(value, (bool, np.bool_)):
        return "boolean"
    if isinstance(value, str):
        return "text"
    if isinstance(value, (int, float, np.number)):
        return "number"
    if isinstance(value, list):
        return "list"
    if isinstance(value, dict):
        return "object"
    return type(value).__name__


def content_error(
    field: str,
    count: int,
    what: str,
    examples: Iterable[str] = (),
    *,
    status: int = 422,
    hint: str = "",
) -> IngestError:
    """Build the standard message: '<field>: <count> <what>[; hint]; examples: a, b (10 of N)'."""
    shown = [str(e) for e in examples][:MAX_EXAMPLES]
    message = f"{field}: {count} {what}"
    if hint:
        message += f"; {hint}"
    if shown:
        message += "; examples: " + ", ".join(shown)
        if count > len(shown):
            message += f" (first {len(shown)} of {count} shown)"
    return IngestError(status, field, message, count=count, examples=shown)


def whole_field_error(field: str, message: str, *, status: int = 422, value: Any = None,
                      show: bool = False, count: int = 1) -> IngestError:
    """A problem with a field as a whole (wrong type, empty, too many seeds or rows).

    ``count`` is 1 (the field) unless a size is the problem, then it is that size.
    """
    examples = [show_value(value)] if show else []
    text = f"{field}: {message}"
    if examples:
        text += f"; got {examples[0]}"
    return IngestError(status, field, text, count=count, examples=examples)
