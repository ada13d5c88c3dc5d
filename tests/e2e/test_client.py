"""``service.client`` against a real gunicorn process on a loopback port (SQLite).

The holdout is a split of scikit-learn's ``load_diabetes``; submissions are linear models
fitted on bootstrap draws of the other rows, sent as one file with every seed, as per-seed
files combined by the client, and with training rows (the JSON path). Returned scores are
checked against ``service.scoring.regression_report`` on the same arrays and MSE against
``sklearn.metrics.mean_squared_error``. Every wait is bounded (server start as in
test_gunicorn.py).
"""

from __future__ import annotations

import gzip
import math
from collections.abc import Iterator
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.csv  # noqa: F401 (pa.csv.write_csv)
import pyarrow.parquet as pq
import pytest
from gunicorn_server import free_port, running_gunicorn
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.client import HeldoutClient, HeldoutConnectionError, HeldoutError
from service.scoring import (
    ScoringOptions,
    catalog,
    classification_report,
    regression_report,
)
from service.scoring.split import feedback_mask
from service.store import Store

RESAMPLES = 200  # the server's bootstrap resamples (HELDOUT_BOOTSTRAP_RESAMPLES)


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    """One gunicorn server for the module, with an owner and a submitter token."""
    tmp = tmp_path_factory.mktemp("client-server")
    settings = {
        "HELDOUT_DATABASE_URL": f"sqlite:///{tmp / 'heldout.sqlite3'}",
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": str(RESAMPLES),
    }

    # Tokens through the store, as `heldout tokens create` makes them (that command itself
    # is tested in tests/api/test_cli.py and test_gunicorn.py); in-process to save two
    # interpreter starts.
    store = Store(settings["HELDOUT_DATABASE_URL"])
    try:
        store.init_schema()
        tokens = {
            "owner": store.create_token("owner", "lab", "client test owner")[1],
            "submitter": store.create_token("submitter", "g1", "client test submitter")[1],
        }
    finally:
        store.dispose()
    with running_gunicorn(tmp, settings) as running:
        yield {"base": running.base, "tokens": tokens, "tmp": tmp}


@pytest.fixture(scope="module")
def data() -> dict[str, Any]:
    """Holdout rows and five bootstrap fits of two linear models (K = 5 seeds each)."""
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_ho, y_tr, y_ho = train_test_split(X, y, test_size=150, random_state=7)
    rng = np.random.default_rng(2026)
    fits: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name, make in (("linear", LinearRegression), ("ridge", lambda: Ridge(alpha=0.5))):
        held, train = [], []
        for _ in range(5):
            idx = rng.integers(0, y_tr.size, y_tr.size)
            model = make().fit(X_tr[idx], y_tr[idx])
            held.append(model.predict(X_ho))
            train.append(model.predict(X_tr))
        fits[name] = (np.array(held), np.array(train))
    ids = np.array([f"p{i:04d}" for i in range(y_ho.size)])
    return {"ids": ids, "y": y_ho, "y_train": y_tr, "fits": fits}


@pytest.fixture(scope="module")
def clients(server) -> dict[str, HeldoutClient]:
    base, tokens = server["base"], server["tokens"]
    made = {role: HeldoutClient(base, token, timeout=60) for role, token in tokens.items()}
    yield made
    for client in made.values():
        client.close()


@pytest.fixture(scope="module")
def holdout(server, clients, data) -> dict[str, Any]:
    path = server["tmp"] / "holdout.csv"
    lines = ["id,y_true"] + [f"{i},{v!r}" for i, v in zip(data["ids"], data["y"].tolist(),
                                                          strict=True)]
    path.write_text("\n".join(lines) + "\n")
    policy = {"primary_metric": "rmse", "guard": "none"}
    created = clients["owner"].create_holdout(
        path, name="diabetes-client", task="regression", policy=policy, progress=False
    )
    again = clients["owner"].create_holdout(
        path, name="diabetes-client", task="regression", policy=policy, progress=False
    )
    assert again["id"] == created["id"]  # the same content registers once
    return created


def _report(y: np.ndarray, preds: np.ndarray, **train: Any) -> Any:
    return regression_report(y, preds, options=ScoringOptions(n_resamples=RESAMPLES), **train)


def _assert_scores(returned: dict[str, Any], expected: Any, *, owner: bool) -> None:
    # submitters never see a metric that is one row's residual
    hidden = set() if owner else set(catalog.REVEALS_ROW)
    assert set(returned) == set(expected.scores) - hidden
    for name, value in expected.scores.items():
        if name in hidden:
            continue
        if value is None or not math.isfinite(value):
            assert returned[name] is None
        else:
            assert returned[name] == pytest.approx(value, rel=1e-12, abs=1e-12), name


