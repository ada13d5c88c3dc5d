"""The store: exact blobs, uniqueness kept by the database, one engine per process."""

from __future__ import annotations

import multiprocessing
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa

from service.store import (
    DuplicateHoldoutNameError,
    NewHoldout,
    Store,
    decode_array,
    encode_array,
    schema,
)


def test_blobs_round_trip_exactly() -> None:
    rng = np.random.default_rng(0)
    floats = rng.normal(size=1000) * 10.0 ** rng.integers(-300, 300, size=1000)
    floats[:3] = [0.0, -0.0, 5e-324]
    out = decode_array(encode_array(floats))
    assert out.dtype == np.float64 and out.tobytes() == floats.tobytes()
    ids = np.array(["a", "ß", "東京", "", "x" * 300], dtype=object)
    assert decode_array(encode_array(ids)).tolist() == ids.tolist()
    fixed = np.array(["r1", "r22"])
    assert decode_array(encode_array(fixed)).tolist() == ["r1", "r22"]
    ints = np.arange(5, dtype=np.int32)
    np.testing.assert_array_equal(decode_array(encode_array(ints)), ints)


def _new(name: str, owner: str = "group:t") -> NewHoldout:
    return NewHoldout(
        owner=owner,
        name=name,
        task="regression",
        classes=None,
        policy={"primary_metric": "rmse", "groups": None},
        created_by="tok_x",
        ids=np.array(["a", "b"]),
        labels=np.array([1.0, 2.0]),
        salt=b"s" * 32,
        fingerprint="0" * 64,
    )


def test_the_database_refuses_a_second_name(store: Store) -> None:
    store.insert_holdout(_new("h"))
    with pytest.raises(DuplicateHoldoutNameError):
        store.insert_holdout(_new("h"))
    store.insert_holdout(_new("h", owner="group:other"))
    with store.engine.connect() as conn:
        assert conn.execute(sa.select(sa.func.count()).select_from(schema.holdouts)).scalar() == 2
        # the failed insert left no sealed data behind
        assert (
            conn.execute(sa.select(sa.func.count()).select_from(schema.holdout_data)).scalar() == 2
        )


def test_concurrent_registrations_make_one_holdout(owner: Any) -> None:
    from apidata import regression_body

    body = regression_body("race")
    with ThreadPoolExecutor(max_workers=4) as pool:
        results = list(pool.map(lambda _: owner.post("/v1/holdouts", json=body), range(4)))
    statuses = sorted(r.status_code for r in results)
    assert statuses.count(201) == 1 and set(statuses) <= {200, 201}
    assert len({r.get_json()["id"] for r in results}) == 1


def _child(store: Store, parent_engine_id: int, queue: Any) -> None:
    engine = store.engine
    store.ping()
    queue.put((id(engine) != parent_engine_id, len(store.list_tokens())))


def test_a_forked_process_gets_its_own_engine(store: Store) -> None:
    store.create_token("admin")
    parent_engine = store.engine
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    child = ctx.Process(target=_child, args=(store, id(parent_engine), queue))
    child.start()
    fresh, n_tokens = queue.get(timeout=30)
    child.join(timeout=30)
    assert child.exitcode == 0 and fresh and n_tokens == 1
    assert store.engine is parent_engine and os.getpid() == store._pid
    store.ping()  # the parent's pool still works


def test_nothing_connects_before_first_use(tmp_path: Any) -> None:
    store = Store(f"sqlite:///{tmp_path / 'lazy.db'}")
    assert store._engine is None and not (tmp_path / "lazy.db").exists()
    store.init_schema()
    assert (tmp_path / "lazy.db").exists()
    store.dispose()


def test_holdout_ids_decode_to_fixed_width_text_when_compact() -> None:
    from service.store import decode_text

    ids = np.array(["r1", "row-22", "é"], dtype=object)
    out = decode_text(encode_array(ids))
    assert out.dtype.kind == "U" and out.tolist() == ids.tolist()
    with_nul = np.array(["a", "b\x00"], dtype=object)
    assert decode_text(encode_array(with_nul)).tolist() == with_nul.tolist()
    one_long = np.array(["x" * 100_000] + [str(i) for i in range(2000)], dtype=object)
    out = decode_text(encode_array(one_long))
    assert out.dtype == object and out.tolist() == one_long.tolist()
