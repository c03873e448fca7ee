"""Metric keys: how a metric and its choices are written, parsed and resolved against a dataset.

A submission names a metric as a string, ``"f1"`` or ``"f1(average=weighted)"``, or as an object,
``{"name": "f1", "average": "weighted"}``. Resolution checks the name against the dataset's task and
each option against the dataset (its classes), fills in the defaults that depend on it (the average,
the positive label) and returns the canonical key, every option spelled out in the spec's order and
separated by ``;``: ``f1(average=binary;pos_label=yes)``, ``pinball_loss(alpha=0.9)``. Numbers are written
as Python writes a float (``0.9``, ``1.0``), so one choice has one key; a label with characters other
than letters, digits and ``_.+-`` is percent-encoded (``pos_label=no%20sale``). A key so never holds a
space, comma, quote, brace or backslash: it is used as is inside JSON paths of the records DB (the
board's ranking), where PostgreSQL's path arrays split on commas and SQLite's quoted keys end at a
quote. On input, options may also be separated by commas and a label written as a JSON string
(``f1(average=binary, pos_label="no sale")`` is read as ``f1(average=binary;pos_label=no%20sale)``).

Resolving a key again gives the same key, so a key copied from a summary or a policy is accepted
as it is. Without the dataset's classes (``classes=None``) defaults that depend on them are left
unset and a positive label is not checked; the worker reads a key without an average as the
documented default (``worker.learning.scoring``).
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any
from urllib.parse import quote, unquote

from service.catalog.metrics import METRIC_OPTIONS, METRICS, MetricSpec

_NAME = re.compile(r"\s*([A-Za-z0-9_]+)\s*")
_BARE = re.compile(r"[A-Za-z0-9_.+\-]+")
_WORD = re.compile(r"[A-Za-z0-9_.+\-%]+")  # a bare value as written: percent-encoding allowed
_DECODER = json.JSONDecoder()


class MetricRefused(ValueError):
    """A metric request the dataset cannot take; the message says why and what is accepted."""


def parse_key(text: str) -> tuple[str, dict[str, Any]]:
    """Split ``name(option=value, ...)`` into the name and its options (values as written: str or JSON)."""
    match = _NAME.match(text)
    if match is None:
        raise MetricRefused(f"a metric is written name or name(option=value, ...), got {text!r}")
    name, rest = match.group(1), text[match.end():]
    options: dict[str, Any] = {}
    if not rest:
        return name, options
    if not (rest.startswith("(") and rest.rstrip().endswith(")")):
        raise MetricRefused(f"a metric is written name or name(option=value, ...), got {text!r}")
    body, at = rest.rstrip()[1:-1], 0
    while body.strip():
        option = re.match(r"\s*([A-Za-z_]+)\s*=\s*", body[at:])
        if option is None:
            raise MetricRefused(f"options are written option=value and separated by ';', got {text!r}")
        at += option.end()
        if body[at:at + 1] == '"':
            try:
                value, at = _DECODER.raw_decode(body, at)
            except json.JSONDecodeError:
                raise MetricRefused(f"option {option.group(1)!r} has a quoted value that is not a JSON string in "
                                    f"{text!r}") from None
        else:
            bare = _WORD.match(body, at)
            if bare is None:
                raise MetricRefused(f"option {option.group(1)!r} has no value in {text!r}")
            value, at = unquote(bare.group(0)), bare.end()
        options[option.group(1)] = value
        tail = re.match(r"\s*([,;]|$)", body[at:])
        if tail is None:
            raise MetricRefused(f"options are written option=value and separated by ';', got {text!r}")
        at += tail.end()
        if not tail.group(1):
            break
    return name, options


def write_key(spec: MetricSpec, options: Mapping[str, Any]) -> str:
    """Return the canonical key: the name, then the set options in the spec's order."""
    parts = [f"{name}={_write_value(options[name])}" for name in spec.options if options.get(name) is not None]
    return f"{spec.name}({';'.join(parts)})" if parts else spec.name


def _write_value(value: Any) -> str:
    if isinstance(value, float):
        return repr(value)
    text = str(value)
    return text if _BARE.fullmatch(text) else quote(text, safe="")


def resolve_metric(requested: Any, task: str, classes: Sequence[str] | None = None) -> str:
    """Return the canonical key of a requested metric (string or object) on a dataset of ``task``.

    ``classes``: the dataset's class labels as its record lists them (strings, sorted). Raises
    MetricRefused naming what is wrong and what is accepted.
    """
    if isinstance(requested, str):
        name, options = parse_key(requested)
    elif isinstance(requested, Mapping):
        given = requested.get("name")
        if not isinstance(given, str):
            raise MetricRefused(f"a metric object needs a name (a string), got {given!r}")
        name, options = given, {k: v for k, v in requested.items() if k != "name"}
    else:
        raise MetricRefused(f"a metric is a name such as 'f1', 'f1(average=weighted)' or an object "
                            f"{{\"name\": ..., options}}, got {requested!r}")
    spec = METRICS.get(name)
    accepted = ", ".join(m.name for m in METRICS.values() if m.task == task)
    if spec is None:
        raise MetricRefused(f"unknown metric {name!r}; metrics for {task}: {accepted}")
    if spec.task != task:
        raise MetricRefused(f"metric {name!r} is a {spec.task} metric and does not apply to a {task} dataset; "
                            f"metrics for {task}: {accepted}")
    for option in options:
        if option not in spec.options:
            takes = f"its options: {', '.join(spec.options)}" if spec.options else "it takes no options"
            raise MetricRefused(f"metric {name!r} has no option {option!r}; {takes}")
    resolved = _options(spec, options, classes)
    for option in spec.options:
        if METRIC_OPTIONS[option].required and resolved.get(option) is None:
            raise MetricRefused(f"metric {name!r} needs {option} to be declared ({METRIC_OPTIONS[option].description})"
                                f", e.g. \"{name}({option}=...)\" or {{\"name\": \"{name}\", \"{option}\": ...}}")
    return write_key(spec, resolved)


