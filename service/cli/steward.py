"""The steward's client commands: register a dataset, show and set its policy, re-judge, promote a champion.

Each is one or a few requests through ``ServiceClient``, with the exit codes of every client command
(``service.cli.remote``): 0 done, or for ``rejudge SUBMISSION`` the new verdict passed; 1 the re-judged
verdict did not pass; 2 refused (the API's problem, its field messages one per line); 3 the service
could not answer.
"""

from __future__ import annotations

import argparse
import json
import sys
import urllib.parse
from pathlib import Path
from typing import Any

from service.cli.client import EXIT_NOT_PASSED, EXIT_PASS, Refused, ServiceClient, failure
from service.cli.text import dumps, num, plain, table
from service.vocabulary import TASKS

_FORMAT_TYPES = {".csv": "text/csv", ".parquet": "application/vnd.apache.parquet",
                 ".pq": "application/vnd.apache.parquet"}
_DECLARED = ("name", "task", "target", "id_column", "group_column", "time_column", "holdout_fraction",
             "holdout_scheme", "folds", "fold_scheme")
REGISTER_TIMEOUT_SECONDS = 1800.0  # sealing a million rows takes minutes


def add_parsers(commands: argparse._SubParsersAction[argparse.ArgumentParser], common: argparse.ArgumentParser,
                epilog: str) -> None:
    """Add register, policy, rejudge and champion."""
    register = commands.add_parser(
        "register", parents=[common], epilog=epilog, help="register a dataset and seal its holdout (steward)",
        description="Upload FILE (CSV or Parquet) as a new dataset, or with --import register a file already "
        "under the server's import root (FILE is then a path relative to that root).")
    register.add_argument("file", metavar="FILE")
    register.add_argument("--import", dest="by_path", action="store_true",
                          help="FILE is a path under the server's import root; nothing is uploaded")
    register.add_argument("--name", required=True, help="unique within the team")
    register.add_argument("--task", required=True, choices=TASKS)
    register.add_argument("--target", required=True, help="the column to predict")
    for column in ("id-column", "group-column", "time-column"):
        register.add_argument(f"--{column}")
    register.add_argument("--holdout-fraction", type=float)
    register.add_argument("--holdout-scheme")
    register.add_argument("--folds", type=int)
    register.add_argument("--fold-scheme")

    policy = commands.add_parser(
        "policy", parents=[common], epilog=epilog, help="show a dataset's review policy, or set it (steward)",
        description="Print the policy in force. With --set FILE.json, store the policy in the file as a new "
        "version; a policy the API refuses prints its message for each field and exits 2.")
    policy.add_argument("dataset", metavar="DATASET")
    policy.add_argument("--set", dest="policy_file", metavar="FILE.json", help="the whole policy as JSON "
                        "(fields left out take the task's defaults; - reads stdin)")

    rejudge = commands.add_parser(
        "rejudge", parents=[common], epilog=epilog, help="re-judge under the policy in force (steward)",
        description="Recompute a submission's verdict under the dataset's policy and champion in force, from "
        "its stored fold scores (nothing is refitted). With --dataset, re-judge every submission of the dataset "
        "judged under another policy version. Exit code of one submission: by its new verdict.")
    target = rejudge.add_mutually_exclusive_group(required=True)
    target.add_argument("submission", metavar="SUBMISSION", nargs="?")
    target.add_argument("--dataset", help="re-judge the dataset's submissions judged under another policy")

    champion = commands.add_parser(
        "champion", parents=[common], epilog=epilog, help="show a dataset's champion, or promote one (steward)",
        description="Print the champion in force and the promotions. With --promote, make a submission whose "
        "verdict is pass the champion; later submissions are compared with it.")
    champion.add_argument("dataset", metavar="DATASET")
    champion.add_argument("--promote", metavar="SUBMISSION")


def cmd_register(args: argparse.Namespace, client: ServiceClient) -> int:
    """Register FILE (upload, or --import by path) and print the new dataset."""
    fields = {name: getattr(args, name) for name in _DECLARED}
    if args.by_path:
        body = {"path": args.file, **{k: v for k, v in fields.items() if v is not None}}
        reply = client.call("POST", "/v1/datasets", expect=(201,), json_body=body,
                            timeout=REGISTER_TIMEOUT_SECONDS)
    else:
        path = Path(args.file)
        try:
            content = path.read_bytes()
        except OSError as exc:
            raise Refused(f"cannot read {args.file}: {exc.strerror or exc}") from exc
        reply = client.upload("/v1/datasets", path.name, content, fields,
                              file_type=_FORMAT_TYPES.get(path.suffix.lower(), "application/octet-stream"),
                              timeout=REGISTER_TIMEOUT_SECONDS)
        if reply.status != 201:
            raise failure(reply, "POST /v1/datasets")
    record = reply.json()
    print(dumps(record) if args.json else dataset_text(record))
    return EXIT_PASS


def dataset_text(record: dict[str, Any]) -> str:
    """A registered dataset: id, rows per partition, fold plan, and each column with its missing values."""
    rows, plan = record.get("rows") or {}, record.get("fold_plan") or {}
    lines = [f"{record['id']}  {plain(record.get('name'))}",
             f"  {record.get('task')} on {plain(record.get('target'))}: {rows.get('development')} development rows, "
             f"{rows.get('holdout')} sealed; folds: {plan.get('scheme')} x{plan.get('folds')}"]
    cells: list[tuple[Any, ...]] = [("column", "kind", "missing (development rows)")]
    cells += [(plain(c.get("name")), c.get("kind"), "-" if c.get("missing") is None else str(c["missing"]))
              for c in record.get("columns") or []]
    return "\n".join(lines + ["  " + line for line in table(cells)])


