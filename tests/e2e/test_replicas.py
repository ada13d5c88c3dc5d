"""Two gunicorn replicas on one PostgreSQL: concurrent load, a killed replica, a restarted database.

Real processes on loopback (``replicas.py``): a PostgreSQL cluster of this module's own (so
restarting it disturbs no other test), two gunicorn replicas on one database, clients that
spread requests over them round-robin. Every loop has a fixed count and a deadline; every
request a timeout. Predictions are seeded random arrays: the numbers themselves are checked
elsewhere (tests/scoring against scikit-learn); here the stored results must equal the
answers the API gave, field for field. References: RFC 9457 (problem details), RFC 9110
section 15.6.4 (503 Service Unavailable), RFC 6585 (429 with Retry-After), the IETF HTTPAPI
draft "The Idempotency-Key HTTP Header Field".

What is checked:

- many groups submitting at once to both replicas under a daily quota: every 201 stored
  exactly once (database and API listing agree with the answers), no group past its quota,
  the quota counter equal to what is stored, each worker decoding the holdout's labels at
  most once (``/metrics``: label-cache misses); an Idempotency-Key sent to both replicas at
  the same moment gives one stored submission and the same answer from both; the same
  holdout name registered on both replicas at once gives one holdout (identical content:
  201 and 200 with one id; different content: 201 and the documented 409);
- ``kill -9`` of one replica's process group in the middle of keyed load (the client fails
  over to the other replica with the same key): every acknowledged submission is stored
  once with its full result (report, per-row losses, both slice reports, guard outcome),
  nothing is half stored (SQL), quota counters match, the surviving replica keeps answering;
- PostgreSQL stopped and started during load: while it is down every request is answered
  with a 503 problem+json (no 500, no request without an answer within the client's
  timeout), and afterwards the same worker processes answer 201 again with no manual step.
"""

from __future__ import annotations

import itertools
import threading
import time
import zlib
from collections import Counter
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
import sqlalchemy as sa
from replicas import (
    Answer,
    PostgresCluster,
    PostgresUnavailable,
    Replica,
    RoundRobin,
    incomplete_submissions,
    label_cache_counts,
    prepare_database,
    run_bounded,
    running_replicas,
    throwaway_postgres,
)

from service.store import Store, schema

pytestmark = [pytest.mark.postgres, pytest.mark.slow]

N_ROWS = 300  # feedback slice 90 rows, reserve 210 (default feedback_fraction 0.3)
N_SEEDS = 3
TIMEOUT = 30.0  # seconds any one request may take before it counts as unanswered
PROBLEM = "application/problem+json"
# Scoring sections of a submission's view; the stored report must hold the same values.
SECTIONS = ("scores", "intervals", "seed_spread", "ensemble", "bias_variance", "flags")
_names = itertools.count()


@pytest.fixture(scope="module")
def cluster() -> Iterator[PostgresCluster]:
    try:
        manager = throwaway_postgres()
        pg = manager.__enter__()
    except PostgresUnavailable as exc:
        pytest.skip(str(exc))
    try:
        yield pg
    finally:
        manager.__exit__(None, None, None)


@dataclass
class Deployment:
    """Two replicas on one fresh database, with an owner token and submitter groups."""

    url: str
    replicas: list[Replica]
    balancer: RoundRobin
    owner: dict[str, str]  # Authorization header
    groups: dict[str, dict[str, str]]  # group name -> Authorization header

    def db(self, query: Any) -> list[Any]:
        engine = sa.create_engine(self.url)
        try:
            with engine.connect() as conn:
                return list(conn.execute(query))
        finally:
            engine.dispose()


