"""The ``heldout`` client commands run as subprocesses against a real gunicorn server (SQLite).

The holdout is a split of scikit-learn's ``load_diabetes``; submissions are linear models
fitted on bootstrap draws of the other rows (five seeds) and, as a model that fails gates,
the training mean. Every exit status of ``submit`` / ``show`` is checked (0 pass, 1 fail,
3 warn, 1 for warn under ``--strict``, 2 for usage errors, unknown objects, a bad token and
an unreachable server); ``--json`` output is compared with the API's own GET of the same
object, and printed numbers with scikit-learn on the same arrays. Every wait is bounded.
"""

from __future__ import annotations

import errno
import json
import os
import pty
import re
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv  # noqa: F401 (pa.csv.write_csv)
import pytest
import requests
from gunicorn_server import free_port, running_gunicorn
from sklearn.datasets import load_diabetes
from sklearn.linear_model import LinearRegression
from sklearn.metrics import mean_squared_error
from sklearn.model_selection import train_test_split

from service.scoring.split import feedback_mask
from service.store import Store

RESAMPLES = 200
CLI = [sys.executable, "-m", "service.cli"]
RUN_TIMEOUT = 120


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    tmp = tmp_path_factory.mktemp("cli-server")
    settings = {
        "HELDOUT_DATABASE_URL": f"sqlite:///{tmp / 'heldout.sqlite3'}",
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": str(RESAMPLES),
    }
    # Tokens through the store, as `heldout tokens create` makes them (that command is
    # tested in tests/api/test_cli.py).
    store = Store(settings["HELDOUT_DATABASE_URL"])
    try:
        store.init_schema()
        tokens = {
            "owner": store.create_token("owner", "lab", "cli test owner")[1],
            "submitter": store.create_token("submitter", "g1", "cli test submitter")[1],
        }
    finally:
        store.dispose()
    with running_gunicorn(tmp, settings) as running:
        yield {"base": running.base, "tokens": tokens, "tmp": tmp}


def _environ(server: dict[str, Any], role: str | None, env: dict[str, str] | None) -> dict:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("HELDOUT_")}
    environ["HELDOUT_URL"] = server["base"]
    if role is not None:
        environ["HELDOUT_TOKEN"] = server["tokens"][role]
    environ.update(env or {})
    return environ


def heldout(
    server: dict[str, Any],
    *args: str,
    role: str | None = "submitter",
    stdout_tty: bool = False,
    env: dict[str, str] | None = None,
) -> subprocess.CompletedProcess[str]:
    """Run ``heldout ARGS`` with HELDOUT_URL and HELDOUT_TOKEN of ``role`` set."""
    environ = _environ(server, role, env)
    if not stdout_tty:
        return subprocess.run(
            CLI + list(args), env=environ, capture_output=True, text=True, timeout=RUN_TIMEOUT,
            cwd=server["tmp"],
        )
    # standard output a pseudo-terminal (as in an interactive shell), standard error a pipe
    main, child = pty.openpty()
    try:
        proc = subprocess.Popen(
            CLI + list(args), env=environ, stdout=child, stderr=subprocess.PIPE,
            cwd=server["tmp"],
        )
        os.close(child)
        chunks = []
        while True:
            try:
                block = os.read(main, 1 << 16)
            except OSError as exc:  # EIO: the child closed the terminal
                if exc.errno != errno.EIO:
                    raise
                break
            if not block:
                break
            chunks.append(block)
        _, err = proc.communicate(timeout=RUN_TIMEOUT)
    finally:
        os.close(main)
    out = b"".join(chunks).decode().replace("\r\n", "\n")
    return subprocess.CompletedProcess(proc.args, proc.returncode, out, err.decode())


def heldout_all(
    server: dict[str, Any], *calls: tuple[tuple[str, ...], dict[str, Any]]
) -> list[subprocess.CompletedProcess[str]]:
    """Run several independent ``heldout`` commands at once (``(args, {role, env})`` each);
    their results in order."""
    procs = [
        subprocess.Popen(
            CLI + list(args), env=_environ(server, kw.get("role", "submitter"), kw.get("env")),
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=server["tmp"],
        )
        for args, kw in calls
    ]
    done = []
    for proc in procs:
        out, err = proc.communicate(timeout=RUN_TIMEOUT)
        done.append(subprocess.CompletedProcess(proc.args, proc.returncode, out, err))
    return done


