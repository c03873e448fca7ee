"""The ``sealfold`` command: ``up`` (the embedded stack), ``worker`` and ``keys create``.

Nothing heavy is imported at module level: ``sealfold keys create`` must answer quickly, and the
service package never imports Flask or scikit-learn outside ``service.api``/``service.app``. The
worker command execs ``python -m worker`` rather than importing it, keeping the dependency
direction one way (``worker`` imports ``service``, never the reverse).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from sqlalchemy import Engine

    from service.embedded import Stack, Supervisor

ROLES = ("submitter", "steward", "admin")


def _port(raw: str) -> int:
    value = int(raw)
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"port must be between 0 and 65535 (0: any free port), got {value}")
    return value


def _workers(raw: str) -> int:
    value = int(raw)
    if not 1 <= value <= 64:
        raise argparse.ArgumentTypeError(f"workers must be between 1 and 64, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser of every sub-command."""
    parser = argparse.ArgumentParser(prog="sealfold", description="Review ML model submissions.")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    up = commands.add_parser(
        "up", help="run the embedded stack (redis, API, workers) with a demo dataset",
        description="Run redis-server, the API and workers as child processes until Ctrl-C. "
        "REDIS_URL and DATABASE_URL, when set, replace the embedded Redis and SQLite.",
    )
    up.add_argument("--host", default="127.0.0.1", help="address the API listens on (default 127.0.0.1)")
    up.add_argument("--port", type=_port, default=8080, help="API port (default 8080; 0 picks a free one)")
    up.add_argument("--workers", type=_workers, default=2, help="number of workers (default 2)")
    up.add_argument("--data-dir", default="./var", help="datasets, SQLite records, logs (default ./var)")
    up.add_argument("--no-demo", action="store_true", help="do not register the demo dataset")

    worker = commands.add_parser("worker", help="run one worker (python -m worker)")
    worker.add_argument("--burst", action="store_true", help="exit once the queues are empty")
    worker.add_argument("--name", help="worker name shown in RQ (default: generated)")

    keys = commands.add_parser("keys", help="manage API keys")
    key_commands = keys.add_subparsers(dest="keys_command", required=True, metavar="ACTION")
    create = key_commands.add_parser(
        "create", help="create a key and print only its token",
        description="Create an API key in the records DB named by SEALFOLD_DATA_DIR / DATABASE_URL "
        "and print only the token (it is shown once; only its hash is stored).",
    )
    create.add_argument("--team", required=True)
    create.add_argument("--role", required=True, choices=ROLES)
    create.add_argument("--name", default="", help="a label for the key")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the process exit code."""
    args = build_parser().parse_args(argv)
    if args.command == "up":
        return cmd_up(args)
    if args.command == "worker":
        return cmd_worker(args)
    return cmd_keys_create(args)


def worker_argv(args: argparse.Namespace) -> list[str]:
    """The argv ``sealfold worker`` execs into."""
    argv = [sys.executable, "-m", "worker"]
    if args.burst:
        argv.append("--burst")
    if args.name:
        argv += ["--name", args.name]
    return argv


def cmd_worker(args: argparse.Namespace) -> int:
    """Replace this process with ``python -m worker`` (same interpreter, same environment)."""
    argv = worker_argv(args)
    os.execv(argv[0], argv)
    return 0  # not reached: execv does not return


def cmd_keys_create(args: argparse.Namespace) -> int:
    """Create a key and print only its token, so scripts can capture it."""
    from service.errors import SealfoldError
    from service.records.engine import make_engine
    from service.records.keys import create_key
    from service.settings import Settings

    try:
        engine = make_engine(Settings.load())
        try:
            _info, token = create_key(engine, args.team, args.role, args.name)
        finally:
            engine.dispose()
    except SealfoldError as exc:
        print(f"sealfold keys create: {exc.detail}", file=sys.stderr)
        return 2
    print(token)
    return 0


def cmd_up(args: argparse.Namespace) -> int:
    """Run the embedded stack until Ctrl-C/SIGTERM (exit 0) or until a child dies (exit 1)."""
    from pathlib import Path

    from service import embedded

    options = embedded.StackOptions(
        data_dir=Path(args.data_dir), host=args.host, port=args.port, workers=args.workers,
        redis_url=os.environ.get("REDIS_URL", ""), database_url=os.environ.get("DATABASE_URL", ""),
    )
    sup = embedded.Supervisor()
    sup.install_signal_handlers()
    with sup:
        try:
            stack = embedded.start_stack(sup, options)
            engine = _engine_for(stack)
            try:
                tokens = _create_demo_keys(engine)
                dataset = None if args.no_demo else _ensure_demo_dataset(sup, stack, engine, tokens["steward"])
            finally:
                engine.dispose()
            print(banner(stack, tokens, dataset), flush=True)
            sup.run_until_stopped()
            print("sealfold: stopping", file=sys.stderr, flush=True)
            return 0
        except embedded.StopRequested:
            print("sealfold: stopping", file=sys.stderr, flush=True)
            return 0
        except embedded.ChildExited as exc:
            tail = embedded.log_tail(exc.child.log_path)
            print(f"sealfold: {exc}; stopping the stack. Last lines of {exc.child.log_path}:\n{tail}",
                  file=sys.stderr, flush=True)
            return 1
        except embedded.StackError as exc:
            print(f"sealfold up: {exc}", file=sys.stderr, flush=True)
            return 1


def _engine_for(stack: Stack) -> Engine:
    from service.records.engine import make_engine
    from service.settings import Settings

    return make_engine(Settings.load(environ=stack.env))


def _create_demo_keys(engine: Engine) -> dict[str, str]:
    """Create a steward and a submitter key for the demo team; tokens are shown once, never stored."""
    from service.demo import DEMO_TEAM
    from service.records.keys import create_key

    return {
        role: create_key(engine, DEMO_TEAM, role, f"demo {role} (sealfold up)")[1]
        for role in ("steward", "submitter")
    }


def _ensure_demo_dataset(sup: Supervisor, stack: Stack, engine: Engine, steward_token: str) -> dict[str, Any]:
    """Reuse the demo dataset of this data dir, or write the demo CSV and register it over HTTP."""
    from service import demo
    from service.records import datasets
    from service.settings import Settings
    from service.vault.store import dataset_paths

    existing = datasets.find_by_name(engine, demo.DEMO_TEAM, demo.DEMO_NAME)
    if existing is not None:
        # With a shared DATABASE_URL the record may belong to another data dir: reuse only our own.
        paths = dataset_paths(Settings.load(environ=stack.env), existing["id"])
        if paths.development.exists() and paths.sealed_holdout.exists():
            return existing
    csv_path = demo.write_demo_csv(stack.options.data_dir)
    sup.check()
    from service.embedded import register_dataset

    return register_dataset(stack.base_url, steward_token, demo.demo_declaration(), csv_path)


def banner(stack: Stack, tokens: dict[str, str], dataset: dict[str, Any] | None) -> str:
    """The text ``sealfold up`` prints once the stack is ready."""
    from service.demo import demo_submission

    lines = [
        f"sealfold is up at {stack.base_url}",
        f"  data dir:  {stack.options.data_dir}",
        f"  records:   {_hide_password(stack.database_url)}",
        f"  redis:     {_hide_password(stack.redis_url)}",
        f"  workers:   {len(stack.workers)}",
        f"  logs:      {stack.log_dir}/",
        "",
        "Demo keys for team 'demo' (shown once; only their hashes are stored):",
        f"  steward:   {tokens['steward']}",
        f"  submitter: {tokens['submitter']}",
        "",
    ]
    if dataset is None:
        lines += [
            "No demo dataset (--no-demo). List what a configuration may use:",
            f"  curl -sS {stack.base_url}/v1/catalog -H 'Authorization: Bearer {tokens['submitter']}'",
        ]
    else:
        rows = dataset.get("rows", {})
        lines += [
            f"Demo dataset {dataset['id']} ({dataset.get('name')}: {rows.get('development')} development rows, "
            f"{rows.get('holdout')} sealed). Submit a Ridge configuration:",
            "",
            f"curl -sS -i -X POST {stack.base_url}/v1/submissions \\",
            f"  -H 'Authorization: Bearer {tokens['submitter']}' -H 'Content-Type: application/json' \\",
            f"  -d '{json.dumps(demo_submission(dataset['id']), separators=(',', ':'))}'",
            "",
            "then poll the Location it answers with the same Authorization header.",
        ]
    lines += ["", "Press Ctrl-C to stop."]
    return "\n".join(lines)


def _hide_password(url: str) -> str:
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    if url.startswith(("redis://", "rediss://", "unix://")):
        head, sep, tail = url.partition("@")
        if sep and ":" in head.split("//", 1)[-1]:
            scheme, _, creds = head.partition("//")
            return f"{scheme}//{creds.split(':', 1)[0]}:***@{tail}"
        return url
    try:
        return make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return url


if __name__ == "__main__":
    sys.exit(main())
