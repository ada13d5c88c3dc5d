"""The registration fingerprint, recomputed independently from its documented definition.

Documented (``service.store.fingerprint``, README): SHA-256 over the 32-byte salt followed
by, for each row in registration order, the id as UTF-8, byte 0x1F, the label's canonical
text as UTF-8, byte 0x1E; canonical text = Python's ``repr`` of the float for regression,
the class name for classification; integer ids are their decimal text. The reference for
SHA-256 is Python's ``hashlib`` (FIPS 180-4); nothing below calls the service's encoder.
"""

from __future__ import annotations

import hashlib
from typing import Any

from apidata import TINY_POLICY, classification_body, register, regression_body

from service.store import canonical_encoding, canonical_label_texts, fingerprint


def _documented(salt: bytes, ids: list[str], label_texts: list[str]) -> str:
    message = b"".join(
        i.encode("utf-8") + b"\x1f" + t.encode("utf-8") + b"\x1e"
        for i, t in zip(ids, label_texts, strict=True)
    )
    return hashlib.sha256(salt + message).hexdigest()


def test_regression_fingerprint(owner: Any, store: Any) -> None:
    body = regression_body()
    body["y_true"][:4] = [3, -0.0, 1e16, 2.5e-300]  # ints and exponents have one spelling
    h = register(owner, body)
    salt = store.holdout_arrays(h.id).salt
    texts = [repr(float(v)) for v in body["y_true"]]
    assert texts[:4] == ["3.0", "-0.0", "1e+16", "2.5e-300"]
    assert h.response["fingerprint"] == _documented(salt, body["ids"], texts)


def test_classification_fingerprint_with_unusual_ids(owner: Any, store: Any) -> None:
    body = classification_body()
    body["ids"][:3] = ["Zürich-1", "東京", "a b,c"]
    h = register(owner, body)
    salt = store.holdout_arrays(h.id).salt
    assert h.response["fingerprint"] == _documented(salt, body["ids"], body["y_true"])


def test_integer_ids_and_numeric_classes(owner: Any, store: Any) -> None:
    body = {"name": "n", "task": "binary", "ids": [10, 2, 33], "y_true": [0, 1, 1]}
    body["policy"] = TINY_POLICY
    h = register(owner, body)
    salt = store.holdout_arrays(h.id).salt
    assert h.response["fingerprint"] == _documented(salt, ["10", "2", "33"], ["0", "1", "1"])


def test_encoder_matches_its_documentation() -> None:
    ids = ["a", "ß", "3"]
    texts = canonical_label_texts("regression", [1.0, 0.1, -2])  # type: ignore[arg-type]
    assert texts == ["1.0", "0.1", "-2.0"]
    assert canonical_encoding(ids, texts) == "a\x1f1.0\x1eß\x1f0.1\x1e3\x1f-2.0\x1e".encode()
    salt = bytes(range(32))
    assert fingerprint(salt, ids, texts) == _documented(salt, ids, texts)
    assert canonical_label_texts("binary", [1, 0], ["no", "yes"]) == ["yes", "no"]  # type: ignore[arg-type]
