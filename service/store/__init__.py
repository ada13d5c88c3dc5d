"""Storage: every table in ``schema``, every query in ``Store`` (SQLAlchemy Core).

The same code runs on SQLite (the default, a file) and PostgreSQL (psycopg 3); the URL
decides. See ``store.Store`` for the connection lifetime rules.
"""

from .blobs import decode_array, decode_text, encode_array
from .fingerprint import canonical_encoding, canonical_label_texts, fingerprint, new_salt
from .store import (
    ROLES,
    TOKEN_PREFIX,
    DuplicateHoldoutNameError,
    HoldoutArrays,
    HoldoutRecord,
    NewHoldout,
    NewSubmission,
    Store,
    StoreError,
    SubmissionRecord,
    SweepMember,
    TokenRecord,
    UnknownTokenError,
    hash_token,
    make_engine,
    new_token_secret,
)

__all__ = [
    "ROLES",
    "TOKEN_PREFIX",
    "DuplicateHoldoutNameError",
    "HoldoutArrays",
    "HoldoutRecord",
    "NewHoldout",
    "NewSubmission",
    "Store",
    "StoreError",
    "SubmissionRecord",
    "SweepMember",
    "TokenRecord",
    "UnknownTokenError",
    "canonical_encoding",
    "canonical_label_texts",
    "decode_array",
    "decode_text",
    "encode_array",
    "fingerprint",
    "hash_token",
    "make_engine",
    "new_salt",
    "new_token_secret",
]
