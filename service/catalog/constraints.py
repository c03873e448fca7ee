"""Check a JSON parameter value against a constraint the catalog states, without the library that owns it.

Used for the classes that have no scikit-learn parameter validation (LightGBM's and XGBoost's
scikit-learn interfaces): the catalog stores, per parameter, a list of alternatives
(``worker.learning.boosting_params`` writes them) and a value is valid when one alternative accepts it.
Messages follow scikit-learn's own: ``The 'num_leaves' parameter of LGBMRegressor must be ... Got 1 instead.``
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

_BRACKETS = {"both": "[]", "left": "[)", "right": "(]", "neither": "()"}


def accepts(alternative: Mapping[str, Any], value: Any) -> bool:
    """Tell whether one alternative of a constraint accepts ``value``."""
    kind = alternative["type"]
    if kind == "none":
        return value is None
    if kind == "bool":
        return isinstance(value, bool)
    if kind == "dict":
        return isinstance(value, dict)
    if kind == "options":
        return any(value == v and type(value) is type(v) for v in alternative["values"])
    if isinstance(value, bool) or not isinstance(value, int | float):
        return False
    if kind == "int" and not isinstance(value, int):
        return False
    if not math.isfinite(value):
        return False
    low, high, closed = alternative.get("min"), alternative.get("max"), alternative.get("closed", "both")
    if low is not None and (value < low or (value == low and closed in ("right", "neither"))):
        return False
    return not (high is not None and (value > high or (value == high and closed in ("left", "neither"))))


def describe(constraint: Sequence[Mapping[str, Any]]) -> str:
    """Render a constraint in scikit-learn's words: ``an int in the range [1, inf) or None``."""
    return " or ".join(dict.fromkeys(_phrase(a) for a in constraint))


def problem(owner: str, name: str, constraint: Sequence[Mapping[str, Any]], value: Any) -> str | None:
    """Return why ``value`` is not valid for parameter ``name`` of class ``owner``, or None when it is."""
    if any(accepts(a, value) for a in constraint):
        return None
    return f"The {name!r} parameter of {owner} must be {describe(constraint)}. Got {value!r} instead."


def _phrase(alternative: Mapping[str, Any]) -> str:
    kind = alternative["type"]
    if kind == "none":
        return "None"
    if kind == "bool":
        return "a bool"
    if kind == "dict":
        return "a dict"
    if kind == "options":
        return "one of " + ", ".join(repr(v) for v in alternative["values"])
    low, high = alternative.get("min"), alternative.get("max")
    article = "an int" if kind == "int" else "a float"
    if low is None and high is None:
        return article
    brackets = _BRACKETS[alternative.get("closed", "both")]
    left, right = brackets[0], brackets[1]
    if low is None:
        left = "("
    if high is None:
        right = ")"
    return f"{article} in the range {left}{'-inf' if low is None else low}, {'inf' if high is None else high}{right}"