@contextmanager
def deployment(
    cluster: PostgresCluster, workdir: Path, *, n_groups: int, workers: int
) -> Iterator[Deployment]:
    url = cluster.create_database(f"replicas_{next(_names)}")
    prepare_database(url)
    store = Store(url)
    try:
        owner = store.create_token("owner", "lab")[1]
        groups = {
            f"g{k}": store.create_token("submitter", f"g{k}")[1] for k in range(n_groups)
        }
    finally:
        store.dispose()
    with running_replicas(workdir, url, count=2, workers=workers) as replicas:
        yield Deployment(
            url,
            replicas,
            RoundRobin([r.base for r in replicas], timeout=TIMEOUT),
            {"Authorization": f"Bearer {owner}"},
            {g: {"Authorization": f"Bearer {t}"} for g, t in groups.items()},
        )


@pytest.fixture(scope="module")
def pair(
    cluster: PostgresCluster, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Deployment]:
    """One deployment shared by the tests that leave both replicas and the database up."""
    with deployment(cluster, tmp_path_factory.mktemp("pair"), n_groups=6, workers=2) as dep:
        yield dep


def _labels(name: str) -> tuple[list[str], np.ndarray]:
    rng = np.random.default_rng(zlib.crc32(name.encode()))
    return _ids(), rng.normal(size=N_ROWS) * 10.0


def _ids() -> list[str]:
    return [f"row-{i:04d}" for i in range(N_ROWS)]


def _register(dep: Deployment, name: str, policy: dict[str, Any]) -> tuple[str, np.ndarray]:
    ids, y = _labels(name)
    body = {"name": name, "task": "regression", "ids": ids, "y_true": y.tolist(), "policy": policy}
    answer = dep.balancer.send("POST", "/v1/holdouts", json=body, headers=dep.owner)
    assert answer.status == 201, answer.body
    return answer.body["id"], y


def _submission(y: np.ndarray, seed: tuple[int, ...], model: str) -> bytes:
    """A JSON submission: seeded noisy predictions, ids in reverse order."""
    ids = _ids()
    rng = np.random.default_rng(seed)
    predictions = y + rng.normal(scale=rng.uniform(1.0, 5.0), size=(N_SEEDS, N_ROWS))
    return orjson.dumps(
        {"model": model, "ids": ids[::-1], "predictions": predictions[:, ::-1].tolist()}
    )


def _post_submission(
    dep: Deployment,
    holdout: str,
    group: str,
    body: bytes,
    *,
    key: str | None = None,
    base: str | None = None,
    failover: bool = False,
) -> Answer:
    headers = {**dep.groups[group], "Content-Type": "application/json"}
    if key is not None:
        headers["Idempotency-Key"] = key
    path = f"/v1/holdouts/{holdout}/submissions"
    if base is not None:
        return dep.balancer.send_to(base, "POST", path, data=body, headers=headers)
    return dep.balancer.send("POST", path, data=body, headers=headers, failover=failover)


def _stored(dep: Deployment, holdout: str) -> dict[str, Any]:
    """Every submission of a holdout as the database holds it: id -> row with reports."""
    s, sl = schema.submissions, schema.submission_slices
    rows = dep.db(sa.select(s).where(s.c.holdout_id == holdout))
    slices = dep.db(
        sa.select(sl).join(s, s.c.id == sl.c.submission_id).where(s.c.holdout_id == holdout)
    )
    out = {row.id: {"row": row, "report": orjson.loads(row.report), "slices": {}} for row in rows}
    for part in slices:
        out[part.submission_id]["slices"][part.slice] = (
            orjson.loads(part.report), part.primary_value
        )
    return out


def _assert_same_result(view: dict[str, Any], report: dict[str, Any]) -> None:
    """A view (``guard: none``: exact numbers, submitter redaction drops some metrics) holds
    the stored report's values, key for key."""
    for section in SECTIONS:
        shown, kept = view[section], report[section]
        if isinstance(shown, dict):
            assert shown, section
            for key, value in shown.items():
                assert value == kept[key], (section, key)
        else:
            assert shown == kept, section


def _assert_complete(dep: Deployment, holdouts: list[str]) -> None:
    missing = incomplete_submissions(dep.url, holdouts)
    assert missing == {"row_losses": [], "guard": [], "slices": []}, missing


