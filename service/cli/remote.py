"""The client commands of ``sealfold``: submit (and wait), status, board, datasets; and their dispatch.

The steward's commands are in ``service.cli.steward``, key and report commands in ``service.cli.access``.
Exit codes, the same for every command: 0 passed (or, for commands that only read or act, answered);
1 the submission failed its review, was inconclusive, failed to run or was canceled (``status`` of a
failed or canceled submission, with the reason on stderr); 2 the
request is wrong (usage, a 4xx problem: its detail and field errors go to stderr); 3 the service
could not be reached or failed (connection refused, timeout, 5xx). Results go to stdout (a
summary, or the JSON document with ``--json``); progress and errors go to stderr.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
import time
import urllib.parse
from pathlib import Path
from typing import IO, Any

from service.cli.client import (
    EXIT_NOT_PASSED,
    EXIT_PASS,
    ClientError,
    Refused,
    ServiceClient,
    Trouble,
)
from service.vocabulary import TERMINAL_STATES

_BAR_WIDTH = 24
_PLAIN = {c: " " for c in [*range(0x00, 0x20), *range(0x7F, 0xA0)]}  # no terminal control codes


def run(args: argparse.Namespace) -> int:
    """Run one client command; turn client errors into their exit code and a message on stderr."""
    from service.cli import access, steward

    commands = {"submit": cmd_submit, "status": cmd_status, "board": cmd_board, "datasets": cmd_datasets,
                "register": steward.cmd_register, "policy": steward.cmd_policy, "rejudge": steward.cmd_rejudge,
                "champion": steward.cmd_champion, "report": access.cmd_report,
                "keys issue": access.cmd_keys_issue, "keys revoke": access.cmd_keys_revoke}
    name = args.command if args.command != "keys" else f"keys {args.keys_command}"
    try:
        return commands[name](args, connect(args))
    except ClientError as exc:
        print(f"sealfold {name}: {exc.message}", file=sys.stderr)
        return exc.exit_code


CLIENT_COMMANDS = ("submit", "status", "board", "datasets", "register", "policy", "rejudge", "champion", "report")
REMOTE_KEY_ACTIONS = ("issue", "revoke")


def connect(args: argparse.Namespace) -> ServiceClient:
    """Build the client from --url/--key, else SEALFOLD_URL/SEALFOLD_KEY."""
    url = args.url or os.environ.get("SEALFOLD_URL", "")
    key = args.key or os.environ.get("SEALFOLD_KEY", "")
    if not url:
        raise Refused("no service URL: set SEALFOLD_URL or pass --url (e.g. http://127.0.0.1:8080)")
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.netloc:
        raise Refused(f"the service URL must be http(s)://host[:port], got {url!r}")
    if not key:
        raise Refused("no API key: set SEALFOLD_KEY or pass --key")
    return ServiceClient(url, key)


# -- submit ---------------------------------------------------------------------------------------

def idempotency_key(content: bytes, dataset: Any) -> str:
    """Derive the key from the file's bytes and the dataset, so rerunning the same job replays it."""
    digest = hashlib.sha256()
    digest.update(b"sealfold-submit\x00")
    digest.update(json.dumps(dataset, sort_keys=True).encode("utf-8"))
    digest.update(b"\x00")
    digest.update(content)
    return "cli-" + digest.hexdigest()


def read_config(path: str, dataset: str | None) -> tuple[dict[str, Any], bytes]:
    """Read CONFIG.json; --dataset replaces its dataset. Unreadable or not an object -> Refused."""
    try:
        content = sys.stdin.buffer.read() if path == "-" else Path(path).read_bytes()
    except OSError as exc:
        raise Refused(f"cannot read {path}: {exc.strerror or exc}") from exc
    try:
        document = json.loads(content)
    except ValueError as exc:
        raise Refused(f"{path} is not valid JSON: {exc}") from exc
    if not isinstance(document, dict):
        raise Refused(f"{path} must hold a JSON object (a model configuration), got {type(document).__name__}")
    if dataset is not None:
        document["dataset"] = dataset
    if "dataset" not in document:
        raise Refused(f"{path} names no dataset: add \"dataset\": \"ds_...\" or pass --dataset")
    return document, content