def api_get(server: dict[str, Any], path: str, role: str = "submitter") -> Any:
    response = requests.get(
        f"{server['base']}{path}",
        headers={"Authorization": f"Bearer {server['tokens'][role]}"},
        timeout=60,
    )
    assert response.status_code == 200, response.text
    return response.json()


@pytest.fixture(scope="module")
def data() -> dict[str, Any]:
    """Holdout rows, five bootstrap fits of a linear model and the training mean."""
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_ho, y_tr, y_ho = train_test_split(X, y, test_size=150, random_state=11)
    rng = np.random.default_rng(2027)
    held, train = [], []
    for _ in range(5):
        idx = rng.integers(0, y_tr.size, y_tr.size)
        model = LinearRegression().fit(X_tr[idx], y_tr[idx])
        held.append(model.predict(X_ho))
        train.append(model.predict(X_tr))
    ids = np.array([f"d{i:03d}" for i in range(y_ho.size)])
    return {
        "ids": ids, "y": y_ho, "y_train": y_tr, "X_ho": X_ho,
        "linear": np.array(held), "linear_train": np.array(train),
        "mean": np.full((1, y_ho.size), y_tr.mean()),
    }


def write_predictions(path: Path, ids: np.ndarray, preds: np.ndarray) -> Path:
    columns = {"id": ids, **{f"pred.{k}": preds[k] for k in range(preds.shape[0])}}
    pa.csv.write_csv(pa.table(columns), path)
    return path


def write_holdout(path: Path, ids: np.ndarray, y: np.ndarray) -> Path:
    pa.csv.write_csv(pa.table({"id": ids, "y_true": y}), path)
    return path


@pytest.fixture(scope="module")
def files(server, data) -> dict[str, Path]:
    tmp = server["tmp"]
    train_columns = {"y_true": data["y_train"]}
    train_columns.update({f"pred.{k}": data["linear_train"][k] for k in range(5)})
    pa.csv.write_csv(pa.table(train_columns), tmp / "linear-train.csv")
    return {
        "holdout": write_holdout(tmp / "diabetes.csv", data["ids"], data["y"]),
        "linear": write_predictions(tmp / "linear.csv", data["ids"], data["linear"]),
        "linear_train": tmp / "linear-train.csv",
        "mean": write_predictions(tmp / "mean.csv", data["ids"], data["mean"]),
    }


def create_holdout(
    server, path: Path, name: str, policy: dict[str, Any], *, policy_file: bool = False
) -> dict[str, Any]:
    """``heldout holdout create`` with the policy as JSON text, or as ``@FILE``."""
    text = json.dumps(policy)
    if policy_file:
        where = server["tmp"] / f"{name}.policy.json"
        where.write_text(text)
        text = f"@{where}"
    run = heldout(server, "holdout", "create", str(path), "--name", name,
                  "--policy", text, "--json", role="owner")
    assert run.returncode == 0, run.stderr
    return json.loads(run.stdout)


@pytest.fixture(scope="module")
def plain(server, files) -> dict[str, Any]:
    """A holdout without gates, exact feedback scores (guard none)."""
    return create_holdout(server, files["holdout"], "diabetes-cli",
                          {"primary_metric": "rmse", "guard": "none"})