def _assert_problem_503(answer: Answer) -> None:
    assert answer.status == 503, (answer.base, answer.status, answer.error, answer.body)
    assert answer.content_type.startswith(PROBLEM), answer.content_type
    assert answer.body["status"] == 503
    assert {"type", "title", "detail"} <= set(answer.body)


# ---------------------------------------------------------------------------------------


def test_many_groups_on_both_replicas_store_each_accepted_submission_once(
    pair: Deployment,
) -> None:
    quota, attempts = 3, 5
    holdout, y = _register(pair, "quota-load", {"guard": "none", "daily_quota": quota})
    jobs: list[Callable[[], tuple[str, str, Answer]]] = []
    for g, group in enumerate(pair.groups):
        for a in range(attempts):
            body = _submission(y, (g, a), f"{group}-m{a}")

            def job(group: str = group, body: bytes = body, model: str = f"{group}-m{a}"):
                return group, model, _post_submission(pair, holdout, group, body)

            jobs.append(job)
    bases = [r.base for r in pair.replicas]
    # A labelled counter has no sample before its first count: none yet is zero.
    cache_before = label_cache_counts(bases) or (0.0, 0.0)
    results = run_bounded(jobs, clients=10, deadline=240)
    cache_after = label_cache_counts(bases)

    accepted: dict[str, tuple[str, str, Answer]] = {}
    for group, model, answer in results:
        assert answer.status in (201, 429), (answer.status, answer.error, answer.body)
        if answer.status == 429:
            assert answer.content_type.startswith(PROBLEM)
            assert int(answer.headers["Retry-After"]) >= 1
        else:
            accepted[answer.body["id"]] = (group, model, answer)
    per_group = Counter(group for group, _, _ in accepted.values())
    assert per_group == {group: quota for group in pair.groups}  # RFC 6585: the rest got 429
    assert {a.base for _, _, a in accepted.values()} == {r.base for r in pair.replicas}

    # Stored exactly once: the database holds the accepted submissions and nothing else.
    stored = _stored(pair, holdout)
    assert set(stored) == set(accepted)
    assert sorted(s["row"].model for s in stored.values()) == sorted(
        m for _, m, _ in accepted.values()
    )
    gs = schema.group_states
    used = dict(
        pair.db(sa.select(gs.c.group_name, gs.c.quota_used).where(gs.c.holdout_id == holdout))
    )
    assert used == {group: quota for group in pair.groups}
    _assert_complete(pair, [holdout])
    # The API's listing, from each replica, says the same.
    for replica in pair.replicas:
        listing = pair.balancer.send_to(
            replica.base, "GET", f"/v1/holdouts/{holdout}/submissions", headers=pair.owner
        )
        assert listing.status == 200
        assert listing.body["total"] == len(accepted)
        assert {s["id"] for s in listing.body["submissions"]} == set(accepted)
    # The labels were decoded once per worker process, not once per request (/metrics:
    # every accepted submission looked them up; misses at most one per worker).
    assert cache_after is not None, "no label-cache counter in /metrics"
    hits, misses = cache_after[0] - cache_before[0], cache_after[1] - cache_before[1]
    assert misses <= sum(len(r.worker_pids()) for r in pair.replicas)
    assert hits + misses >= len(accepted)
    # Stored results equal the answers: the submitter's (feedback slice) and the owner's.
    for sid, (_, _, answer) in accepted.items():
        feedback, feedback_value = stored[sid]["slices"]["feedback"]
        assert answer.body["primary_value"] == feedback_value
        _assert_same_result(answer.body, feedback)
        shown = pair.balancer.send("GET", f"/v1/submissions/{sid}", headers=pair.owner)
        assert shown.status == 200
        assert shown.body["primary_value"] == stored[sid]["row"].primary_value
        _assert_same_result(shown.body, stored[sid]["report"])
        _assert_same_result(shown.body["views"]["reserve"], stored[sid]["slices"]["reserve"][0])


