"""Build HTML and SVG where escaping is the default: text is escaped unless it is already ``Markup``.

Labels, column names, estimator messages and reasons come from users; a page assembled with
``element`` cannot carry them unescaped, because the only way to put text in unescaped is to
produce it with ``element`` (or ``Markup`` for constant snippets written here).
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Mapping


class Markup(str):
    """Text that is already safe HTML (built by ``element`` or a constant of this package)."""

    __slots__ = ()


def escape(value: object) -> Markup:
    """Escape text for element content and quoted attribute values."""
    if isinstance(value, Markup):
        return value
    return Markup(html.escape(str(value), quote=True))


def render(child: object) -> Markup:
    """Render a child: Markup as is, None as nothing, iterables joined, anything else escaped."""
    if child is None:
        return Markup("")
    if isinstance(child, Markup):
        return child
    if isinstance(child, str | int | float):
        return escape(child)
    if isinstance(child, Iterable):
        return Markup("".join(render(c) for c in child))
    return escape(child)


def element(tag: str, attrs: Mapping[str, object] | None = None, *children: object) -> Markup:
    """Return ``<tag attrs>children</tag>``; attributes with value None or False are left out."""
    parts = [tag]
    for name, value in (attrs or {}).items():
        if value is None or value is False:
            continue
        parts.append(name if value is True else f'{name}="{escape(_attr_text(value))}"')
    opening = "<" + " ".join(parts) + ">"
    if tag in _VOID:
        return Markup(opening)
    return Markup(f"{opening}{render(children)}</{tag}>")


def _attr_text(value: object) -> str:
    if isinstance(value, float):
        return f"{value:.2f}".rstrip("0").rstrip(".")
    return str(value)


_VOID = frozenset({"meta", "br", "hr", "img", "link", "col", "input"})