def test_usage_and_service_errors_exit_2(server, plain, files) -> None:
    unreachable = f"http://127.0.0.1:{free_port()}"
    (
        helped, bare, bad_sweep, bad_policy, missing_file, no_token, unknown_holdout,
        unknown_submission, bad_token_env, bad_token_flag, refused, no_server,
    ) = heldout_all(
        server,
        (("submit", "--help"), {}),
        (("submit",), {}),  # no holdout, no file
        (("submit", plain["id"], str(files["linear"]), "--sweep", "depth"), {}),
        (("holdout", "create", str(files["holdout"]), "--policy", "{not json"),
         {"role": "owner"}),
        (("submit", plain["id"], str(server["tmp"] / "missing.csv")), {}),
        (("standings", plain["id"]), {"role": None}),  # no token anywhere
        (("submit", "ho_nonexistent", str(files["linear"])), {}),
        (("show", "sub_nonexistent", "--json"), {}),
        (("standings", plain["id"]), {"env": {"HELDOUT_TOKEN": "not-a-token"}}),
        (("standings", plain["id"], "--token", "not-a-token"), {}),  # the flag wins
        (("holdout", "create", str(files["holdout"]), "--name", "bad-policy",
          "--policy", '{"guard": "sometimes"}'), {"role": "owner"}),
        (("show", "sub_x", "--url", unreachable), {}),
    )
    assert helped.returncode == 0
    for text in ("exit status:", "0  the verdict is pass", "1  the verdict is fail",
                 "3  the verdict is warn (--strict makes it 1)", "2  usage error",
                 "HELDOUT_URL", "HELDOUT_TOKEN", "--strict", "--json", "--train",
                 "--reference"):
        assert text in helped.stdout, text

    for run in (bare, bad_sweep, bad_policy, missing_file, no_token, unknown_holdout,
                unknown_submission, bad_token_env, bad_token_flag, refused, no_server):
        assert run.returncode == 2, (run.args, run.stderr)
        assert run.stdout == "", run.args  # nothing on standard output for a pipeline to read
        assert run.stderr.startswith(("usage:", "heldout: ")), run.stderr
    assert "usage:" in bare.stderr
    assert "NAME=COMPLEXITY" in bad_sweep.stderr
    assert "--policy: not JSON" in bad_policy.stderr
    assert "no such file" in missing_file.stderr
    assert "HELDOUT_TOKEN" in no_token.stderr
    # a problem's status and title, then its detail
    assert unknown_holdout.stderr.startswith("heldout: 404 ")
    assert unknown_submission.stderr.startswith("heldout: 404 ")
    assert bad_token_env.stderr.startswith("heldout: 401 ")
    assert bad_token_flag.stderr.startswith("heldout: 401 ")
    assert refused.stderr.startswith("heldout: 422 ") and "guard" in refused.stderr
    assert "Cannot reach the service" in no_server.stderr


def test_submit_json_is_the_service_answer(server, plain, files) -> None:
    run = heldout(server, "submit", plain["id"], str(files["linear"]), "--model", "linear",
                  "--train", str(files["linear_train"]), "--json")
    assert run.returncode == 0, run.stderr
    assert run.stderr == ""  # no progress bar: standard output is not a terminal
    result = json.loads(run.stdout)  # one JSON object, nothing else
    assert result["model"] == "linear" and result["n_seeds"] == 5
    assert result == api_get(server, f"/v1/submissions/{result['id']}")
    shown, standings = heldout_all(
        server, (("show", result["id"], "--json"), {}), (("standings", plain["id"], "--json"), {})
    )
    assert shown.returncode == 0 and json.loads(shown.stdout) == result
    assert standings.returncode == 0
    assert json.loads(standings.stdout) == api_get(server, f"/v1/holdouts/{plain['id']}/standings")


def _printed(out: str, row: str) -> list[str]:
    match = re.search(rf"^\s*{re.escape(row)}\s+(.*)$", out, flags=re.MULTILINE)
    assert match, f"no {row!r} row in:\n{out}"
    return match.group(1).split()


def test_summary_shows_metrics_decomposition_and_standings(server, plain, files, data) -> None:
    run = heldout(server, "submit", plain["id"], str(files["linear"]), "--model", "linear-sum",
                  "--train", str(files["linear_train"]))
    assert run.returncode == 0, run.stderr
    sub_id = re.search(r"^submission (sub_\S+)", run.stdout, flags=re.MULTILINE).group(1)
    # the owner sees the full set: compare the printed numbers with scikit-learn
    shown, standings = heldout_all(
        server, (("show", sub_id), {"role": "owner"}), (("standings", plain["id"]), {})
    )
    assert shown.returncode == 0, shown.stderr
    out = shown.stdout
    y, preds = data["y"], data["linear"]
    assert "150 rows (full slice), 5 seed(s)" in out
    # reference: sklearn.metrics.mean_squared_error per seed, averaged over seeds
    mse = np.mean([mean_squared_error(y, p) for p in preds])
    assert float(_printed(out, "mse")[0]) == pytest.approx(mse, rel=1e-4)
    assert float(_printed(out, "rmse")[0]) == pytest.approx(np.sqrt(mse), rel=1e-4)
    # the interval follows the value on the same row, low below high
    low, high = (float(v) for v in re.findall(r"\[(\S+), (\S+)\]", " ".join(
        _printed(out, "mse")))[0])
    assert low < mse < high
    # bias term: the squared error of the seed-averaged prediction (common practice,
    # reference: sklearn.metrics.mean_squared_error on the mean prediction)
    expected, bias, variance = (float(v) for v in _printed(out, "squared")[:3])
    assert expected == pytest.approx(mse, rel=1e-4)
    assert bias == pytest.approx(mean_squared_error(y, preds.mean(axis=0)), rel=1e-4)
    assert variance == pytest.approx(mse - bias, rel=1e-3, abs=1e-3)
    assert "flags:" in out
    assert re.search(r"^verdict: PASS .*no gates$", out, flags=re.MULTILINE)  # no gates: pass
    # owners also see the exact verdict on each slice
    assert re.search(r"^  exact verdicts by slice: .*full pass", out, flags=re.MULTILINE)
    assert standings.returncode == 0
    assert re.search(r"^\s*1\s+g1\s+", standings.stdout, flags=re.MULTILINE)


