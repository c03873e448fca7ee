"""The client commands of ``sealfold``: submit (and wait), status, board, datasets; and their dispatch.

The steward's commands are in ``service.cli.steward``, key and report commands in ``service.cli.access``,
and how every command prints a document in ``service.cli.text``.
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
from service.cli.text import board_text, datasets_text, dumps, plain, summary_text
from service.vocabulary import TERMINAL_STATES

_BAR_WIDTH = 24


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