def test_idempotency_key_sent_to_both_replicas_at_once_stores_one_submission(
    pair: Deployment,
) -> None:
    holdout, y = _register(pair, "keys-across", {"guard": "none"})
    keys = [f"across-{k}" for k in range(4)]
    bodies = {key: _submission(y, (100, k), f"keyed-{k}") for k, key in enumerate(keys)}
    a, b = pair.replicas
    barrier = threading.Barrier(2 * len(keys))

    def send(key: str, base: str) -> tuple[str, Answer]:
        barrier.wait(timeout=60)
        return key, _post_submission(pair, holdout, "g0", bodies[key], key=key, base=base)

    jobs = [
        (lambda key=key, base=base: send(key, base))
        for key in keys
        for base in (a.base, b.base)
    ]
    results = run_bounded(jobs, clients=len(jobs), deadline=120)
    by_key: dict[str, list[Answer]] = {key: [] for key in keys}
    for key, answer in results:
        by_key[key].append(answer)
    for key, answers in by_key.items():
        assert [x.status for x in answers] == [201, 201], [(x.status, x.body) for x in answers]
        assert {x.base for x in answers} == {a.base, b.base}
        assert len({x.body["id"] for x in answers}) == 1, key  # one submission per key
        replayed = [x.headers.get("Idempotent-Replayed") for x in answers]
        assert sorted(replayed, key=str) == sorted([None, "true"], key=str), replayed
        assert answers[0].body == answers[1].body  # the replay is the first answer
    stored = _stored(pair, holdout)
    assert set(stored) == {answers[0].body["id"] for answers in by_key.values()}
    ik = schema.idempotency_keys
    rows = pair.db(sa.select(ik.c.key, ik.c.submission_id).where(ik.c.holdout_id == holdout))
    assert sorted(rows) == sorted((key, by_key[key][0].body["id"]) for key in keys)
    _assert_complete(pair, [holdout])


def test_one_holdout_name_registered_on_both_replicas_at_once(pair: Deployment) -> None:
    a, b = pair.replicas
    rounds = 3
    h = schema.holdouts

    def race(name: str, second_labels: np.ndarray) -> list[Answer]:
        ids, y = _labels(name)
        bodies = [
            {"name": name, "task": "regression", "ids": ids, "y_true": labels.tolist()}
            for labels in (y, second_labels)
        ]
        barrier = threading.Barrier(2)

        def send(base: str, body: dict[str, Any]) -> Answer:
            barrier.wait(timeout=60)
            return pair.balancer.send_to(base, "POST", "/v1/holdouts", json=body,
                                         headers=pair.owner)

        return run_bounded(
            [lambda: send(a.base, bodies[0]), lambda: send(b.base, bodies[1])],
            clients=2, deadline=120,
        )

    for r in range(rounds):
        # Identical content: one holdout; the later request gets it back with 200.
        name = f"same-{r}"
        answers = race(name, _labels(name)[1])
        assert sorted(x.status for x in answers) == [200, 201], [x.body for x in answers]
        assert answers[0].body == answers[1].body
        rows = pair.db(sa.select(h.c.id).where(h.c.name == name))
        assert [row.id for row in rows] == [answers[0].body["id"]]

        # Different labels under one name: one holdout; the other request gets the 409.
        name = f"differ-{r}"
        answers = race(name, _labels(name)[1] + 1.0)
        by_status = {x.status: x for x in answers}
        assert sorted(by_status) == [201, 409], [x.body for x in answers]
        conflict = by_status[409]
        assert conflict.content_type.startswith(PROBLEM)
        assert conflict.body["status"] == 409
        assert conflict.body["errors"], conflict.body
        rows = pair.db(sa.select(h.c.id, h.c.fingerprint).where(h.c.name == name))
        winner = by_status[201].body
        assert [tuple(row) for row in rows] == [(winner["id"], winner["fingerprint"])]


