"""Fixtures of the desk's tests: a browser-like test client that signs in through the sign-in form."""

from __future__ import annotations

from html.parser import HTMLParser
from typing import Any

from flask.testing import FlaskClient
from werkzeug.test import TestResponse


class _Inputs(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.values: dict[str, str] = {}

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        if tag == "input" and found.get("name") and found.get("type") != "radio":
            self.values.setdefault(str(found["name"]), found.get("value") or "")


def inputs(page: str) -> dict[str, str]:
    """Every named input of a page (radio buttons aside) and its value; the first of each name."""
    parser = _Inputs()
    parser.feed(page)
    return parser.values


def form_field(page: str, name: str) -> str:
    """The value of the first input called ``name`` in a page."""
    values = inputs(page)
    assert name in values, f"no input {name!r} in the page"
    return values[name]


def sign_in(client: FlaskClient, token: str, next_page: str | None = None, **extra: Any) -> TestResponse:
    """Open the sign-in form (as a browser would, getting its cookie), then send it with ``token``."""
    form = client.get("/desk/sign-in", query_string={"next": next_page} if next_page else None)
    assert form.status_code == 200, form.get_data(as_text=True)
    text = form.get_data(as_text=True)
    data = {"csrf": form_field(text, "csrf"), "next": form_field(text, "next"), "key": token, **extra}
    return client.post("/desk/sign-in", data=data)


def csrf_of(client: FlaskClient, path: str) -> str:
    """The CSRF token a signed-in page carries."""
    page = client.get(path)
    assert page.status_code == 200, page.get_data(as_text=True)
    return form_field(page.get_data(as_text=True), "csrf")