def _feedback(clients, holdout) -> np.ndarray:
    meta = clients["owner"].holdout(holdout["id"])
    return feedback_mask(
        meta["n_rows"],
        feedback_fraction=meta["policy"]["feedback_fraction"],
        seed=int(meta["split"]["seed"]),
    )


def _check_both_views(clients, holdout, result, y, preds, **train) -> None:
    """The submitter's answer is the feedback slice, the owner's view the full set."""
    mask = _feedback(clients, holdout)
    assert result["slice"] == "feedback"
    _assert_scores(result["scores"], _report(y[mask], preds[:, mask]), owner=False)
    full = clients["owner"].submission(result["id"])
    assert full["slice"] == "full"
    expected = _report(y, preds, **train)
    _assert_scores(full["scores"], expected, owner=True)
    # reference: sklearn.metrics.mean_squared_error, averaged over the seeds
    assert full["scores"]["mse"] == pytest.approx(
        np.mean([mean_squared_error(y, p) for p in preds]), rel=1e-12
    )
    assert full["bias_variance"]["squared"]["variance"] == pytest.approx(
        expected.bias_variance["squared"].variance, rel=1e-12
    )


def test_one_file_with_every_seed(server, clients, holdout, data, capsys) -> None:
    ids, y = data["ids"], data["y"]
    held, _ = data["fits"]["linear"]
    order = np.random.default_rng(1).permutation(ids.size)  # any row order
    path = server["tmp"] / "linear.csv"
    table = pa.table(
        {"id": ids[order], **{f"pred.{k}": held[k, order] for k in range(held.shape[0])}}
    )
    pa.csv.write_csv(table, path)
    assert clients["submitter"].ids(holdout["id"]) == sorted(ids.tolist())
    result = clients["submitter"].submit(holdout["id"], path, model="linear")
    assert result["n_seeds"] == 5 and result["seeds"] == ["0", "1", "2", "3", "4"]
    _check_both_views(clients, holdout, result, y, held)
    assert capsys.readouterr().err == ""  # progress=None, and stdout is not a terminal
    assert clients["submitter"].submission(result["id"])["id"] == result["id"]
    standings = clients["submitter"].standings(holdout["id"])
    assert [e["group"] for e in standings["entries"]] == ["g1"]


def test_per_seed_files_are_combined_by_id(server, clients, holdout, data, capsys) -> None:
    ids, y = data["ids"], data["y"]
    held, _ = data["fits"]["ridge"]
    rng = np.random.default_rng(2)
    paths = []
    for k in range(held.shape[0]):
        order = rng.permutation(ids.size)  # each file in its own row order
        path = server["tmp"] / f"ridge.seed{k}.parquet"
        pq.write_table(pa.table({"id": ids[order], "pred": held[k, order]}), path)
        paths.append(path)
    result = clients["submitter"].submit(
        holdout["id"], paths, model="ridge", sweep=("alpha", 0.5), progress=False
    )
    # seed labels: the file names, dots replaced (a seed label has no dots)
    assert result["seeds"] == [f"ridge_seed{k}" for k in range(5)]
    assert result["sweep"] == {"name": "alpha", "complexity": 0.5}
    _check_both_views(clients, holdout, result, y, held)
    assert capsys.readouterr().err == ""


def test_training_rows_go_in_json_with_a_forced_progress_bar(
    server, clients, holdout, data, capsys
) -> None:
    ids, y, y_train = data["ids"], data["y"], data["y_train"]
    held, train = data["fits"]["linear"]
    paths = []
    for k in range(2):  # two seeds, one CSV file each
        path = server["tmp"] / f"s{k}.csv"
        pa.csv.write_csv(pa.table({"id": ids[::-1], "pred": held[k, ::-1]}), path)
        paths.append(path)
    train_path = server["tmp"] / "train.csv"
    # columns in the opposite order of the files: matched by seed label, not position
    pa.csv.write_csv(pa.table({"y_true": y_train, "pred.s1": train[1], "pred.s0": train[0]}),
                     train_path)
    result = clients["submitter"].submit(
        holdout["id"], paths, model="linear-2", train=train_path, progress=True
    )
    assert result["seeds"] == ["s0", "s1"]
    _check_both_views(
        clients, holdout, result, y, held[:2],
        train_y_true=y_train, train_predictions=train[:2],
    )
    full = clients["owner"].submission(result["id"])
    # reference: sklearn.metrics.mean_squared_error on the training rows, mean over seeds
    assert full["train_scores"]["mse"] == pytest.approx(
        np.mean([mean_squared_error(y_train, p) for p in train[:2]]), rel=1e-12
    )
    err = capsys.readouterr().err
    assert "upload s0.csv +1" in err and "100.0%" in err and err.endswith("\n")