def test_kill_9_of_one_replica_during_load_loses_nothing_acknowledged(
    cluster: PostgresCluster, tmp_path: Path
) -> None:
    per_group, kill_after = 12, 10
    with deployment(cluster, tmp_path, n_groups=4, workers=2) as dep:
        victim, survivor = dep.replicas
        victim_workers = victim.worker_pids()
        assert victim_workers
        holdout, y = _register(dep, "kill-load", {"guard": "none", "daily_quota": 1000})
        acked = threading.Semaphore(0)
        killed = threading.Event()

        def job(group: str, k: int) -> tuple[str, str, Answer, bool]:
            key = f"{group}-{k}"
            body = _submission(y, (int(group[1:]), k, 7), key)
            sent_after_kill = killed.is_set()
            answer = _post_submission(dep, holdout, group, body, key=key, failover=True)
            if answer.status == 201:
                acked.release()
            return group, key, answer, sent_after_kill

        def killer() -> None:
            for _ in range(kill_after):
                if not acked.acquire(timeout=120):
                    return
            victim.kill()
            killed.set()

        kill_thread = threading.Thread(target=killer)
        kill_thread.start()
        jobs = [
            (lambda g=group, k=k: job(g, k)) for k in range(per_group) for group in dep.groups
        ]
        try:
            results = run_bounded(jobs, clients=8, deadline=240)
        finally:
            kill_thread.join(timeout=150)
        assert killed.is_set(), "the replica was not killed during the load"
        assert not victim.group_alive()  # master and workers: the whole process group

        # Every request was answered 201 (by the survivor after the kill, retrying with
        # the same key when the victim did not answer), and some came after the kill.
        assert [a.status for _, _, a, _ in results] == [201] * len(jobs), [
            (a.status, a.error, a.body) for _, _, a, _ in results if a.status != 201
        ]
        before = [a for _, _, a, sent_after in results if not sent_after]
        after = [a for _, _, a, sent_after in results if sent_after]
        assert after and all(a.base == survivor.base for a in after)
        assert any(base == victim.base for a in after for base, _ in a.attempts)
        # Requests the victim held when it died were retried on the survivor with their key.
        assert any(base == victim.base for a in before for base, _ in a.attempts)

        # Nothing acknowledged is lost, nothing is stored twice, nothing half stored.
        acked_ids = {key: a.body["id"] for _, key, a, _ in results}
        stored = _stored(dep, holdout)
        assert set(stored) == set(acked_ids.values())
        assert len(stored) == len(jobs)
        ik = schema.idempotency_keys
        rows = dep.db(sa.select(ik.c.key, ik.c.submission_id).where(ik.c.holdout_id == holdout))
        assert dict(rows) == acked_ids
        _assert_complete(dep, [holdout])
        gs = schema.group_states
        used = dict(dep.db(
            sa.select(gs.c.group_name, gs.c.quota_used).where(gs.c.holdout_id == holdout)
        ))
        assert used == Counter(s["row"].group_name for s in stored.values())
        # Complete results: what was answered is what is stored, read back via the survivor.
        for _, _, answer, _ in results:
            sid = answer.body["id"]
            feedback, value = stored[sid]["slices"]["feedback"]
            assert answer.body["primary_value"] == value
            _assert_same_result(answer.body, feedback)
            shown = dep.balancer.send_to(
                survivor.base, "GET", f"/v1/submissions/{sid}", headers=dep.owner
            )
            assert shown.status == 200
            _assert_same_result(shown.body, stored[sid]["report"])

        # The survivor keeps answering: reads and a new submission.
        ready = dep.balancer.send_to(survivor.base, "GET", "/readyz")
        assert ready.status == 200
        last = _post_submission(dep, holdout, "g0", _submission(y, (9, 9), "after"),
                                base=survivor.base)
        assert last.status == 201, last.body


