"""How the client commands print documents: a submission's summary, a board, datasets; plain text helpers.

Text a user gave (labels, names, reasons) is printed without terminal control characters.
"""

from __future__ import annotations

import json
from typing import Any

_PLAIN = {c: " " for c in [*range(0x00, 0x20), *range(0x7F, 0xA0)]}  # no terminal control codes


def plain(value: Any) -> str:
    """User-given text without terminal control characters."""
    return str(value).translate(_PLAIN)


def num(value: Any, digits: int = 4) -> str:
    return "-" if not isinstance(value, int | float) or isinstance(value, bool) else f"{value:.{digits}g}"


def summary_text(document: dict[str, Any], base_url: str) -> str:
    """A readable summary of one submission: verdict and reasons, then the figures."""
    result = document.get("result") or {}
    verdict = result.get("verdict") or {}
    progress = document.get("progress") or {}
    lines = [f"{document['id']}  {plain(document.get('label') or '')}".rstrip(),
             f"  dataset {document.get('dataset')} · state {document.get('state')} · "
             f"{progress.get('folds_done')}/{progress.get('folds_total')} folds"]
    if document.get("error"):
        lines.append(f"  error: {plain(document['error'])}")
    if verdict:
        lines.append(f"verdict: {str(verdict.get('decision')).upper()}")
        lines += [f"  - {plain(reason)}" for reason in verdict.get("reasons") or []]
    else:
        lines.append("verdict: none yet")
    summary = (result.get("cv") or {}).get("summary") or {}
    baseline = (result.get("baseline") or {}).get("summary") or {}
    holdout = result.get("holdout") or {}
    primary = verdict.get("primary_metric")
    metrics = sorted(summary, key=lambda m: (m != primary, m))
    for metric in metrics:
        item = summary.get(metric) or {}
        interval = item.get("naive_interval_95")
        shown = f" (naive 95 % interval {num(interval[0])} to {num(interval[1])})" if interval else ""
        released = (holdout.get("scores") or {}).get(metric) if holdout.get("released") else None
        held = f"  holdout {num(released)} ({holdout.get('mode')})" if released is not None else ""
        if holdout.get("ladder"):  # the ladder's figure is the dataset's best so far: said on its own line below
            held = ""
        lines.append(f"  {metric:<18} CV {num(item.get('mean'))}{shown}  baseline "
                     f"{num((baseline.get(metric) or {}).get('mean'))}{held}")
    if holdout.get("ladder"):
        lines.append(f"  holdout: {plain(holdout.get('summary') or '')}")
    elif holdout and not holdout.get("released") and holdout.get("note"):
        lines.append(f"  holdout: {plain(holdout['note'])}")
    lines.append(f"report: {base_url}/v1/submissions/{document['id']}/report")
    return "\n".join(lines)


def board_text(board: dict[str, Any]) -> str:
    """The board as a table, champion marked with *."""
    direction = "higher" if board.get("greater_is_better") else "lower"
    metric = board.get("primary_metric")
    lines = [f"board of {board.get('dataset')}: ranked by {metric} ({direction} is better), policy "
             f"version {board.get('policy_version')}"]
    rows: list[tuple[Any, ...]] = [("rank", "submission", "label", f"CV {metric}", "naive 95 % interval",
                                    "holdout (as released)", "released under", "verdict (policy)", "submitter",
                                    "created")]
    for e in board["entries"]:
        interval = e["cv"].get("naive_interval_95")
        holdout = e["holdout"]
        rows.append((
            f"{e['rank']}{' *' if e.get('champion') else ''}", e["submission"], plain(e.get("label") or "")[:28],
            num(e["cv"].get("mean")), f"{num(interval[0])} to {num(interval[1])}" if interval else "-",
            _board_holdout(holdout), _released_under(holdout),
            _judged(e), plain((e.get("submitter") or {}).get("name") or "")[:24],
            str(e.get("created_at") or "")[:10],
        ))
    if not board["entries"]:
        return "\n".join([*lines, "no ranked submissions yet"])
    lines += table(rows)
    if any(e.get("champion") for e in board["entries"]):
        lines.append("* champion")
    if any(e["holdout"].get("ladder") for e in board["entries"]):
        lines.append("ladder figures are the dataset's best holdout so far, not the row's own: \"new best\" marks "
                     "the rows that set one")
    if any(e.get("judged_under_policy_in_force") is False for e in board["entries"]):
        lines.append(f"! judged under an older policy than version {board.get('policy_version')}: a steward "
                     f"re-judges them with `sealfold rejudge --dataset {board.get('dataset')}`")
    if board.get("mixed_policies"):
        lines.append(f"note: {plain(board['mixed_policies'])}")
    if board.get("next_cursor"):
        lines.append("(more entries: raise --limit)")
    return "\n".join(lines)


def _judged(entry: dict[str, Any]) -> str:
    """A board row's verdict and the policy version it was judged under, marked when that is not the one in force."""
    if not entry.get("verdict"):
        return "-"
    stale = " !" if entry.get("judged_under_policy_in_force") is False else ""
    return f"{entry['verdict']} v{entry.get('policy_version')}{stale}"


def _board_holdout(holdout: dict[str, Any]) -> str:
    """A board row's holdout cell: a ladder figure says whether the row set the best or only shows it."""
    if not holdout.get("released"):
        return "withheld" if holdout.get("mode") else "-"
    ladder = holdout.get("ladder")
    if ladder:
        best = num(ladder["best_so_far"])
        return f"new best {best}" if ladder["new_best"] else f"best so far {best}, not its own"
    return num(holdout.get("score"))


def _released_under(holdout: dict[str, Any]) -> str:
    """A board row's release mode and policy version, so figures of different policies are told apart."""
    if not holdout.get("mode"):
        return "-"
    version = holdout.get("policy_version")
    return f"{holdout['mode']} v{version}" if version is not None else str(holdout["mode"])


def datasets_text(datasets: list[dict[str, Any]]) -> str:
    """The team's datasets as a table."""
    if not datasets:
        return "no datasets yet"
    rows: list[tuple[Any, ...]] = [("id", "name", "task", "target", "development", "holdout", "fold plan",
                                    "created")]
    for d in datasets:
        plan = d.get("fold_plan") or {}
        rows.append((d["id"], plain(d.get("name"))[:28], d.get("task"), plain(d.get("target"))[:20],
                     str((d.get("rows") or {}).get("development")), str((d.get("rows") or {}).get("holdout")),
                     f"{plan.get('scheme')} x{plan.get('folds')}", str(d.get("created_at") or "")[:10]))
    return "\n".join(table(rows))


def table(rows: list[tuple[Any, ...]]) -> list[str]:
    widths = [max(len(str(r[i])) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in rows]


def dumps(document: Any) -> str:
    return json.dumps(document, indent=2, sort_keys=True)
