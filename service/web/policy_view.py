"""A review policy in a reader's words, and its version history."""

from __future__ import annotations

from typing import Any

from service.report.markup import Markup
from service.web.layout import facts, table, when


def policy_facts(policy: dict[str, Any]) -> Markup:
    """The policy in force as labelled facts."""
    version = policy["version"]
    release = policy["release"]
    thresholdout = release.get("thresholdout")
    items: list[tuple[str, object]] = [
        ("version", f"{version}" + (" (the task's default; never set by a steward)" if version == 0 else "")),
        ("primary metric", f"{policy['primary_metric']} "
                           f"({'higher' if policy['greater_is_better'] else 'lower'} is better)"),
        ("bar on the CV mean", _or(policy["bar"], "none")),
        ("level of the test against the baseline", policy["baseline_alpha"]),
        ("margin allowed behind the champion", policy["champion_margin"]),
        ("level of the test against the champion", policy["champion_alpha"]),
        ("holdout may differ from CV by", f"{policy['holdout_gap']['k_std']:g} x the expected spread + "
                                          f"{policy['holdout_gap']['floor']:g}"),
        ("fold spread limit", _or(policy["max_fold_std"], "none")),
        ("holdout release", _release(release)),
    ]
    if thresholdout:
        items.append(("thresholdout", f"threshold {thresholdout['threshold']:g}, noise {thresholdout['sigma']:g}, "
                                      f"budget {thresholdout['budget']}"))
    return facts(items)


def _release(release: dict[str, Any]) -> str:
    mode = {"exact": "exact score, rounded", "ladder": "ladder (the dataset's best so far)",
            "thresholdout": "thresholdout"}.get(release["mode"], release["mode"])
    step = f", step {release['ladder_step']:g}" if release["mode"] == "ladder" and release.get("ladder_step") else ""
    return (f"{mode}{step}; {release['digits']} significant digits; {release['budget']} per submitter every "
            f"{release['window_hours']:g} hours")


def _or(value: Any, empty: str) -> object:
    return empty if value is None else value


def policy_history(history: list[dict[str, Any]], names: dict[str, str]) -> Markup:
    """Every stored version, newest first: who set it, when, and its main settings."""
    rows = [[h["version"], names.get(h["set_by"], h["set_by"]), when(h["set_at"]),
             h["document"].get("primary_metric", "-"), h["document"].get("champion_margin", "-"),
             (h["document"].get("release") or {}).get("mode", "-")] for h in history]
    return table("Policy versions, newest first", ["version", "set by", "when", "primary metric",
                                                    "champion margin", "holdout release"], rows)
