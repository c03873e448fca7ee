"""How the catalog says things: scikit-learn's constraints in words, defaults as JSON, and drift between two catalogs.

Used by ``worker.learning.catalog_gen``; deterministic by construction (sorted option sets), so the
generated file is the same whatever the hash seed.
"""

from __future__ import annotations

import inspect
import math
import numbers
from typing import Any

from sklearn.utils._param_validation import Hidden, Options, StrOptions, make_constraint

# scikit-learn's constraint keywords, said in JSON terms (a submission can only send JSON values).
_PLAIN_WORDS: dict[str, str] = {
    "boolean": "a bool",
    "random_state": "an int in the range [0, 4294967295] or None",
    "verbose": "an int in the range [0, inf) or a bool",
    "array-like": "an array-like (a JSON list)",
    "sparse matrix": "a sparse matrix (not expressible in JSON)",
}


def describe(constraints: Any) -> str:
    """Render scikit-learn's constraints of one parameter as a short, deterministic phrase."""
    if constraints is None:
        return "not validated by scikit-learn"
    if constraints == "no_validation":
        return "any value (not validated by scikit-learn)"
    parts: list[str] = []
    for raw in constraints:
        if isinstance(raw, Hidden):
            continue  # private or deprecated spellings scikit-learn does not advertise
        if isinstance(raw, str) and raw in _PLAIN_WORDS:
            parts.append(_PLAIN_WORDS[raw])
            continue
        constraint = make_constraint(raw)
        if isinstance(constraint, StrOptions):
            current = sorted(o for o in constraint.options if o not in constraint.deprecated)
            parts.append("one of " + ", ".join(repr(o) for o in current))
        elif isinstance(constraint, Options):
            parts.append("one of " + ", ".join(sorted(repr(o) for o in constraint.options)))
        elif raw is numbers.Integral or raw is int:
            parts.append("an int")
        elif raw is numbers.Real or raw is float:
            parts.append("a float")
        elif inspect.isclass(raw):
            parts.append(f"a {raw.__name__}")
        else:
            parts.append(str(constraint))
    return " or ".join(dict.fromkeys(parts))


def json_value(value: Any) -> Any:
    """Return a JSON value for a default: plain JSON when it round-trips, else its repr."""
    if value is None or isinstance(value, bool | str):
        return value
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        as_float = float(value)
        return as_float if math.isfinite(as_float) else repr(as_float)
    if isinstance(value, list | tuple):
        return [json_value(v) for v in value]
    if isinstance(value, dict):
        return {str(k): json_value(v) for k, v in value.items()}
    if inspect.isclass(value):
        return f"{value.__module__}.{value.__qualname__}"
    return repr(value)


def differences(committed: Any, fresh: Any, where: str) -> list[str]:
    if isinstance(committed, dict) and isinstance(fresh, dict):
        out: list[str] = []
        for key in sorted(set(committed) | set(fresh)):
            here = f"{where}/{key}"
            if key not in fresh:
                out.append(f"{here}: in the committed catalog, absent from the installed scikit-learn")
            elif key not in committed:
                out.append(f"{here}: new in the installed scikit-learn, absent from the committed catalog")
            else:
                out.extend(differences(committed[key], fresh[key], here))
        return out
    if isinstance(committed, list) and isinstance(fresh, list) and len(committed) == len(fresh):
        out = []
        for i, (left, right) in enumerate(zip(committed, fresh, strict=True)):
            label = left.get("name", i) if isinstance(left, dict) else i
            out.extend(differences(left, right, f"{where}/{label}"))
        return out
    if committed != fresh:
        return [f"{where or '/'}: committed {committed!r}, installed scikit-learn gives {fresh!r}"]
    return []