def _options(spec: MetricSpec, given: Mapping[str, Any], classes: Sequence[str] | None) -> dict[str, Any]:
    options: dict[str, Any] = {}
    if "alpha" in given:
        alpha = _number(spec.name, "alpha", given["alpha"])
        if not 0.0 < alpha < 1.0:
            raise MetricRefused(f"{spec.name} alpha is a quantile in (0, 1), got {given['alpha']!r}")
        options["alpha"] = alpha
    if "power" in given:
        power = _number(spec.name, "power", given["power"])
        if 0.0 < power < 1.0:
            raise MetricRefused(f"{spec.name} power must be <= 0 or >= 1 (no Tweedie distribution has a power "
                                f"in (0, 1)), got {given['power']!r}")
        options["power"] = power
    if "average" in spec.options:
        options.update(_label_options(spec, given, classes))
    return options


def _number(metric: str, option: str, value: Any) -> float:
    if isinstance(value, bool):
        raise MetricRefused(f"{metric} {option} must be a number, got {value!r}")
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise MetricRefused(f"{metric} {option} must be a number, got {value!r}") from None
    if not math.isfinite(number):
        raise MetricRefused(f"{metric} {option} must be a finite number, got {value!r}")
    return number


def _label_options(spec: MetricSpec, given: Mapping[str, Any], classes: Sequence[str] | None) -> dict[str, Any]:
    """Resolve average and pos_label: binary averaging names its positive class; the others name none."""
    average, pos_label = given.get("average"), given.get("pos_label")
    ranking = spec.needs_proba  # average_precision: a score per class, never a binary "average"
    words = tuple(a for a in METRIC_OPTIONS["average"].choices if not (ranking and a == "binary"))
    if average is not None and average not in words:
        raise MetricRefused(f"{spec.name} average must be one of {', '.join(words)}, got {average!r}")
    if pos_label is not None:
        if isinstance(pos_label, bool | dict | list) or pos_label is None:
            raise MetricRefused(f"{spec.name} pos_label must be one of the dataset's classes, got {pos_label!r}")
        pos_label = str(pos_label)
    two = None if classes is None else len(classes) == 2
    if ranking:
        if two and average is not None:
            raise MetricRefused(f"{spec.name} on a two-class dataset scores the positive class: declare pos_label, "
                                f"not average (got average={average!r})")
        if two is False and pos_label is not None:
            raise MetricRefused(f"{spec.name} pos_label is for two-class datasets; this one has {len(classes or ())}"
                                f" classes: declare average ({', '.join(words)})")
        if two and pos_label is None:
            pos_label = classes[1] if classes else None
        if two is False and average is None:
            average = "macro"
    else:
        if average == "binary" and two is False:
            raise MetricRefused(f"{spec.name} average=binary needs a two-class dataset; this one has "
                                f"{len(classes or ())} classes: use micro, macro or weighted")
        if pos_label is not None and average not in (None, "binary"):
            raise MetricRefused(f"{spec.name} pos_label goes with average=binary only, got average={average!r}")
        if average is None and two is not None:
            average = "binary" if two else "macro"
        if average == "binary" and pos_label is None and classes:
            pos_label = classes[1]
        if pos_label is not None and average is None:
            average = "binary"
    if pos_label is not None and classes is not None and pos_label not in classes:
        raise MetricRefused(f"{spec.name} pos_label must be one of the dataset's classes "
                            f"({', '.join(classes)}), got {given.get('pos_label')!r}")
    return {"average": average, "pos_label": pos_label}


def target_floor(key: str) -> tuple[float, bool] | None:
    """Return the lowest target value a metric is defined for, and whether it is excluded; None if any.

    Mean Poisson deviance needs y >= 0; gamma y > 0; Tweedie, by its power p: none for p <= 0,
    y >= 0 for 1 <= p < 2, y > 0 for p >= 2 (scikit-learn's ``mean_tweedie_deviance`` documentation).
    """
    name, options = parse_key(key)
    if name == "poisson_deviance":
        return 0.0, False
    if name == "gamma_deviance":
        return 0.0, True
    if name == "tweedie_deviance" and options.get("power") is not None:
        power = float(options["power"])
        if power >= 2:
            return 0.0, True
        if power >= 1:
            return 0.0, False
    return None