def test_problems_arrive_as_heldout_errors(server, clients, holdout, data, monkeypatch) -> None:
    ids, held = data["ids"], data["fits"]["linear"][0]
    with pytest.raises(HeldoutError) as info:
        clients["owner"].create_holdout(
            server["tmp"] / "holdout.csv", name="bad-task", task="forecast", progress=False
        )
    err = info.value
    assert err.status == 422 and err.title and err.detail
    assert "task" in {e["field"] for e in err.errors}

    short = server["tmp"] / "short.parquet"  # one row missing
    pq.write_table(pa.table({"id": ids[1:], "pred": held[0, 1:]}), short)
    with pytest.raises(HeldoutError) as info:
        clients["submitter"].submit(holdout["id"], [short], model="short")
    assert info.value.status == 422
    (problem,) = info.value.errors
    assert problem["field"] in ("id", "ids") and problem["count"] == 1
    assert any(ids[0] in example for example in problem["examples"])

    with pytest.raises(HeldoutError) as info:
        HeldoutClient(server["base"], "not-a-token").holdout(holdout["id"])
    assert info.value.status == 401
    with pytest.raises(HeldoutError) as info:
        clients["submitter"].submission("no-such-submission")
    assert info.value.status == 404

    whole = server["tmp"] / "whole.parquet"  # this test's own accepted submission, so the
    pq.write_table(pa.table({"id": ids, "pred": held[0]}), whole)  # listing below never
    clients["submitter"].submit(holdout["id"], [whole], model="whole")  # depends on test order
    monkeypatch.setenv("HELDOUT_URL", server["base"])
    monkeypatch.setenv("HELDOUT_TOKEN", server["tokens"]["submitter"])
    with HeldoutClient.from_env() as from_env:
        listed = from_env.submissions(holdout["id"])
        assert listed["total"] >= 1 and len(listed["submissions"]) == listed["total"]
    monkeypatch.delenv("HELDOUT_TOKEN")
    with pytest.raises(ValueError, match="HELDOUT_TOKEN"):
        HeldoutClient.from_env()

    with pytest.raises(HeldoutConnectionError) as info:
        HeldoutClient(f"http://127.0.0.1:{free_port()}", "x", timeout=5).holdouts()
    assert info.value.status == 0 and isinstance(info.value, HeldoutError)

    other = server["tmp"] / "other.parquet"  # per-seed files with different ids
    pq.write_table(pa.table({"id": ids[:-1], "pred": held[1, :-1]}), other)
    full = server["tmp"] / "full.parquet"
    pq.write_table(pa.table({"id": ids, "pred": held[0]}), full)
    with pytest.raises(ValueError, match="1 missing"):
        clients["submitter"].submit(holdout["id"], [full, other], model="m", progress=False)
    with pytest.raises(ValueError, match="unknown table format"):
        clients["submitter"].submit(holdout["id"], [server["tmp"] / "preds.txt"], model="m")


def test_holdout_from_json_and_arrow_is_the_same_registration(server, clients, holdout, data):
    ids, y = data["ids"], data["y"]
    records = server["tmp"] / "holdout.json"
    records.write_bytes(
        orjson.dumps([{"id": i, "y_true": v} for i, v in zip(ids.tolist(), y.tolist(),
                                                             strict=True)])
    )
    policy = {"primary_metric": "rmse", "guard": "none"}
    owner = clients["owner"]
    from_json = owner.create_holdout(records, name="diabetes-client", task="regression",
                                     policy=policy)
    from_arrow = owner.create_holdout(pa.table({"id": ids, "y_true": y}),
                                      name="diabetes-client", task="regression", policy=policy)
    # identical content under the same name is the same holdout (README)
    assert from_json["id"] == from_arrow["id"] == holdout["id"]
    assert from_json["fingerprint"] == holdout["fingerprint"]
    assert holdout["id"] in {h["id"] for h in owner.holdouts()}


