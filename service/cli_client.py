"""The ``heldout`` client commands: register a holdout, submit, read standings and results.

::

    heldout holdout create FILE [--name NAME] [--task TASK] [--policy JSON|@FILE] [--json]
    heldout holdout show HOLDOUT [--json]
    heldout holdout reference HOLDOUT [SUBMISSION | --clear] [--json]
    heldout submit HOLDOUT FILE... [--train FILE] [--reference ID] [--model NAME]
                   [--sweep NAME=COMPLEXITY] [--json] [--strict]
    heldout standings HOLDOUT [--json]
    heldout show SUBMISSION [--json] [--strict]

They talk to a running service over HTTP through ``service.client`` (which pipelines can
import themselves). The service's address and the token come from ``--url`` / ``--token``
or the environment variables ``HELDOUT_URL`` (default ``http://127.0.0.1:8000``) and
``HELDOUT_TOKEN``, the names ``HeldoutClient.from_env`` reads.

Output is a readable summary on standard output, or with ``--json`` the service's JSON
answer unchanged, one object. Exit status (``submit`` and ``show`` from the verdict, so a
pipeline can branch on it; the other commands 0 or 2):

    0  pass (or no verdict: the holdout sets no gates)
    1  fail
    3  warn (``--strict``: 1)
    2  usage error, unreadable local file, or a service error (RFC 9457 problem: its title
       and detail go to standard error), the service unreachable

Why these numbers: 0 and 1 are what a shell ``if`` tests; 2 is argparse's own usage status,
and errors of the service are as fatal to a pipeline as a bad command line; warn gets 3 so a
pipeline that only tests for zero still stops on it.

This module imports ``service.client`` (numpy, pyarrow, requests) only when a client
command runs, so the other ``heldout`` commands stay quick to start.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    from service.client import HeldoutClient

EXIT_PASS = 0
EXIT_FAIL = 1
EXIT_ERROR = 2
EXIT_WARN = 3

URL_ENV = "HELDOUT_URL"
TOKEN_ENV = "HELDOUT_TOKEN"
DEFAULT_URL = "http://127.0.0.1:8000"  # service.client.DEFAULT_URL, without importing it

EXIT_STATUS_HELP = """\
exit status:
  0  the verdict is pass (or the holdout sets no gates)
  1  the verdict is fail
  3  the verdict is warn (--strict makes it 1)
  2  usage error, unreadable local file, service error (its problem's title and
     detail on standard error) or the service unreachable

environment:
  HELDOUT_URL    the service's address when --url is not given (default
                 http://127.0.0.1:8000)
  HELDOUT_TOKEN  the bearer token when --token is not given
