"""The ``heldout`` command: tokens, database, server, OpenAPI document, settings.

::

    heldout tokens create --role ROLE [--group NAME] [--label TEXT]   # prints the token only
    heldout tokens list [--json]
    heldout tokens revoke TOKEN_ID
    heldout db upgrade | check      (init: the same as upgrade)
    heldout serve [--bind HOST:PORT] [--workers N]
    heldout openapi [--write [PATH]]
    heldout settings
    heldout verify-fingerprint --salt HEX --fingerprint HEX [--task TASK] FILE
    heldout holdout create FILE | submit HOLDOUT FILE... | standings HOLDOUT | show SUBMISSION
        (HTTP client commands: service/cli_client.py)

The database is ``HELDOUT_DATABASE_URL`` (or ``--database-url``). Token commands create
missing tables first, so ``heldout tokens create`` works on a fresh machine.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from service.cli_client import add_client_commands
from service.roles import ROLES
from service.settings import SettingsError, load_settings, markdown_table

if TYPE_CHECKING:
    from service.store import Store

GUNICORN_APP = "service:create_app()"
GUNICORN_CONFIG = "python:service.api.gunicorn_conf"
OPENAPI_PATH = Path(__file__).resolve().parent.parent / "openapi" / "openapi.yaml"


def gunicorn_argv(bind: str | None = None, workers: int | None = None) -> list[str]:
    """The gunicorn command line ``heldout serve`` runs (after ``python -m``)."""
    argv = ["gunicorn", "--config", GUNICORN_CONFIG]
    if bind:
        argv += ["--bind", bind]
    if workers:
        argv += ["--workers", str(workers)]
    return argv + [GUNICORN_APP]


def _store(args: argparse.Namespace) -> Store:
    from service.store import Store

    url = args.database_url or load_settings(os.environ)["DATABASE_URL"]
    return Store(url)


def _tokens_create(args: argparse.Namespace) -> int:
    from service.api.schemas import check_group_name

    if args.role == "submitter" and not args.group:
        print("heldout: a submitter token needs --group NAME", file=sys.stderr)
        return 2
    if args.group:
        try:
            check_group_name(args.group)
        except ValueError as exc:
            print(f"heldout: {exc}", file=sys.stderr)
            return 2
    if args.label is not None and len(args.label) > 200:
        print("heldout: --label has at most 200 characters", file=sys.stderr)
        return 2
    store = _store(args)
    try:
        store.init_schema()
        record, secret = store.create_token(args.role, args.group, args.label)
    finally:
        store.dispose()
    print(secret)
    group = f", group {record.group}" if record.group else ""
    print(
        f"created {record.id} (role {record.role}{group}); the token above is shown only once",
        file=sys.stderr,
    )
    return 0


def _tokens_list(args: argparse.Namespace) -> int:
    store = _store(args)
    try:
        store.init_schema()
        tokens = store.list_tokens()
    finally:
        store.dispose()
    rows = [
        {
            "id": t.id,
            "role": t.role,
            "group": t.group,
            "label": t.label,
            "created_at": t.created_at.isoformat(),
            "revoked_at": None if t.revoked_at is None else t.revoked_at.isoformat(),
        }
        for t in tokens
    ]
    if args.json:
        print(json.dumps(rows, indent=2))
        return 0
    header = ("id", "role", "group", "label", "created_at", "revoked_at")
    table = [header] + [tuple(str(r[k] or "-") for k in header) for r in rows]
    widths = [max(len(row[i]) for row in table) for i in range(len(header))]
    for row in table:
        print("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())
    return 0


def _tokens_revoke(args: argparse.Namespace) -> int:
    from service.store import UnknownTokenError

    store = _store(args)
    try:
        store.init_schema()
        record = store.revoke_token(args.token_id)
    except UnknownTokenError:
        print(f"heldout: no token with id {args.token_id!r}", file=sys.stderr)
        return 1
    finally:
        store.dispose()
    print(f"revoked {record.id} at {record.revoked_at.isoformat() if record.revoked_at else '-'}")
    return 0


def _db_upgrade(args: argparse.Namespace) -> int:
    from service.store.migrations import UpgradeRefused, upgrade

    store = _store(args)
    try:
        result = upgrade(store.engine)
    except UpgradeRefused as exc:
        print(f"heldout: {exc}", file=sys.stderr)
        return 1
    finally:
        store.dispose()
    if result.adopted:
        print(f"existing tables match; recorded schema revision {result.after}", file=sys.stderr)
    elif result.before == result.after:
        print(f"schema already at revision {result.after}", file=sys.stderr)
    else:
        print(f"schema upgraded from {result.before or 'empty'} to {result.after}", file=sys.stderr)
    return 0


def _db_check(args: argparse.Namespace) -> int:
    from service.store.migrations import SchemaVersionError, check_schema

    store = _store(args)
    try:
        print(check_schema(store.engine))
    except SchemaVersionError as exc:
        print(f"heldout: {exc}", file=sys.stderr)
        return 1
    finally:
        store.dispose()
    return 0


def _serve(args: argparse.Namespace) -> int:
    argv = [sys.executable, "-m", *gunicorn_argv(args.bind, args.workers)]
    if args.database_url:
        os.environ["HELDOUT_DATABASE_URL"] = args.database_url
    os.execv(sys.executable, argv)
    return 0  # pragma: no cover - exec does not return


def openapi_yaml() -> str:
    """The generated OpenAPI document as YAML (needs no database)."""
    from service.api.app import create_app
    from service.api.openapi import spec_yaml

    return spec_yaml(create_app({"DATABASE_URL": "sqlite://"}))


def _openapi(args: argparse.Namespace) -> int:
    text = openapi_yaml()
    if args.write is None:
        sys.stdout.write(text)
        return 0
    path = Path(args.write)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    print(f"wrote {path}", file=sys.stderr)
    return 0


def _settings(args: argparse.Namespace) -> int:
    sys.stdout.write(markdown_table())
    return 0


def _verify_fingerprint(args: argparse.Namespace) -> int:
    from service.verify import VerifyError, verify_file

    try:
        result = verify_file(
            Path(args.file),
            salt=args.salt,
            expected=args.fingerprint,
            kind=args.task,
            id_column=args.id_column,
            target_column=args.target_column,
        )
    except VerifyError as exc:
        print(f"heldout: {exc}", file=sys.stderr)
        return 2
    if result.matched:
        print("match")
        print(f"{result.n_rows} rows, {result.kind} label encoding", file=sys.stderr)
        return 0
    print("mismatch")
    return 1


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="heldout", description="Sealed holdouts and scored submissions."
    )
    parser.add_argument(
        "--database-url",
        default=None,
        help="SQLAlchemy URL (default: HELDOUT_DATABASE_URL, else sqlite:///heldout.sqlite3)",
    )
    commands = parser.add_subparsers(dest="command", required=True)

    tokens = commands.add_parser("tokens", help="create, list and revoke API tokens")
    token_commands = tokens.add_subparsers(dest="tokens_command", required=True)
    create = token_commands.add_parser("create", help="create a token; prints it alone")
    create.add_argument("--role", required=True, choices=ROLES)
    create.add_argument(
        "--group",
        help="submitters: their group (required); owners: optional "
        "team name shared by the team's owner tokens",
    )
    create.add_argument("--label", help="free text to recognise the token by")
    create.set_defaults(func=_tokens_create)
    listing = token_commands.add_parser("list", help="list tokens (never their secrets)")
    listing.add_argument("--json", action="store_true", help="print JSON")
    listing.set_defaults(func=_tokens_list)
    revoke = token_commands.add_parser("revoke", help="revoke a token by its id (tok_...)")
    revoke.add_argument("token_id")
    revoke.set_defaults(func=_tokens_revoke)

    db = commands.add_parser("db", help="database")
    db_commands = db.add_subparsers(dest="db_command", required=True)
    init = db_commands.add_parser("init", help="the same as upgrade (kept for old scripts)")
    init.set_defaults(func=_db_upgrade)
    upgrade = db_commands.add_parser("upgrade", help="migrate the schema to this version")
    upgrade.set_defaults(func=_db_upgrade)
    check = db_commands.add_parser(
        "check", help="print the schema revision; exit 1 unless it is this version's"
    )
    check.set_defaults(func=_db_check)

    serve = commands.add_parser("serve", help="run the service under gunicorn")
    serve.add_argument("--bind", help="HOST:PORT (default: HELDOUT_BIND)")
    serve.add_argument("--workers", type=int, help="worker processes (default: HELDOUT_WORKERS)")
    serve.set_defaults(func=_serve)

    openapi = commands.add_parser("openapi", help="print the OpenAPI document (YAML)")
    openapi.add_argument(
        "--write",
        nargs="?",
        const=str(OPENAPI_PATH),
        default=None,
        metavar="PATH",
        help=f"write it to PATH instead (default {OPENAPI_PATH})",
    )
    openapi.set_defaults(func=_openapi)

    settings = commands.add_parser("settings", help="print every setting as a Markdown table")
    settings.set_defaults(func=_settings)

    verify = commands.add_parser(
        "verify-fingerprint",
        help="recompute a holdout's fingerprint from its labels and the salt revealed at close",
        description="Prints 'match' (exit 0) or 'mismatch' (exit 1); exit 2 for unusable input.",
    )
    verify.add_argument("--salt", required=True, help="the salt a closed holdout shows (hex)")
    verify.add_argument("--fingerprint", required=True, help="the registration fingerprint (hex)")
    verify.add_argument(
        "--task",
        choices=("regression", "binary", "multiclass", "classification"),
        help="how labels are encoded (default: try regression and classification)",
    )
    verify.add_argument("--id-column", default="id", help="id column or JSON key (default id)")
    verify.add_argument(
        "--target-column", default="y_true", help="label column or JSON key (default y_true)"
    )
    verify.add_argument(
        "file", help="ids and labels in registration order: .csv, .parquet or .json"
    )
    verify.set_defaults(func=_verify_fingerprint)

    add_client_commands(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``heldout`` console script; returns the exit status."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except SettingsError as exc:
        print(f"heldout: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