def test_progress_bar_only_when_stdout_is_a_terminal(server, data) -> None:
    """An upload above 1 MiB: no bar in a pipeline; a bar on standard error on a terminal."""
    rng = np.random.default_rng(5)
    rows = rng.integers(0, data["y"].size, 6000)  # diabetes rows drawn with replacement
    ids = np.array([f"r{i:05d}" for i in range(rows.size)])
    holdout = create_holdout(
        server, write_holdout(server["tmp"] / "big.csv", ids, data["y"][rows]), "diabetes-big",
        {"primary_metric": "rmse", "guard": "none"},
    )
    preds = np.repeat(data["linear"], 3, axis=0)[:, rows]  # 15 seeds
    path = write_predictions(server["tmp"] / "big-preds.csv", ids, preds)
    assert path.stat().st_size > 1 << 20
    piped = heldout(server, "submit", holdout["id"], str(path), "--model", "big")
    assert piped.returncode == 0 and piped.stderr == ""
    assert "submission sub_" in piped.stdout
    tty = heldout(server, "submit", holdout["id"], str(path), "--model", "big-tty",
                  stdout_tty=True)
    assert tty.returncode == 0, tty.stderr
    assert "upload big-preds.csv [" in tty.stderr and "100.0%" in tty.stderr
    assert "submission sub_" in tty.stdout
    quiet = heldout(server, "submit", holdout["id"], str(path), "--model", "big-quiet",
                    "--no-progress", stdout_tty=True)
    assert quiet.returncode == 0 and quiet.stderr == ""


def feedback_rows(server, holdout: dict[str, Any]) -> np.ndarray:
    meta = api_get(server, f"/v1/holdouts/{holdout['id']}", role="owner")
    return feedback_mask(meta["n_rows"], feedback_fraction=meta["policy"]["feedback_fraction"],
                         seed=int(meta["split"]["seed"]))


@pytest.fixture(scope="module")
def gated(server, files) -> dict[str, Any]:
    """A holdout with two gates: R^2 above zero (a constant prediction never passes it: its
    R^2 is 1 - SS(y - c) / SS(y - mean(y)) <= 0, reference: the definition of R^2 in
    sklearn.metrics.r2_score) and non-inferiority in RMSE to a reference submission, which
    warns when no reference is named."""
    policy = {
        "primary_metric": "rmse",
        "guard": "none",
        "feedback_fraction": 0.5,
        "gates": [
            {"metric": "r2", "op": ">", "value": 0},
            {"compare": "non_inferior", "metric": "rmse", "margin": 1.0, "alpha": 0.05},
        ],
    }
    holdout = create_holdout(server, files["holdout"], "diabetes-gated", policy,
                             policy_file=True)
    assert holdout["policy"]["gates"] == policy["gates"]
    return holdout


def _reason(result: dict[str, Any], metric: str) -> dict[str, Any]:
    (reason,) = [r for r in result["verdict"]["reasons"] if r["metric"] == metric]
    return reason