def cmd_policy(args: argparse.Namespace, client: ServiceClient) -> int:
    """Print the policy in force, or PUT the one in --set and print what is now in force."""
    path = f"/v1/datasets/{_quote(args.dataset)}/policy"
    if args.policy_file is None:
        document = client.call("GET", path).json()
    else:
        document = client.call("PUT", path, json_body=read_json_file(args.policy_file, "a policy")).json()
    print(dumps(document) if args.json else policy_text(document))
    return EXIT_PASS


def read_json_file(path: str, what: str) -> dict[str, Any]:
    """Read a JSON object from ``path`` (- for stdin); unreadable or not an object -> Refused."""
    try:
        content = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
        document = json.loads(content)
    except OSError as exc:
        raise Refused(f"cannot read {path}: {exc.strerror or exc}") from exc
    except ValueError as exc:
        raise Refused(f"{path} is not valid JSON: {exc}") from exc
    if not isinstance(document, dict):
        raise Refused(f"{path} must hold a JSON object ({what}), got {type(document).__name__}")
    return document


def policy_text(policy: dict[str, Any]) -> str:
    """The policy, one rule per line."""
    gap, release = policy.get("holdout_gap") or {}, policy.get("release") or {}
    direction = "higher" if policy.get("greater_is_better") else "lower"
    version = policy.get("version")
    return "\n".join([
        f"policy version {version}" + (" (the task's default, never set)" if version == 0 else ""),
        f"  primary metric   {policy.get('primary_metric')} ({direction} is better)",
        f"  bar              {num(policy.get('bar')) if policy.get('bar') is not None else 'none'}",
        f"  baseline         one-sided test at level {num(policy.get('baseline_alpha'))}",
        f"  champion         margin {num(policy.get('champion_margin'))}, level {num(policy.get('champion_alpha'))}",
        f"  holdout vs CV    within {num(gap.get('k_std'))} x expected spread + {num(gap.get('floor'))}",
        f"  fold spread      {'at most ' + num(policy['max_fold_std']) if policy.get('max_fold_std') else 'no limit'}",
        f"  holdout release  {release.get('mode')}, {release.get('budget')} per submitter per "
        f"{num(release.get('window_hours'))} h",
    ])


def cmd_rejudge(args: argparse.Namespace, client: ServiceClient) -> int:
    """Re-judge one submission (exit by its verdict) or every stale one of a dataset (exit 0 when done)."""
    if args.dataset is None:
        done = client.call("POST", f"/v1/submissions/{_quote(args.submission)}/verdicts").json()
        print(dumps(done) if args.json else _rejudged_line(done))
        return EXIT_PASS if (done.get("verdict") or {}).get("decision") == "pass" else EXIT_NOT_PASSED
    path, results, after = f"/v1/datasets/{_quote(args.dataset)}/verdicts", [], None
    version = None
    while True:
        page = client.call("POST", path, json_body={"limit": 200} | ({"after": after} if after else {})).json()
        results += page["results"]
        version, after = page["policy_version"], page.get("next_after")
        if after is None:
            break
    if args.json:
        print(dumps({"dataset": args.dataset, "policy_version": version, "results": results}))
    else:
        lines = [f"{sum(r['rejudged'] for r in results)} of {len(results)} submissions re-judged under policy "
                 f"version {version}"]
        print("\n".join(lines + [_rejudged_line(r) for r in results]))
    return EXIT_PASS


def _rejudged_line(done: dict[str, Any]) -> str:
    before, after = done.get("before") or {}, done.get("after") or {}
    spent = " (used 1 holdout release of the submitter's budget)" if done.get("holdout_spent") else ""
    return (f"{done['submission']}: {before.get('decision')} (policy v{before.get('policy_version')}) -> "
            f"{after.get('decision')} (policy v{after.get('policy_version')}){spent}\n  {plain(done.get('note'))}")


def cmd_champion(args: argparse.Namespace, client: ServiceClient) -> int:
    """Print the champion and the promotions; with --promote, promote first."""
    path = f"/v1/datasets/{_quote(args.dataset)}/champion"
    if args.promote is None:
        state = client.call("GET", path).json()
    else:
        state = client.call("POST", path, json_body={"submission": args.promote}).json()
    print(dumps(state) if args.json else champion_text(state))
    return EXIT_PASS


def champion_text(state: dict[str, Any]) -> str:
    champion = state.get("champion")
    if not champion:
        return f"no champion on {state.get('dataset')} yet"
    lines = [f"champion of {state.get('dataset')}: {champion['submission']}  {plain(champion.get('label') or '')}",
             f"  promoted {champion.get('promoted_at')} by {champion.get('promoted_by')}"]
    lines += [f"  earlier: {p['submission']} ({p.get('promoted_at')})" for p in (state.get("history") or [])[1:]]
    return "\n".join(lines)


def _quote(value: str) -> str:
    return urllib.parse.quote(value, safe="")