def cmd_submit(args: argparse.Namespace, client: ServiceClient) -> int:
    """POST the configuration; without --wait print its id, with --wait follow it to its verdict."""
    document, content = read_config(args.config, args.dataset)
    key = args.idempotency_key or idempotency_key(content, document["dataset"])
    reply = client.call("POST", "/v1/submissions", expect=(200, 202), json_body=document,
                        headers={"Idempotency-Key": key})
    submission = reply.json()
    if reply.status == 200:
        note = (submission.get("resubmission") or {}).get("message")
        print(f"sealfold submit: {plain(note)}" if note else
              f"sealfold submit: {submission['id']} was already submitted (same configuration); following it",
              file=sys.stderr)
    if not args.wait:
        print(dumps(submission) if args.json else submission["id"])
        return EXIT_PASS
    final = wait_for(client, submission, args.timeout, args.poll, Progress(sys.stderr))
    print(dumps(final) if args.json else summary_text(final, client.base_url))
    return outcome_code(final)


def is_finished(document: dict[str, Any]) -> bool:
    """Finished: failed or canceled, or succeeded with its verdict given."""
    state = document.get("state")
    if state == "succeeded":
        return bool((document.get("result") or {}).get("verdict"))
    return state in TERMINAL_STATES


def outcome_code(document: dict[str, Any]) -> int:
    """0 for a pass; 1 for fail, inconclusive, a failed run or a canceled one."""
    verdict = (document.get("result") or {}).get("verdict") or {}
    return EXIT_PASS if document.get("state") == "succeeded" and verdict.get("decision") == "pass" \
        else EXIT_NOT_PASSED


def wait_for(client: ServiceClient, submission: dict[str, Any], timeout: float, poll: float,
             progress: Progress) -> dict[str, Any]:
    """Poll the submission with If-None-Match until it is finished; past ``timeout`` raise Trouble."""
    path = f"/v1/submissions/{submission['id']}"
    deadline = time.monotonic() + timeout
    document, etag = submission, None
    try:
        while True:
            progress.show(document)
            if is_finished(document):
                return document
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise Trouble(f"gave up waiting after {timeout:g} s; {submission['id']} is still "
                              f"{document.get('state')} and carries on: see `sealfold status {submission['id']}`")
            time.sleep(min(poll, remaining))
            headers: dict[str, str] = {} if etag is None else {"If-None-Match": etag}
            reply = client.call("GET", path, expect=(200, 304), headers=headers,
                                timeout=max(1.0, min(client.timeout, deadline - time.monotonic())))
            if reply.status == 200:
                document, etag = reply.json(), reply.headers.get("etag")
    finally:
        progress.close()


class Progress:
    """Fold progress on stderr: a bar redrawn in place on a terminal, a line per change otherwise."""

    def __init__(self, stream: IO[str]) -> None:
        self.stream = stream
        self.tty = stream.isatty()
        self.last: tuple[Any, ...] | None = None
        self.drawn = False

    def show(self, document: dict[str, Any]) -> None:
        progress = document.get("progress") or {}
        done, total = int(progress.get("folds_done") or 0), int(progress.get("folds_total") or 0)
        phase = _phase(document, done, total)
        if self.tty:
            filled = _BAR_WIDTH * done // total if total else 0
            bar = "#" * filled + "-" * (_BAR_WIDTH - filled)
            self.stream.write(f"\r{document['id']} [{bar}] {done}/{total} folds  {phase:<28}")
            self.drawn = True
        elif (done, total, phase) != self.last:
            self.stream.write(f"{document['id']}: {done}/{total} folds done, {phase}\n")
        self.last = (done, total, phase)
        self.stream.flush()

    def close(self) -> None:
        if self.tty and self.drawn:
            self.stream.write("\n")
            self.stream.flush()
            self.drawn = False


def _phase(document: dict[str, Any], done: int, total: int) -> str:
    state = str(document.get("state"))
    if state == "running" and total and done >= total:
        return "scoring the holdout"
    if state == "succeeded" and not (document.get("result") or {}).get("verdict"):
        return "judging"
    return state


# -- reading commands -----------------------------------------------------------------------------

