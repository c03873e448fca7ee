"""The ``sealfold`` command: ``up`` (the embedded stack), ``worker``, ``db``, ``keys create``, and the client.

The client commands (``submit``, ``status``, ``board``, ``datasets``) talk HTTP to a service
anywhere (``service.cli.remote``); the others run or administer a local deployment.

Nothing heavy is imported at module level: ``sealfold keys create`` must answer quickly, and the
service package never imports Flask or scikit-learn outside ``service.api``/``service.app``. The
worker command execs ``python -m worker`` rather than importing it, keeping the dependency
direction one way (``worker`` imports ``service``, never the reverse).
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

from service.vocabulary import ROLES


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
    up.add_argument("--no-demo", action="store_true",
                    help="do not register the demo dataset; the demo keys are then created at a data dir's "
                    "first start only")

    worker = commands.add_parser("worker", help="run one worker (python -m worker)")
    worker.add_argument("--burst", action="store_true", help="exit once the queues are empty")
    worker.add_argument("--name", help="worker name shown in RQ (default: generated)")
    worker.add_argument("--checker", action="store_true",
                        help="serve configuration checks only, never folds; run at least one per deployment so "
                        "submissions are answered while every fold worker is busy")

    db = commands.add_parser(
        "db", help="the records database's schema",
        description="The records DB named by SEALFOLD_DATA_DIR / DATABASE_URL. Run `db upgrade` once per "
        "deployment, before the API and workers start; they refuse to run on a database that is behind.",
    )
    db_commands = db.add_subparsers(dest="db_command", required=True, metavar="ACTION")
    db_commands.add_parser("upgrade", help="apply the migrations the database lacks (safe to rerun)")
    db_commands.add_parser("current", help="print the database's revision; exit 1 unless it is this code's")

    saved = commands.add_parser(
        "backup", help="save the records DB and the data dir together into a new directory",
        description="Copy the SQLite records DB (an online, consistent snapshot) and then the data dir's files "
        "into DEST, which must not exist. With PostgreSQL records, run pg_dump first (see the README); this "
        "then copies the data dir alone. Restore: copy DEST back as SEALFOLD_DATA_DIR (and pg_restore).",
    )
    saved.add_argument("dest", help="a directory that does not exist yet")

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
    create.add_argument("--identity", default=None,
                        help="whose key it is (a person or CI identity); its keys share one holdout budget")
    add_client_commands(commands, key_commands)
    return parser


def _seconds(raw: str) -> float:
    value = float(raw)
    if not 0 < value <= 7 * 24 * 3600:
        raise argparse.ArgumentTypeError(f"must be between 0 and 604800 seconds, got {raw}")
    return value


def _poll_seconds(raw: str) -> float:
    value = float(raw)
    if not 0.05 <= value <= 600:
        raise argparse.ArgumentTypeError(f"must be between 0.05 and 600 seconds, got {raw}")
    return value


def _entries(raw: str) -> int:
    value = int(raw)
    if not 1 <= value <= 10_000:
        raise argparse.ArgumentTypeError(f"must be between 1 and 10000, got {value}")
    return value


CLIENT_EPILOG = ("exit codes: 0 passed (reading commands: answered); 1 failed, inconclusive, failed to run or "
                 "canceled; 2 usage or a request the service refused (4xx); 3 the service unreachable or failing "
                 "(connection refused, timeout, 5xx)")


def add_client_commands(commands: argparse._SubParsersAction[argparse.ArgumentParser],
                        key_commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the commands that talk HTTP to SEALFOLD_URL with SEALFOLD_KEY (every role's)."""
    from service.cli import access, steward

    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--url", help="service base URL (default: $SEALFOLD_URL)")
    common.add_argument("--key", help="API key (default: $SEALFOLD_KEY; prefer the variable, flags show in ps)")
    common.add_argument("--json", action="store_true", help="print the JSON document instead of a summary")
    submit = commands.add_parser(
        "submit", parents=[common], help="submit a model configuration for review", epilog=CLIENT_EPILOG,
        description="POST CONFIG.json (- for stdin) as a submission. The Idempotency-Key is derived from the "
        "file and the dataset, so rerunning the same job returns the first submission. Without --wait, print "
        "its id; with --wait, show fold progress on stderr and exit by the verdict.",
    )
    submit.add_argument("config", metavar="CONFIG.json")
    submit.add_argument("--dataset", help="dataset id, replacing the one in the file")
    submit.add_argument("--wait", action="store_true", help="wait for the verdict; the exit code follows it")
    submit.add_argument("--timeout", type=_seconds, default=3600.0,
                        help="seconds to wait with --wait before giving up with exit 3 (default 3600)")
    submit.add_argument("--poll", type=_poll_seconds, default=1.0, help="seconds between polls (default 1)")
    submit.add_argument("--idempotency-key", help="use this key instead of the derived one")
    status = commands.add_parser("status", parents=[common], help="show one submission", epilog=CLIENT_EPILOG)
    status.add_argument("id", metavar="ID")
    board = commands.add_parser("board", parents=[common], help="show a dataset's board", epilog=CLIENT_EPILOG)
    board.add_argument("dataset", metavar="DATASET")
    board.add_argument("--limit", type=_entries, default=20, help="entries to show (default 20)")
    commands.add_parser("datasets", parents=[common], help="list the team's datasets", epilog=CLIENT_EPILOG)
    steward.add_parsers(commands, common, CLIENT_EPILOG)
    access.add_parsers(key_commands, commands, common, CLIENT_EPILOG)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the process exit code."""
    args = build_parser().parse_args(argv)
    if args.command == "up":
        from service.cli.stack_up import cmd_up

        return cmd_up(args)
    if args.command == "worker":
        return cmd_worker(args)
    if args.command == "db":
        return cmd_db(args)
    if args.command == "backup":
        from service.cli.operations import cmd_backup

        return cmd_backup(args)
    from service.cli import remote

    if args.command in remote.CLIENT_COMMANDS or getattr(args, "keys_command", None) in remote.REMOTE_KEY_ACTIONS:
        return remote.run(args)
    return cmd_keys_create(args)


def worker_argv(args: argparse.Namespace) -> list[str]:
    """The argv ``sealfold worker`` execs into."""
    argv = [sys.executable, "-m", "worker"]
    if args.burst:
        argv.append("--burst")
    if args.name:
        argv += ["--name", args.name]
    if getattr(args, "checker", False):
        argv.append("--checker")
    return argv


def cmd_worker(args: argparse.Namespace) -> int:
    """Replace this process with ``python -m worker`` (same interpreter, same environment)."""
    argv = worker_argv(args)
    os.execv(argv[0], argv)
    return 0  # not reached: execv does not return


def cmd_db(args: argparse.Namespace) -> int:
    """Upgrade the records schema, or print its revision."""
    from service.ops.data_identity import DataNotShared, claim
    from service.records import schema
    from service.records.engine import make_engine
    from service.settings import Settings

    settings = Settings.load()
    engine = make_engine(settings)
    try:
        before = schema.current_revision(engine)
        if args.db_command == "upgrade":
            schema.upgrade(engine)
            after = schema.current_revision(engine)
            change = "already current" if after == before else f"upgraded from {before or 'none'}"
            print(f"records database at revision {after} ({change})")
            try:
                claim(engine, settings.data_dir)
            except DataNotShared as exc:
                print(f"sealfold db upgrade: {exc}", file=sys.stderr)
                return 1
            return 0
        print(before or "none")
        if before != schema.head_revision():
            print(f"sealfold db current: this code needs {schema.head_revision()}: run `sealfold db upgrade`",
                  file=sys.stderr)
            return 1
        return 0
    finally:
        engine.dispose()


def cmd_keys_create(args: argparse.Namespace) -> int:
    """Create a key and print only its token, so scripts can capture it."""
    from service.errors import SealfoldError
    from service.records.engine import make_engine
    from service.records.keys import create_key
    from service.records.schema import SchemaOutOfDate, require_current
    from service.settings import Settings

    try:
        engine = make_engine(Settings.load())
        try:
            require_current(engine)
            _info, token = create_key(engine, args.team, args.role, args.name, args.identity)
        finally:
            engine.dispose()
    except SealfoldError as exc:
        print(f"sealfold keys create: {exc.detail}", file=sys.stderr)
        return 2
    except SchemaOutOfDate as exc:
        print(f"sealfold keys create: {exc}", file=sys.stderr)
        return 2
    print(token)
    return 0


if __name__ == "__main__":
    sys.exit(main())