"""


class CommandError(Exception):
    """A client command cannot run: the message goes to standard error, exit status 2."""


# ------------------------------------------------------------------------ verdicts


def exit_status(result: Mapping[str, Any], *, strict: bool = False) -> int:
    """The exit status of a scored submission: its verdict as a number a shell can test.

    ``pass`` (or no ``verdict`` member: no gates) gives 0, ``fail`` 1, ``warn`` 3, or 1 when
    ``strict``. An unknown status is treated as ``fail``: a pipeline must not ship on a word
    it does not understand.
    """
    verdict = result.get("verdict")
    status = verdict.get("status") if isinstance(verdict, Mapping) else None
    if status is None or status == "pass":
        return EXIT_PASS
    if status == "warn":
        return EXIT_FAIL if strict else EXIT_WARN
    return EXIT_FAIL


# ------------------------------------------------------------------------ formatting


def fmt(value: Any, digits: int = 5) -> str:
    """A number as the summaries show it: ``digits`` significant digits, ``-`` for none."""
    if value is None or isinstance(value, bool):
        return "-" if value is None else str(value)
    if isinstance(value, (int, float)):
        x = float(value)
        if not math.isfinite(x):
            return str(x)
        if x == 0:
            return "0"
        if 1e-4 <= abs(x) < 10 ** digits:
            text = f"{x:.{digits}g}"
            return text
        return f"{x:.{max(digits - 2, 1)}e}"
    return str(value)


def table(rows: Sequence[Sequence[str]], *, right: Sequence[bool] | None = None,
          indent: str = "  ") -> str:
    """Rows of text as aligned columns (the first row is the header)."""
    if not rows:
        return ""
    width = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    align = list(right) if right is not None else [False] * len(width)
    lines = []
    for row in rows:
        cells = [
            cell.rjust(w) if align[i] else cell.ljust(w)
            for i, (cell, w) in enumerate(zip(row, width, strict=True))
        ]
        lines.append((indent + "  ".join(cells)).rstrip())
    return "\n".join(lines)


def _interval(iv: Mapping[str, Any] | None) -> tuple[str, str]:
    if not iv:
        return "-", ""
    if iv.get("low") is None or iv.get("high") is None:
        return "no interval", str(iv.get("note") or "")
    level = iv.get("level")
    method = iv.get("method") or ""
    label = f"{100 * level:g}% {method}".strip() if isinstance(level, (int, float)) else method
    return f"[{fmt(iv['low'])}, {fmt(iv['high'])}]", label


def describe_gate(gate: Mapping[str, Any]) -> str:
    """A gate of the policy as one short phrase (``rmse <= 3.2``, ``flag generalization_gap``)."""
    if "compare" in gate:
        text = f"{gate.get('compare')} {gate.get('metric')}"
        if "margin" in gate:
            text += f" margin {fmt(gate['margin'])}"
        return text + f" alpha {fmt(gate.get('alpha', 0.05))}"
    if "flag" in gate:
        return f"flag {gate.get('flag')}" + (
            f" >= {gate['min_severity']}" if "min_severity" in gate else ""
        )
    if "metric" in gate:
        return f"{gate.get('metric')} {gate.get('op')} {fmt(gate.get('value'))}"
    return json.dumps(gate, sort_keys=True)


def format_verdict(verdict: Mapping[str, Any] | None, submission_id: str | None = None) -> str:
    """The verdict: its status, then one line per gate (status, gate, message).

    ``submission_id``: the submission the verdict belongs to; when the verdict reads another
    one's numbers (``based_on``: under the Ladder, the group's best), the line says so."""
    if not verdict:
        return "verdict: none (the holdout sets no gates)"
    status = str(verdict.get("status", "?"))
    reasons = list(verdict.get("reasons") or [])
    about = [f"{verdict['slice']} slice"] if verdict.get("slice") else []
    if verdict.get("reference"):
        about.append(f"reference {verdict['reference']}")
    if verdict.get("based_on") and submission_id and verdict["based_on"] != submission_id:
        about.append(f"numbers of {verdict['based_on']}")
    lines = [
        f"verdict: {status.upper()}"
        + (f" ({'; '.join(about)})" if about else "")
        + ("" if reasons else ", no gates")
    ]
    rows = []
    for reason in reasons:
        gate = reason.get("gate")
        spec = reason.get("spec") if isinstance(reason.get("spec"), Mapping) else gate
        if isinstance(gate, str):  # the service's own phrase (it marks warn-only gates)
            phrase = gate
        else:
            phrase = describe_gate(spec) if isinstance(spec, Mapping) else str(
                reason.get("metric")
            )
            if isinstance(spec, Mapping) and spec.get("severity") == "warn":
                phrase += " (warn)"
        rows.append((str(reason.get("status", "?")), phrase, str(reason.get("message", ""))))
    if rows:
        first = max(len(r[0]) for r in rows)
        second = max(len(r[1]) for r in rows)
        lines += [f"  {s.ljust(first)}  {g.ljust(second)}  {m}".rstrip() for s, g, m in rows]
    return "\n".join(lines)


def format_submission(result: Mapping[str, Any]) -> str:
    """A scored submission as a person reads it: metrics with intervals, the bias-variance
    decomposition, flags with their messages, the guard's note and the verdict."""
    lines = [
        f"submission {result.get('id')}  model {result.get('model')!s}  "
        f"group {result.get('group')}  holdout {result.get('holdout_id')}",
        f"  {result.get('n_rows')} rows ({result.get('slice')} slice), "
        f"{result.get('n_seeds')} seed(s); {result.get('primary_metric')} "
        f"{fmt(result.get('primary_value'))}",
    ]
    guard = result.get("guard")
    if isinstance(guard, Mapping) and guard.get("message"):
        lines.append(f"  reuse guard ({guard.get('kind')}): {guard['message']}")
    sweep = result.get("sweep")
    if isinstance(sweep, Mapping):
        lines.append(f"  sweep {sweep.get('name')} at complexity {fmt(sweep.get('complexity'))}")

    scores: Mapping[str, Any] = result.get("scores") or {}
    intervals: Mapping[str, Any] = result.get("intervals") or {}
    ensemble: Mapping[str, Any] = result.get("ensemble") or {}
    train: Mapping[str, Any] = result.get("train_scores") or {}
    spread: Mapping[str, Any] = result.get("seed_spread") or {}
    primary = result.get("primary_metric")
    names = sorted(scores, key=lambda m: (m != primary,))
    rows = [("metric", "value", "interval", "", "seed sd", "seed-avg", "train")]
    for name in names:
        iv, label = _interval(intervals.get(name))
        sd = (spread.get(name) or {}).get("sd") if isinstance(spread.get(name), Mapping) else None
        rows.append(
            (
                name,
                fmt(scores[name]),
                iv,
                label,
                fmt(sd),
                fmt(ensemble.get(name)),
                fmt(train.get(name)) if train else "-",
            )
        )
    lines += ["", table(rows, right=(False, True, False, False, True, True, True))]

    decompositions: Mapping[str, Any] = result.get("bias_variance") or {}
    if decompositions:
        lines += ["", "  bias-variance across seeds (expected loss = bias term + variance):"]
        rows = [("loss", "expected", "bias", "variance", "var share", "seed-avg", "noise")]
        for key, d in decompositions.items():
            rows.append(
                (
                    key,
                    fmt(d.get("expected_loss")),
                    fmt(d.get("bias")),
                    fmt(d.get("variance")),
                    fmt(d.get("variance_share"), 3),
                    fmt(d.get("ensemble_loss")),
                    fmt(d.get("noise")),
                )
            )
        lines.append(table(rows, right=(False,) + (True,) * 6))

    flags = list(result.get("flags") or [])
    lines.append("")
    if flags:
        lines.append("  flags:")
        lines += [f"    [{f.get('severity')}] {f.get('code')}: {f.get('message')}" for f in flags]
    else:
        lines.append("  flags: none")
    lines += ["", format_verdict(result.get("verdict"), str(result.get("id")))]
    by_slice = result.get("verdicts_by_slice")
    if isinstance(by_slice, Mapping) and by_slice:
        lines.append(
            "  exact verdicts by slice: "
            + ", ".join(
                f"{name} {v.get('status')}" for name, v in by_slice.items()
                if isinstance(v, Mapping)
            )
        )
    return "\n".join(lines)