def cmd_status(args: argparse.Namespace, client: ServiceClient) -> int:
    """Print one submission (summary or JSON); exit 1 with the reason if it failed to run or was canceled."""
    document = client.call("GET", f"/v1/submissions/{urllib.parse.quote(args.id, safe='')}").json()
    print(dumps(document) if args.json else summary_text(document, client.base_url))
    state = document.get("state")
    if state in ("failed", "canceled"):
        why = plain(document.get("error") or "no reason was recorded") if state == "failed" else "it was canceled"
        print(f"sealfold status: {document['id']} {state}: {why}", file=sys.stderr)
        return EXIT_NOT_PASSED
    return EXIT_PASS


def cmd_board(args: argparse.Namespace, client: ServiceClient) -> int:
    """Print the dataset's board, following cursors until --limit entries."""
    path = f"/v1/datasets/{urllib.parse.quote(args.dataset, safe='')}/board"
    entries: list[dict[str, Any]] = []
    cursor: str | None = None
    while True:
        query = {"limit": min(200, args.limit - len(entries))} | ({"cursor": cursor} if cursor else {})
        page = client.call("GET", f"{path}?{urllib.parse.urlencode(query)}").json()
        entries += page["entries"]
        cursor = page.get("next_cursor")
        if cursor is None or len(entries) >= args.limit:
            break
    board = {**page, "entries": entries, "next_cursor": cursor}
    print(dumps(board) if args.json else board_text(board))
    return EXIT_PASS


def cmd_datasets(args: argparse.Namespace, client: ServiceClient) -> int:
    """Print the team's datasets."""
    document = client.call("GET", "/v1/datasets").json()
    print(dumps(document) if args.json else datasets_text(document["datasets"]))
    return EXIT_PASS


# -- text -----------------------------------------------------------------------------------------

def plain(value: Any) -> str:
    """User-given text without terminal control characters."""
    return str(value).translate(_PLAIN)


def num(value: Any, digits: int = 4) -> str:
    return "-" if not isinstance(value, int | float) or isinstance(value, bool) else f"{value:.{digits}g}"


def summary_text(document: dict[str, Any], base_url: str) -> str:
    """A readable summary of one submission: verdict and reasons, then the figures."""
    result = document.get("result") or {}
    verdict = result.get("verdict") or {}
    progress = document.get("progress") or {}
    lines = [f"{document['id']}  {plain(document.get('label') or '')}".rstrip(),
             f"  dataset {document.get('dataset')} · state {document.get('state')} · "
             f"{progress.get('folds_done')}/{progress.get('folds_total')} folds"]
    if document.get("error"):
        lines.append(f"  error: {plain(document['error'])}")
    if verdict:
        lines.append(f"verdict: {str(verdict.get('decision')).upper()}")
        lines += [f"  - {plain(reason)}" for reason in verdict.get("reasons") or []]
    else:
        lines.append("verdict: none yet")
    summary = (result.get("cv") or {}).get("summary") or {}
    baseline = (result.get("baseline") or {}).get("summary") or {}
    holdout = result.get("holdout") or {}
    primary = verdict.get("primary_metric")
    metrics = sorted(summary, key=lambda m: (m != primary, m))
    for metric in metrics:
        item = summary.get(metric) or {}
        interval = item.get("naive_interval_95")
        shown = f" (naive 95 % interval {num(interval[0])} to {num(interval[1])})" if interval else ""
        released = (holdout.get("scores") or {}).get(metric) if holdout.get("released") else None
        held = f"  holdout {num(released)} ({holdout.get('mode')})" if released is not None else ""
        if holdout.get("ladder"):  # the ladder's figure is the dataset's best so far: said on its own line below
            held = ""
        lines.append(f"  {metric:<18} CV {num(item.get('mean'))}{shown}  baseline "
                     f"{num((baseline.get(metric) or {}).get('mean'))}{held}")
    if holdout.get("ladder"):
        lines.append(f"  holdout: {plain(holdout.get('summary') or '')}")
    elif holdout and not holdout.get("released") and holdout.get("note"):
        lines.append(f"  holdout: {plain(holdout['note'])}")
    lines.append(f"report: {base_url}/v1/submissions/{document['id']}/report")
    return "\n".join(lines)


