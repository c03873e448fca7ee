"""``sealfold up``: the embedded stack (redis, API, workers, a checker) with demo keys and a demo dataset.

Run until Ctrl-C/SIGTERM. The demo keys are minted once per data dir (``demo_keys_once`` with
``--no-demo``), and the banner says how to reach the service and submit to it.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from sqlalchemy import Engine

    from service.cli.embedded import Stack
    from service.cli.supervisor import Supervisor


def cmd_up(args: argparse.Namespace) -> int:
    """Run the embedded stack until Ctrl-C/SIGTERM (exit 0) or until a child dies (exit 1)."""
    from pathlib import Path

    from service.cli import embedded, supervisor

    options = embedded.StackOptions(
        data_dir=Path(args.data_dir), host=args.host, port=args.port, workers=args.workers,
        redis_url=os.environ.get("REDIS_URL", ""), database_url=os.environ.get("DATABASE_URL", ""),
    )
    sup = supervisor.Supervisor()
    sup.install_signal_handlers()
    with sup:
        try:
            stack = embedded.start_stack(sup, options)
            engine = _engine_for(stack)
            try:
                if args.no_demo:
                    tokens, dataset = demo_keys_once(engine), None
                else:
                    tokens = _create_demo_keys(engine)
                    dataset = _ensure_demo_dataset(sup, stack, engine, tokens["steward"])
            finally:
                engine.dispose()
            print(banner(stack, tokens, dataset), flush=True)
            sup.run_until_stopped()
            print("sealfold: stopping", file=sys.stderr, flush=True)
            return 0
        except supervisor.StopRequested:
            print("sealfold: stopping", file=sys.stderr, flush=True)
            return 0
        except supervisor.ChildExited as exc:
            tail = supervisor.log_tail(exc.child.log_path)
            print(f"sealfold: {exc}; stopping the stack. Last lines of {exc.child.log_path}:\n{tail}",
                  file=sys.stderr, flush=True)
            return 1
        except supervisor.StackError as exc:
            print(f"sealfold up: {exc}", file=sys.stderr, flush=True)
            return 1


def _engine_for(stack: Stack) -> Engine:
    from service.records.engine import make_engine
    from service.settings import Settings

    return make_engine(Settings.load(environ=stack.env))


_DEMO_ROLES = ("steward", "submitter")


def _demo_key_name(role: str) -> str:
    return f"demo {role} (sealfold up)"


def _create_demo_keys(engine: Engine) -> dict[str, str]:
    """Create a steward and a submitter key for the demo team; tokens are shown once, never stored."""
    from service.cli.demo import DEMO_TEAM
    from service.records.keys import create_key

    return {role: create_key(engine, DEMO_TEAM, role, _demo_key_name(role))[1] for role in _DEMO_ROLES}


def demo_keys_once(engine: Engine) -> dict[str, str]:
    """Create the demo keys on the first start of a records DB only; return their tokens, or {} later.

    Without the demo dataset nothing needs a fresh key at each start, and keys minted at every start
    would pile up. The tokens were shown once, at that first start; only their hashes are stored.
    """
    from service.cli.demo import DEMO_TEAM
    from service.records.keys import live_keys_named

    if any(live_keys_named(engine, DEMO_TEAM, _demo_key_name(role)) for role in _DEMO_ROLES):
        return {}
    return _create_demo_keys(engine)


def _ensure_demo_dataset(sup: Supervisor, stack: Stack, engine: Engine, steward_token: str) -> dict[str, Any]:
    """Reuse the demo dataset of this data dir, or write the demo CSV and register it over HTTP."""
    from service.cli import demo
    from service.records import datasets
    from service.settings import Settings
    from service.vault.store import dataset_paths

    # With a shared DATABASE_URL the demo's record may belong to another data dir: reuse only our own,
    # and since names are unique within a team, register ours under a name of its data dir then.
    here = hashlib.sha256(str(stack.options.data_dir.resolve()).encode("utf-8")).hexdigest()[:8]
    name = demo.DEMO_NAME
    for name in (demo.DEMO_NAME, f"{demo.DEMO_NAME} ({here})"):
        existing = datasets.find_by_name(engine, demo.DEMO_TEAM, name)
        if existing is None:
            break
        paths = dataset_paths(Settings.load(environ=stack.env), existing["id"])
        if paths.development.exists() and paths.sealed_holdout.exists():
            return existing
    csv_path = demo.write_demo_csv(stack.options.data_dir)
    sup.check()
    from service.cli.embedded import register_dataset

    return register_dataset(stack.base_url, steward_token, {**demo.demo_declaration(), "name": name}, csv_path)


def banner(stack: Stack, tokens: dict[str, str], dataset: dict[str, Any] | None) -> str:
    """The text ``sealfold up`` prints once the stack is ready."""
    from service.cli.demo import demo_submission

    lines = [
        f"sealfold is up at {stack.base_url}",
        f"  data dir:  {stack.options.data_dir}",
        f"  records:   {_hide_password(stack.database_url)}",
        f"  redis:     {_hide_password(stack.redis_url)}",
        f"  workers:   {len(stack.workers)}",
        f"  logs:      {stack.log_dir}/",
        "",
    ]
    if tokens:
        lines += [
            "Demo keys for team 'demo' (shown once; only their hashes are stored):",
            f"  steward:   {tokens['steward']}",
            f"  submitter: {tokens['submitter']}",
            "",
        ]
    else:
        lines += [
            "The demo keys of this data dir were shown at its first start (only their hashes are stored).",
            "Create another key with:",
            f"  SEALFOLD_DATA_DIR={stack.options.data_dir} sealfold keys create --team demo --role submitter",
            "",
        ]
    if dataset is None:
        shown = tokens.get("submitter", "<key>")
        lines += [
            "No demo dataset (--no-demo). List what a configuration may use:",
            f"  curl -sS {stack.base_url}/v1/catalog -H 'Authorization: Bearer {shown}'",
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