def format_standings(standings: Mapping[str, Any]) -> str:
    """The standings as a table (and the final standings on the reserve once closed)."""
    metric = standings.get("primary_metric")
    direction = "higher is better" if standings.get("higher_is_better") else "lower is better"
    lines = [
        f"standings of {standings.get('holdout_id')} by {metric} ({direction}), "
        f"{standings.get('slice')} slice, guard {standings.get('guard')}"
    ]
    entries = list(standings.get("entries") or [])
    owner = any(e.get("reserve_value") is not None for e in entries)
    header = ["rank", "group", metric or "value", "interval", "model", "submissions"]
    verdicts = any("verdict_status" in e for e in entries)
    if verdicts:
        header.append("verdict")
    if owner:
        header += ["reserve", "feedback tuned"]
    rows = [tuple(header)]
    for e in entries:
        row = [
            str(e.get("rank")),
            str(e.get("group")),
            fmt(e.get("value")),
            _interval(e.get("interval"))[0],
            str(e.get("model") or "-"),
            str(e.get("n_submissions")),
        ]
        if verdicts:
            row.append(str(e.get("verdict_status") or "-"))
        if owner:
            tuned = e.get("feedback_tuned")
            row += [
                fmt(e.get("reserve_value")),
                "-" if not tuned else ("yes" if tuned.get("flagged") else "no"),
            ]
        rows.append(tuple(row))
    if entries:
        lines.append(table(rows, right=[h in ("rank", metric, "submissions", "reserve")
                                        for h in header]))
    else:
        lines.append("  no submissions yet")
    final = standings.get("final")
    if final:
        lines += ["", f"final standings on the reserve (closed {standings.get('closed_at')}):"]
        rows = [("rank", "group", metric or "value", "interval", "model")]
        rows += [
            (str(e.get("rank")), str(e.get("group")), fmt(e.get("value")),
             _interval(e.get("interval"))[0], str(e.get("model") or "-"))
            for e in final
        ]
        lines.append(table(rows, right=(True, False, True, False, False)))
    return "\n".join(lines)