def board_text(board: dict[str, Any]) -> str:
    """The board as a table, champion marked with *."""
    direction = "higher" if board.get("greater_is_better") else "lower"
    metric = board.get("primary_metric")
    lines = [f"board of {board.get('dataset')}: ranked by {metric} ({direction} is better), policy "
             f"version {board.get('policy_version')}"]
    rows: list[tuple[Any, ...]] = [("rank", "submission", "label", f"CV {metric}", "naive 95 % interval",
                                    "holdout (as released)", "released under", "verdict (policy)", "submitter",
                                    "created")]
    for e in board["entries"]:
        interval = e["cv"].get("naive_interval_95")
        holdout = e["holdout"]
        rows.append((
            f"{e['rank']}{' *' if e.get('champion') else ''}", e["submission"], plain(e.get("label") or "")[:28],
            num(e["cv"].get("mean")), f"{num(interval[0])} to {num(interval[1])}" if interval else "-",
            _board_holdout(holdout), _released_under(holdout),
            _judged(e), plain((e.get("submitter") or {}).get("name") or "")[:24],
            str(e.get("created_at") or "")[:10],
        ))
    if not board["entries"]:
        return "\n".join([*lines, "no ranked submissions yet"])
    lines += table(rows)
    if any(e.get("champion") for e in board["entries"]):
        lines.append("* champion")
    if any(e["holdout"].get("ladder") for e in board["entries"]):
        lines.append("ladder figures are the dataset's best holdout so far, not the row's own: \"new best\" marks "
                     "the rows that set one")
    if any(e.get("judged_under_policy_in_force") is False for e in board["entries"]):
        lines.append(f"! judged under an older policy than version {board.get('policy_version')}: a steward "
                     f"re-judges them with `sealfold rejudge --dataset {board.get('dataset')}`")
    if board.get("mixed_policies"):
        lines.append(f"note: {plain(board['mixed_policies'])}")
    if board.get("next_cursor"):
        lines.append("(more entries: raise --limit)")
    return "\n".join(lines)


def _judged(entry: dict[str, Any]) -> str:
    """A board row's verdict and the policy version it was judged under, marked when that is not the one in force."""
    if not entry.get("verdict"):
        return "-"
    stale = " !" if entry.get("judged_under_policy_in_force") is False else ""
    return f"{entry['verdict']} v{entry.get('policy_version')}{stale}"


def _board_holdout(holdout: dict[str, Any]) -> str:
    """A board row's holdout cell: a ladder figure says whether the row set the best or only shows it."""
    if not holdout.get("released"):
        return "withheld" if holdout.get("mode") else "-"
    ladder = holdout.get("ladder")
    if ladder:
        best = num(ladder["best_so_far"])
        return f"new best {best}" if ladder["new_best"] else f"best so far {best}, not its own"
    return num(holdout.get("score"))


def _released_under(holdout: dict[str, Any]) -> str:
    """A board row's release mode and policy version, so figures of different policies are told apart."""
    if not holdout.get("mode"):
        return "-"
    version = holdout.get("policy_version")
    return f"{holdout['mode']} v{version}" if version is not None else str(holdout["mode"])


def datasets_text(datasets: list[dict[str, Any]]) -> str:
    """The team's datasets as a table."""
    if not datasets:
        return "no datasets yet"
    rows: list[tuple[Any, ...]] = [("id", "name", "task", "target", "development", "holdout", "fold plan",
                                    "created")]
    for d in datasets:
        plan = d.get("fold_plan") or {}
        rows.append((d["id"], plain(d.get("name"))[:28], d.get("task"), plain(d.get("target"))[:20],
                     str((d.get("rows") or {}).get("development")), str((d.get("rows") or {}).get("holdout")),
                     f"{plan.get('scheme')} x{plan.get('folds')}", str(d.get("created_at") or "")[:10]))
    return "\n".join(table(rows))


def table(rows: list[tuple[Any, ...]]) -> list[str]:
    widths = [max(len(str(r[i])) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in rows]


def dumps(document: Any) -> str:
    return json.dumps(document, indent=2, sort_keys=True)