def test_postgres_restart_during_load_gives_503_then_recovers(
    cluster: PostgresCluster, pair: Deployment
) -> None:
    # The shared replicas stay up while their database restarts: they must recover.
    dep = pair
    holdout, y = _register(dep, "restart-load", {"guard": "none"})
    workers_before = [r.worker_pids() for r in dep.replicas]
    stop_load = threading.Event()
    acked = threading.Semaphore(0)
    phase = {"now": "before"}  # before -> down -> after: when each answer came
    seeds = itertools.count()

    def client(group: str) -> list[tuple[str, Answer]]:
        out = []
        for _ in range(400):  # bounded; stops early once the check is over
            if stop_load.is_set():
                break
            k = next(seeds)
            sent = phase["now"]
            answer = _post_submission(
                dep, holdout, group, _submission(y, (50, k), f"load-{k}"), key=f"load-{k}"
            )
            out.append((sent if sent == phase["now"] else "changed", answer))
            if answer.status == 201:
                acked.release()
            time.sleep(0.05)
        return out

    load: dict[str, Any] = {}

    def run_load() -> None:
        load["results"] = run_bounded(
            [lambda g=g: client(g) for g in ("g0", "g1", "g0", "g1")],
            clients=4,
            deadline=240,
        )

    load_thread = threading.Thread(target=run_load)
    load_thread.start()
    try:
        for _ in range(5):
            assert acked.acquire(timeout=120), "no submission accepted before the restart"
        cluster.stop("fast")
        phase["now"] = "down"
        # While PostgreSQL is down, every replica answers 503 problem+json at once.
        for replica in dep.replicas:
            body = _submission(y, (60, replica.pid), "probe")
            _assert_problem_503(_post_submission(dep, holdout, "g1", body, base=replica.base))
            path = f"/v1/holdouts/{holdout}/submissions"
            _assert_problem_503(
                dep.balancer.send_to(replica.base, "GET", path, headers=dep.owner)
            )
            _assert_problem_503(dep.balancer.send_to(replica.base, "GET", "/readyz"))
        time.sleep(1.0)  # the load keeps running against the stopped database
        cluster.start()
        phase["now"] = "after"
        # Back without a manual step: each replica accepts a submission again.
        for replica in dep.replicas:
            answer = None
            for attempt in range(50):  # bounded: at most 50 tries, 0.2 s apart
                body = _submission(y, (70, replica.pid, attempt), "recovered")
                answer = _post_submission(dep, holdout, "g0", body, base=replica.base)
                if answer.status == 201:
                    break
                _assert_problem_503(answer)
                time.sleep(0.2)
            assert answer is not None and answer.status == 201, answer.body
        for _ in range(4):  # and the load's own requests succeed after it
            assert acked.acquire(timeout=120), "the load did not recover"
    finally:
        stop_load.set()
        if not cluster.running:
            cluster.start()
        load_thread.join(timeout=260)
    assert not load_thread.is_alive()
    answers = [pair for results in load["results"] for pair in results]
    statuses = Counter(a.status for _, a in answers)
    assert set(statuses) <= {201, 503}, statuses  # never a 500, never unanswered
    assert statuses[503] >= 1, statuses  # the load saw the outage...
    for _, answer in answers:
        if answer.status == 503:
            _assert_problem_503(answer)
    after = [a.status for when, a in answers if when == "after"]
    assert 201 in after, statuses  # ...and went on succeeding after it
    assert [r.worker_pids() for r in dep.replicas] == workers_before  # same processes

    # Every acknowledged submission is stored with all its parts.
    acked_ids = {a.body["id"] for _, a in answers if a.status == 201}
    stored = _stored(dep, holdout)
    assert acked_ids <= set(stored)
    _assert_complete(dep, [holdout])
    for _, answer in answers:
        if answer.status == 201:
            feedback, value = stored[answer.body["id"]]["slices"]["feedback"]
            assert answer.body["primary_value"] == value
            _assert_same_result(answer.body, feedback)