def test_exit_status_is_the_verdict(server, gated, files, data) -> None:
    from sklearn.metrics import r2_score

    mask = feedback_rows(server, gated)
    y = data["y"][mask]

    # fail: the training mean, R^2 <= 0 on any rows
    const = heldout(server, "submit", gated["id"], str(files["mean"]), "--model", "mean",
                    "--json")
    assert const.returncode == 1, const.stderr
    const_result = json.loads(const.stdout)
    assert const_result["verdict"]["status"] == "fail"
    r2_reason = _reason(const_result, "r2")
    assert r2_reason["status"] == "fail"
    # reference: sklearn.metrics.r2_score on the feedback rows
    assert r2_reason["value"] == pytest.approx(r2_score(y, data["mean"][0, mask]), rel=1e-9)
    assert r2_reason["value"] <= 0

    # warn: the linear model passes the bound, but no reference is named -> 3
    linear = heldout(server, "submit", gated["id"], str(files["linear"]), "--model", "linear")
    assert linear.returncode == 3, linear.stderr
    assert "verdict: WARN" in linear.stdout
    sub_id = re.search(r"^submission (sub_\S+)", linear.stdout, flags=re.MULTILINE).group(1)
    result = api_get(server, f"/v1/submissions/{sub_id}")
    assert result["verdict"]["status"] == "warn"
    assert _reason(result, "r2")["status"] == "pass"
    # reference: sklearn.metrics.r2_score per seed on the feedback rows, mean over seeds
    assert _reason(result, "r2")["value"] == pytest.approx(
        np.mean([r2_score(y, p[mask]) for p in data["linear"]]), rel=1e-9
    )
    assert _reason(result, "rmse")["status"] == "warn"
    # one line per gate in the summary, each starting with its status
    lines = linear.stdout[linear.stdout.index("verdict: WARN"):].splitlines()[1:3]
    assert [line.split()[0] for line in lines] == ["pass", "warn"]

    shown, strict, owner_view = heldout_all(
        server,
        (("show", sub_id), {}),
        (("show", sub_id, "--strict"), {}),
        (("show", sub_id, "--json"), {"role": "owner"}),
    )
    assert shown.returncode == 3 and strict.returncode == 1  # --strict: warn is a failure
    assert json.loads(owner_view.stdout) == api_get(server, f"/v1/submissions/{sub_id}",
                                                    role="owner")

    # pass: the linear model against the constant reference it beats by far
    passed = heldout(server, "submit", gated["id"], str(files["linear"]), "--model", "linear",
                     "--reference", const_result["id"], "--json")
    assert passed.returncode == 0, passed.stderr
    verdict = json.loads(passed.stdout)["verdict"]
    assert verdict["status"] == "pass" and verdict["reference"] == const_result["id"]
    compared = _reason(json.loads(passed.stdout), "rmse")
    assert compared["status"] == "pass"
    # the difference is the gap between the two RMSEs on the feedback rows; reference:
    # sklearn.metrics.mean_squared_error, square root of the mean over seeds
    rmse_linear = np.sqrt(np.mean([mean_squared_error(y, p[mask]) for p in data["linear"]]))
    rmse_const = np.sqrt(mean_squared_error(y, data["mean"][0, mask]))
    assert compared["difference"] == pytest.approx(rmse_linear - rmse_const, rel=1e-9)
    assert compared["interval"]["high"] < 1.0  # the upper bound below the margin

    # a reference the group cannot use is the service's refusal: 2
    bad, refused = heldout_all(
        server,
        (("submit", gated["id"], str(files["linear"]), "--reference", "sub_nonexistent"), {}),
        (("holdout", "reference", gated["id"], const_result["id"]), {}),  # submitter: 403
    )
    assert bad.returncode == 2 and bad.stderr.startswith("heldout: ")
    assert refused.returncode == 2 and refused.stderr.startswith("heldout: 403 ")

    # the owner makes the constant model the holdout-wide reference; a submission naming
    # none is then compared with it
    ref = heldout(server, "holdout", "reference", gated["id"], const_result["id"], "--json",
                  role="owner")
    assert ref.returncode == 0, ref.stderr
    assert json.loads(ref.stdout) == api_get(server, f"/v1/holdouts/{gated['id']}/reference",
                                             role="owner")
    assert json.loads(ref.stdout)["submission"] == const_result["id"]
    implicit = heldout(server, "submit", gated["id"], str(files["linear"]), "--json")
    assert implicit.returncode == 0, implicit.stderr
    assert json.loads(implicit.stdout)["verdict"]["reference"] == const_result["id"]
    cleared = heldout(server, "holdout", "reference", gated["id"], "--clear", role="owner")
    assert cleared.returncode == 0 and cleared.stdout.strip().endswith(": none")
