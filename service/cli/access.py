"""The admin's and the reader's client commands: issue and revoke API keys, open a submission's report.

``keys issue``/``keys revoke`` go through the API with an admin key and act on the admin's own team;
``keys create`` (``service.cli.main``) writes to the records DB of a local deployment instead, for a
first key or another team. ``report`` prints the report page's URL and, with ``--open``, hands it to
the system's browser (standard library ``webbrowser``), which asks for the key on the sign-in page
where the service has one.
"""

from __future__ import annotations

import argparse
import sys
import urllib.parse
import webbrowser

from service.cli.client import EXIT_PASS, ServiceClient, Trouble
from service.cli.text import dumps
from service.vocabulary import ROLES


def add_parsers(keys: argparse._SubParsersAction[argparse.ArgumentParser], commands: argparse._SubParsersAction[
        argparse.ArgumentParser], common: argparse.ArgumentParser, epilog: str) -> None:
    """Add ``keys issue``, ``keys revoke`` (under the keys group) and ``report``."""
    issue = keys.add_parser(
        "issue", parents=[common], epilog=epilog, help="create a key through the API (admin, own team)",
        description="Create an API key for the admin's team through the API and print only its token (shown "
        "once). For a first key, or another team, use `keys create` on the deployment's host.")
    issue.add_argument("--role", required=True, choices=ROLES)
    issue.add_argument("--name", default="", help="a label for the key")
    revoke = keys.add_parser("revoke", parents=[common], epilog=epilog,
                             help="revoke a key through the API (admin, own team)")
    revoke.add_argument("key_id", metavar="KEY_ID", help="the key's id (key_...), not its token")
    report = commands.add_parser("report", parents=[common], epilog=epilog,
                                 help="print a submission's report URL; --open shows it in a browser")
    report.add_argument("id", metavar="ID")
    report.add_argument("--open", action="store_true", help="open the report in the system's web browser")


def cmd_keys_issue(args: argparse.Namespace, client: ServiceClient) -> int:
    """POST /v1/keys and print only the token (or the whole answer with --json)."""
    created = client.call("POST", "/v1/keys", expect=(201,), json_body={"role": args.role, "name": args.name}).json()
    print(dumps(created) if args.json else created["token"])
    print(f"sealfold keys issue: key {created['id']} ({created['role']}, team {created['team']}); the token is "
          "shown once", file=sys.stderr)
    return EXIT_PASS


def cmd_keys_revoke(args: argparse.Namespace, client: ServiceClient) -> int:
    """DELETE /v1/keys/{id}; revoking a revoked key is not an error."""
    client.call("DELETE", f"/v1/keys/{urllib.parse.quote(args.key_id, safe='')}", expect=(204,))
    print(f"revoked {args.key_id}")
    return EXIT_PASS


def cmd_report(args: argparse.Namespace, client: ServiceClient) -> int:
    """Check the submission is readable, print its report URL, and with --open launch the browser."""
    sub = urllib.parse.quote(args.id, safe="")
    client.call("GET", f"/v1/submissions/{sub}")  # an unknown id is refused here, not in the browser
    url = f"{client.base_url}/v1/submissions/{sub}/report"
    print(url)
    if args.open and not webbrowser.open(url):
        raise Trouble(f"no web browser could be started; open {url} yourself")
    return EXIT_PASS