def test_gzip_csv_and_long_metadata_as_multipart(server, clients, holdout, data) -> None:
    ids, y = data["ids"], data["y"]
    held, _ = data["fits"]["ridge"]
    gz = server["tmp"] / "ridge.csv.gz"
    with gzip.open(gz, "wb") as sink:
        pa.csv.write_csv(pa.table({"id": ids, "pred": held[0]}), sink)
    result = clients["submitter"].submit(holdout["id"], [gz], model="ridge-gz")
    assert result["seeds"] == ["0"]
    _assert_scores(result["scores"], _report(y[_feedback(clients, holdout)],
                                             held[:1, _feedback(clients, holdout)]),
                   owner=False)
    # 200-character names of 4-byte characters: percent-encoded in a query string they pass
    # gunicorn's request-line limit (4094 bytes), so the client sends a multipart form
    long_model, long_sweep = "\U0001d52a" * 200, "\U0001d530" * 200
    table = server["tmp"] / "ridge2.parquet"
    pq.write_table(pa.table({"id": ids, "pred.a": held[1], "pred.b": held[2]}), table)
    result = clients["submitter"].submit(
        holdout["id"], table, model=long_model, sweep=(long_sweep, 2.0), idempotency_key="k-1"
    )
    assert result["model"] == long_model and result["seeds"] == ["a", "b"]
    assert result["sweep"] == {"name": long_sweep, "complexity": 2.0}


def test_classification_per_seed_files_with_probabilities_and_train(server, clients) -> None:
    X, y = load_breast_cancer(return_X_y=True)
    X_tr, X_ho, y_tr, y_ho = train_test_split(X, y, test_size=150, random_state=5, stratify=y)
    ids = np.array([f"c{i:03d}" for i in range(y_ho.size)])
    owner, submitter = clients["owner"], clients["submitter"]
    holdout = owner.create_holdout(
        pa.table({"id": ids, "y_true": y_ho}), name="cancer-client", task="binary",
        policy={"primary_metric": "log_loss", "guard": "none"},
    )
    assert holdout["classes"] == ["0", "1"]
    rng = np.random.default_rng(3)
    labels, probs, train_labels, train_probs, paths = [], [], [], [], []
    train_columns: dict[str, Any] = {"y_true": y_tr}
    for k in range(3):
        idx = rng.integers(0, y_tr.size, y_tr.size)
        model = make_pipeline(StandardScaler(), LogisticRegression(C=0.5, max_iter=2000))
        model.fit(X_tr[idx], y_tr[idx])
        q, q_train = model.predict_proba(X_ho), model.predict_proba(X_tr)
        labels.append(q.argmax(axis=1))
        probs.append(q)
        train_labels.append(q_train.argmax(axis=1))
        train_probs.append(q_train)
        path = server["tmp"] / f"cancer-{k}.csv"
        order = rng.permutation(ids.size)
        pa.csv.write_csv(
            pa.table({"id": ids[order], "pred": labels[k][order],
                      "prob.0": q[order, 0], "prob.1": q[order, 1]}),
            path,
        )
        paths.append(path)
        train_columns[f"pred.cancer-{k}"] = train_labels[k]
        train_columns[f"prob.cancer-{k}.0"] = q_train[:, 0]
        train_columns[f"prob.cancer-{k}.1"] = q_train[:, 1]
    expected = classification_report(
        y_ho, 2, labels=np.array(labels), probabilities=np.array(probs),
        options=ScoringOptions(n_resamples=RESAMPLES),
    )
    combined = submitter.submit(holdout["id"], paths, model="logistic", progress=False)
    assert combined["seeds"] == ["cancer-0", "cancer-1", "cancer-2"]
    _assert_scores(owner.submission(combined["id"])["scores"], expected, owner=True)
    # reference: sklearn.metrics.log_loss per seed, averaged over the seeds
    assert owner.submission(combined["id"])["scores"]["log_loss"] == pytest.approx(
        np.mean([log_loss(y_ho, q) for q in probs]), rel=1e-12
    )
    train_path = server["tmp"] / "cancer-train.parquet"
    pq.write_table(pa.table(train_columns), train_path)
    with_train = submitter.submit(holdout["id"], paths, model="logistic", train=train_path,
                                  progress=False)
    full = owner.submission(with_train["id"])
    _assert_scores(full["scores"], expected, owner=True)
    # reference: sklearn.metrics.accuracy_score on the training rows, averaged over seeds
    assert full["train_scores"]["accuracy"] == pytest.approx(
        np.mean([accuracy_score(y_tr, p) for p in train_labels]), rel=1e-12
    )
