"""Read a policy document's typed fields, collecting every problem instead of raising at the first.

``parse_policy`` (service.gate.policy) walks the document with a ``FieldReader`` per JSON object; each
bad field becomes one ``FieldProblem`` with its JSON pointer, and the caller raises them together.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from service.errors import FieldProblem


def or_fallback(value: Any, fallback: Any) -> Any:
    """Use the fallback where a bad field was reported (the error is raised once all are collected)."""
    return fallback if value is None else value


def unknown_fields(doc: Mapping[str, Any], known: set[str], base: str, problems: list[FieldProblem]) -> None:
    for key in doc:
        if key not in known:
            problems.append(FieldProblem(f"{base}/{key}", f"unknown policy field {key!r}; accepted: "
                                         f"{', '.join(sorted(known - {'version'}))}"))


class FieldReader:
    """Read typed fields of one JSON object, collecting problems instead of raising."""

    def __init__(self, doc: Mapping[str, Any], base: str, problems: list[FieldProblem]) -> None:
        self.doc, self.base, self.problems = doc, base, problems

    def problem(self, name: str, detail: str) -> None:
        self.problems.append(FieldProblem(f"{self.base}/{name}", detail))

    def has_problem_under(self, pointer: str) -> bool:
        return any(p.pointer.startswith(pointer) for p in self.problems)

    def child(self, name: str, known: set[str]) -> FieldReader | None:
        if name not in self.doc:
            return None
        value = self.doc[name]
        if not isinstance(value, Mapping):
            self.problem(name, f"{self._label(name)} must be an object, got {value!r}")
            return None
        unknown_fields(value, known, f"{self.base}/{name}", self.problems)
        return FieldReader(value, f"{self.base}/{name}", self.problems)

    def number(self, name: str, default: float | None, *, nullable: bool = False, positive: bool = False,
               minimum: float | None = None, maximum: float | None = None, hint: str = "") -> float | None:
        if name not in self.doc:
            return default
        value = self.doc[name]
        label = self._label(name)
        if value is None and nullable:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            self.problem(name, f"{label} must be a finite number{' or null' if nullable else ''}, got {value!r}")
            return None
        if positive and not value > 0:
            self.problem(name, f"{label} must be > 0{hint}, got {value!r}")
            return None
        if minimum is not None and value < minimum:
            self.problem(name, f"{label} must be >= {minimum:g}{hint}, got {value!r}")
            return None
        if maximum is not None and value > maximum:
            self.problem(name, f"{label} must be at most {maximum:g}, got {value!r}")
            return None
        return float(value)

    def level(self, name: str, default: float) -> float | None:
        value = self.number(name, default)
        if value is not None and not 0.0 < value < 0.5:
            self.problem(name, f"{self._label(name)} must be a significance level in (0, 0.5), "
                               f"got {self.doc[name]!r}")
            return None
        return value

    def choice(self, name: str, default: str, accepted: Sequence[str]) -> str:
        value = self.doc.get(name, default)
        if value not in accepted:
            self.problem(name, f"{self._label(name)} must be one of {', '.join(accepted)}, got {value!r}")
            return default
        return str(value)

    def integer(self, name: str, default: int | None, low: int, high: int) -> int | None:
        if name not in self.doc:
            return default
        value = self.doc[name]
        integral = isinstance(value, int) or (isinstance(value, float) and value.is_integer())
        if isinstance(value, bool) or not integral or not low <= value <= high:
            self.problem(name, f"{self._label(name)} must be an integer between {low} and {high}, got {value!r}")
            return None
        return int(value)

    def _label(self, name: str) -> str:
        return f"{self.base}/{name}".strip("/").replace("/", ".")
