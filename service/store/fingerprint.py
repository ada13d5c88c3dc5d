"""The commitment a holdout publishes at registration.

``fingerprint = SHA-256(salt || canonical_encoding(ids, labels))``, lowercase hex, where
``salt`` is 32 random bytes kept secret (a later reveal publishes it, so that anyone holding
the labels can recompute the commitment) and the canonical encoding is defined once, in
``canonical_encoding``. Ids and class names may not contain the two separator characters
(U+001E, U+001F); registration refuses them, so the encoding is unambiguous.
"""

from __future__ import annotations

import hashlib
import secrets
from collections.abc import Iterator, Sequence

import numpy as np
from numpy.typing import NDArray

SALT_BYTES = 32
UNIT_SEPARATOR = "\x1f"  # between a row's id and its label
RECORD_SEPARATOR = "\x1e"  # after every row
FORBIDDEN_CHARACTERS = (UNIT_SEPARATOR, RECORD_SEPARATOR)
_CHUNK_ROWS = 65_536


def new_salt() -> bytes:
    """32 bytes from the operating system's CSPRNG."""
    return secrets.token_bytes(SALT_BYTES)


def canonical_label_texts(
    task: str, labels: NDArray, classes: Sequence[str] | None = None
) -> list[str]:
    """The canonical text of each label.

    Regression: Python's ``repr`` of the label as a float64, the shortest text that reads
    back to the same double (``3`` -> ``"3.0"``, ``1e16`` -> ``"1e+16"``, ``-0.0`` stays
    ``"-0.0"``). Classification: the class name as registered; ``labels`` holds class
    indices into ``classes``.
    """
    if task == "regression":
        return [repr(v) for v in np.asarray(labels, dtype=np.float64).tolist()]
    if classes is None:
        raise ValueError("classification labels need their classes")
    names = list(classes)
    return [names[i] for i in np.asarray(labels).tolist()]


def canonical_chunks(ids: Sequence[str], label_texts: Sequence[str]) -> Iterator[bytes]:
    """The canonical encoding, in pieces (see ``canonical_encoding``)."""
    if len(ids) != len(label_texts):
        raise ValueError(f"{len(ids)} ids but {len(label_texts)} labels")
    for start in range(0, len(ids), _CHUNK_ROWS):
        stop = start + _CHUNK_ROWS
        parts = [
            f"{i}{UNIT_SEPARATOR}{t}{RECORD_SEPARATOR}"
            for i, t in zip(ids[start:stop], label_texts[start:stop], strict=True)
        ]
        yield "".join(parts).encode("utf-8")


def canonical_encoding(ids: Sequence[str], label_texts: Sequence[str]) -> bytes:
    """Canonical bytes of a holdout's rows, the message the fingerprint commits to.

    For each row in registration order: the id as UTF-8, the byte 0x1F, the label's
    canonical text (``canonical_label_texts``) as UTF-8, the byte 0x1E. Nothing else:
    no header, no row count, no trailing newline.
    """
    return b"".join(canonical_chunks(ids, label_texts))


def fingerprint(salt: bytes, ids: Sequence[str], label_texts: Sequence[str]) -> str:
    """Lowercase hex SHA-256 of ``salt`` followed by the canonical encoding."""
    digest = hashlib.sha256(salt)
    for chunk in canonical_chunks(ids, label_texts):
        digest.update(chunk)
    return digest.hexdigest()


__all__ = [
    "FORBIDDEN_CHARACTERS",
    "RECORD_SEPARATOR",
    "SALT_BYTES",
    "UNIT_SEPARATOR",
    "canonical_chunks",
    "canonical_encoding",
    "canonical_label_texts",
    "fingerprint",
    "new_salt",
]