def format_holdout(holdout: Mapping[str, Any]) -> str:
    """A holdout's metadata: id, name, task, rows, fingerprint, policy and gates."""
    policy: Mapping[str, Any] = holdout.get("policy") or {}
    lines = [
        f"holdout {holdout.get('id')}  name {holdout.get('name')}  task {holdout.get('task')}",
        f"  {holdout.get('n_rows')} rows; fingerprint {holdout.get('fingerprint')}",
        "  policy: " + ", ".join(
            f"{k} {json.dumps(v)}" for k, v in policy.items() if k != "gates"
        ),
    ]
    for gate in policy.get("gates") or []:
        severity = gate.get("severity", "fail") if isinstance(gate, Mapping) else "fail"
        lines.append(f"  gate: {describe_gate(gate)} ({severity})")
    reference = holdout.get("reference") or policy.get("reference")
    if reference:
        lines.append(f"  reference: {json.dumps(reference)}")
    return "\n".join(lines)


def _emit(text: str) -> None:
    """Write ``text`` and a newline to standard output. A reader that went away
    (``heldout show ... | head -1``) changes nothing: the command's exit status still
    reports the verdict or the registration, not the pipe."""
    try:
        sys.stdout.write(text + "\n")
        sys.stdout.flush()
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # so the flush at exit does not fail again


def print_json(payload: Any) -> None:
    """The service's JSON answer, unchanged, as one object on standard output."""
    _emit(json.dumps(payload, ensure_ascii=False, allow_nan=False))


# ------------------------------------------------------------------------ commands


def _client(args: argparse.Namespace) -> HeldoutClient:
    from service.client import HeldoutClient

    token = args.token or os.environ.get(TOKEN_ENV)
    if not token:
        raise CommandError(f"no token: give --token or set {TOKEN_ENV}")
    url = args.url or os.environ.get(URL_ENV) or DEFAULT_URL
    return HeldoutClient(url, token, timeout=args.timeout)


def _policy(text: str | None) -> dict[str, Any] | None:
    if text is None:
        return None
    source = "--policy"
    if text.startswith("@"):
        path = Path(text[1:])
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise CommandError(f"--policy {path}: cannot read it: {exc.strerror}") from None
        source = f"--policy {path}"
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise CommandError(f"{source}: not JSON: {exc}") from None
    if not isinstance(value, dict):
        raise CommandError(f"{source}: expected a JSON object, got {type(value).__name__}")
    return value


def _sweep(text: str | None) -> tuple[str, float] | None:
    if text is None:
        return None
    name, sep, value = text.rpartition("=")
    try:
        complexity = float(value)
    except ValueError:
        complexity = math.nan
    if not sep or not name or not math.isfinite(complexity):
        raise CommandError(f"--sweep {text!r}: write NAME=COMPLEXITY, e.g. depth=6")
    return name, complexity


def _progress(args: argparse.Namespace) -> bool | None:
    return False if args.no_progress else None


def _holdout_create(args: argparse.Namespace) -> int:
    path = Path(args.file)
    if not path.is_file():
        raise CommandError(f"{path}: no such file")
    name = args.name or path.name.split(".")[0]
    policy = _policy(args.policy)
    classes = None
    if args.classes is not None:
        classes = [c for c in args.classes.split(",")]
    with _client(args) as client:
        holdout = client.create_holdout(
            path,
            name=name,
            task=args.task,
            id_column=args.id_column,
            target_column=args.target_column,
            classes=classes,
            policy=policy,
            progress=_progress(args),
        )
    if args.json:
        print_json(holdout)
    else:
        _emit(format_holdout(holdout))
    return EXIT_PASS


def _holdout_show(args: argparse.Namespace) -> int:
    with _client(args) as client:
        holdout = client.holdout(args.holdout)
    if args.json:
        print_json(holdout)
    else:
        _emit(format_holdout(holdout))
    return EXIT_PASS


def _holdout_reference(args: argparse.Namespace) -> int:
    if args.clear and args.submission:
        raise CommandError("give a SUBMISSION to set, or --clear, not both")
    with _client(args) as client:
        if args.clear:
            answer = client.clear_reference(args.holdout)
        elif args.submission:
            answer = client.set_reference(args.holdout, args.submission)
        else:
            answer = client.reference(args.holdout)
    if args.json:
        print_json(answer)
    elif answer.get("submission"):
        _emit(
            f"reference of {answer.get('holdout_id')}: {answer['submission']} "
            f"(model {answer.get('model')}, group {answer.get('group')})"
        )
    else:
        _emit(f"reference of {answer.get('holdout_id')}: none")
    return EXIT_PASS


