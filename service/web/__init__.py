"""The reviewer's desk: server-rendered pages for browsers, signed in with a key, under ``/desk``.

This package is API side (it imports Flask) and reads through the same core functions the JSON
API answers from, so a page never shows what the API would withhold. A browser signs in once with
a key and gets a session cookie (``session``); the JSON API never reads that cookie. Modules:
``session`` (cookie, CSRF, the next-page check), ``layout`` (page frame), ``guard`` (the decorator
every page wears), and one module per group of pages.
"""

from __future__ import annotations

from flask import Flask


def register_desk(app: Flask) -> None:
    """Register the desk's pages on ``app``."""
    from service.web import admin, compare, datasets, signin, steward, submission  # noqa: F401 (routes)
    from service.web.guard import desk

    app.register_blueprint(desk)