def _submit(args: argparse.Namespace) -> int:
    paths = [Path(f) for f in args.files]
    for path in paths + ([Path(args.train)] if args.train else []):
        if not path.is_file():
            raise CommandError(f"{path}: no such file")
    model = args.model or paths[0].name.split(".")[0]
    with _client(args) as client:
        result = client.submit(
            args.holdout,
            paths,
            model=model,
            train=args.train,
            reference=args.reference,
            sweep=_sweep(args.sweep),
            idempotency_key=args.idempotency_key,
            progress=_progress(args),
        )
    return _report(result, args)


def _show(args: argparse.Namespace) -> int:
    with _client(args) as client:
        result = client.submission(args.submission)
    return _report(result, args)


def _report(result: Mapping[str, Any], args: argparse.Namespace) -> int:
    if args.json:
        print_json(result)
    else:
        _emit(format_submission(result))
    return exit_status(result, strict=args.strict)


def _standings(args: argparse.Namespace) -> int:
    with _client(args) as client:
        standings = client.standings(args.holdout)
    if args.json:
        print_json(standings)
    else:
        _emit(format_standings(standings))
    return EXIT_PASS


def _problem_text(exc: Any) -> str:
    """A refusal of the service as lines for standard error: status, title, detail and
    each named field."""
    head = f"{exc.status} {exc.title}" if exc.status else str(exc.title)
    lines = [f"heldout: {head}: {exc.detail}"]
    for item in exc.errors:
        if not isinstance(item, Mapping):
            continue
        extra = []
        if item.get("count") is not None:
            extra.append(f"count {item['count']}")
        if item.get("examples"):
            extra.append("e.g. " + ", ".join(str(x) for x in item["examples"][:5]))
        tail = f" ({'; '.join(extra)})" if extra else ""
        lines.append(f"  {item.get('field')}: {item.get('message')}{tail}")
    if exc.retry_after is not None:
        lines.append(f"  retry after {exc.retry_after:g} s")
    return "\n".join(lines)


def run_client_command(args: argparse.Namespace) -> int:
    """Run one client command; turn every refusal and local problem into exit status 2."""
    from service.client import HeldoutError

    try:
        return int(args.client_func(args))
    except CommandError as exc:
        print(f"heldout: {exc}", file=sys.stderr)
    except HeldoutError as exc:
        print(_problem_text(exc), file=sys.stderr)
    except (ValueError, OSError) as exc:  # local input the client refused before sending
        print(f"heldout: {exc}", file=sys.stderr)
    return EXIT_ERROR


# ------------------------------------------------------------------------ parser


def _connection() -> argparse.ArgumentParser:
    parent = argparse.ArgumentParser(add_help=False)
    group = parent.add_argument_group("service")
    group.add_argument(
        "--url", help=f"the service's address (default: ${URL_ENV}, else {DEFAULT_URL})"
    )
    group.add_argument("--token", help=f"bearer token (default: ${TOKEN_ENV})")
    group.add_argument(
        "--timeout", type=float, default=300.0, help="seconds to wait for an answer (300)"
    )
    return parent


def _output(parser: argparse.ArgumentParser, *, verdict: bool) -> None:
    parser.add_argument(
        "--json", action="store_true", help="print the service's JSON answer unchanged"
    )
    if verdict:
        parser.add_argument(
            "--strict", action="store_true", help="a warn verdict exits 1 (fail), not 3"
        )


def add_client_commands(commands: Any) -> None:
    """Add ``holdout``, ``submit``, ``standings`` and ``show`` to the ``heldout`` parser's
    subcommands (the object ``add_subparsers`` returned)."""
    parent = _connection()
    formatter = argparse.RawDescriptionHelpFormatter

    holdout = commands.add_parser(
        "holdout", help="register or show a holdout, set its reference (HTTP client)"
    )
    holdout_commands = holdout.add_subparsers(dest="holdout_command", required=True)
    create = holdout_commands.add_parser(
        "create",
        parents=[parent],
        help="register a holdout from a CSV, Parquet or JSON table (owner token)",
        description="Register the ids and labels in FILE as a sealed holdout; prints the "
        "holdout (its id first). Registering the same name and content again returns the "
        "same holdout.",
        epilog="exit status: 0 registered, 2 usage or service error\n\n"
        + EXIT_STATUS_HELP.split("\n\n", 1)[1],
        formatter_class=formatter,
    )
    create.add_argument("file", help="table with an id and a target column")
    create.add_argument("--name", help="the holdout's name (default: FILE's name up to a dot)")
    create.add_argument(
        "--task", default="regression", choices=("regression", "binary", "multiclass"),
        help="default regression",
    )
    create.add_argument(
        "--policy",
        help="policy as JSON text or @FILE holding it, e.g. "
        "'{\"primary_metric\": \"rmse\", \"gates\": [{\"metric\": \"rmse\", \"op\": \"<=\", "
        "\"value\": 3.2}]}'",
    )
    create.add_argument("--id-column", default="id", help="default id")
    create.add_argument("--target-column", default="y_true", help="default y_true")
    create.add_argument("--classes", help="classification: the classes, comma separated, in order")
    create.add_argument("--no-progress", action="store_true", help="never draw a progress bar")
    _output(create, verdict=False)
    create.set_defaults(func=run_client_command, client_func=_holdout_create)

    show_holdout = holdout_commands.add_parser(
        "show", parents=[parent], help="a holdout's metadata and policy (never its labels)"
    )
    show_holdout.add_argument("holdout", help="holdout id")
    _output(show_holdout, verdict=False)
    show_holdout.set_defaults(func=run_client_command, client_func=_holdout_show)

    reference = holdout_commands.add_parser(
        "reference",
        parents=[parent],
        help="show, set or clear the holdout-wide reference submission (owner token)",
        description="The holdout-wide reference (the current champion) is what comparison "
        "gates test a submission against when it names no --reference of its own. Without "
        "SUBMISSION and --clear: print it.",
        epilog="exit status: 0, or 2 for a usage or service error",
    )
    reference.add_argument("holdout", help="holdout id")
    reference.add_argument("submission", nargs="?", help="submission id to make the reference")
    reference.add_argument("--clear", action="store_true", help="remove the reference")
    _output(reference, verdict=False)
    reference.set_defaults(func=run_client_command, client_func=_holdout_reference)

    submit = commands.add_parser(
        "submit",
        parents=[parent],
        help="submit predictions; the exit status is the verdict",
        description="Send predictions for HOLDOUT and print the scored result: metrics with "
        "intervals, the bias-variance decomposition, flags and the verdict with one line per "
        "gate. FILE: one CSV/Parquet/JSON table with id and pred or pred.<seed> columns "
        "(classification: prob.<class> or prob.<seed>.<class> too), or several tables, one "
        "or more seeds each, combined by id. An upload of 1 MiB or more draws a progress bar "
        "on standard error when standard output is a terminal, never in a pipeline.",
        epilog=EXIT_STATUS_HELP,
        formatter_class=formatter,
    )
    submit.add_argument("holdout", help="holdout id")
    submit.add_argument("files", nargs="+", metavar="FILE", help="predictions table(s)")
    submit.add_argument(
        "--train",
        help="the model's predictions on its own training rows: y_true and the same seeds' "
        "pred columns (lets the service test the generalization gap)",
    )
    submit.add_argument(
        "--reference",
        help="id of a submission to compare with (your group's), for comparison gates",
    )
    submit.add_argument("--model", help="the model's name (default: first FILE's name)")
    submit.add_argument(
        "--sweep", metavar="NAME=COMPLEXITY", help="mark this as a point of a complexity sweep"
    )
    submit.add_argument(
        "--idempotency-key", help="a retry with the same key returns the first result"
    )
    submit.add_argument("--no-progress", action="store_true", help="never draw a progress bar")
    _output(submit, verdict=True)
    submit.set_defaults(func=run_client_command, client_func=_submit)

    standings = commands.add_parser(
        "standings",
        parents=[parent],
        help="the best submission of each group, ranked",
        epilog="exit status: 0, or 2 for a usage or service error",
    )
    standings.add_argument("holdout", help="holdout id")
    _output(standings, verdict=False)
    standings.set_defaults(func=run_client_command, client_func=_standings)

    show = commands.add_parser(
        "show",
        parents=[parent],
        help="a scored submission; the exit status is its verdict",
        epilog=EXIT_STATUS_HELP,
        formatter_class=formatter,
    )
    show.add_argument("submission", help="submission id")
    _output(show, verdict=True)
    show.set_defaults(func=run_client_command, client_func=_show)


__all__ = [
    "EXIT_ERROR",
    "EXIT_FAIL",
    "EXIT_PASS",
    "EXIT_WARN",
    "CommandError",
    "add_client_commands",
    "describe_gate",
    "exit_status",
    "fmt",
    "format_holdout",
    "format_standings",
    "format_submission",
    "format_verdict",
    "print_json",
    "run_client_command",
    "table",
]
