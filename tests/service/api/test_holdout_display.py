"""What a holdout figure is, said everywhere it is shown: the submission document, board, report and CLI text.

A sequence of Ridge submissions on the diabetes data (Efron et al. 2004, bundled with scikit-learn) goes
through the ladder with a fixed step: each holdout rmse is scikit-learn's, of a refit on the 400
development rows scored on the other 42, and the expected new-best labels come from the ladder as Blum &
Hardt (2015) state it with a fixed step: the best moves only when a loss is below it by more than the
step, and the released figure is the loss rounded to a multiple of the step.
"""

from __future__ import annotations

import html
import json
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import root_mean_squared_error
from sklearn.model_selection import KFold, cross_validate

from service.cli import remote
from service.gate.policy import parse_policy
from service.gate.release import HoldoutScores, Release, release
from service.records import holdout_releases
from tests.support.reviews import make_submission

if TYPE_CHECKING:
    from tests.support.api import Api

STEP = 0.5
# In submission order: a first figure, a worse model, a better one, one better by less than the step,
# a better one again, and a worse one last.
ALPHAS = (10.0, 100.0, 0.01, 0.1, 1.0, 30.0)


@pytest.fixture(scope="module")
def ridges() -> list[tuple[float, list[float], float]]:
    """(alpha, CV fold rmse, holdout rmse) of Ridge on diabetes, all computed by scikit-learn."""
    X, y = load_diabetes(return_X_y=True)
    order = np.random.default_rng(0).permutation(len(y))
    X, y = X[order], y[order]
    out = []
    for alpha in ALPHAS:
        cv = cross_validate(Ridge(alpha=alpha), X[:400], y[:400], cv=KFold(5, shuffle=True, random_state=0),
                            scoring="neg_root_mean_squared_error")
        refit = Ridge(alpha=alpha).fit(X[:400], y[:400])
        out.append((alpha, list(-cv["test_score"]), float(root_mean_squared_error(y[400:], refit.predict(X[400:])))))
    return out


def ladder_by_hand(losses: list[float]) -> list[tuple[bool, float]]:
    """(new best, figure shown) per loss, by the fixed-step ladder of Blum & Hardt (2015)."""
    level, out = None, []
    for loss in losses:
        moved = level is None or loss < level - STEP
        if moved:
            level = round(loss / STEP) * STEP
        assert level is not None
        out.append((moved, level))
    return out


def submit_sequence(api: Api, dataset: dict[str, Any], ridges: list[tuple[float, list[float], float]]) -> list[str]:
    """Set a fixed-step ladder (policy version 1) and record one released submission per Ridge, in order."""
    reply = api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy",
                     json={"release": {"mode": "ladder", "ladder_step": STEP}})
    assert reply.status_code == 200 and reply.get_json()["version"] == 1
    policy = parse_policy(reply.get_json(), "regression")
    made: list[str] = []

    def released(cv: list[float], holdout: float) -> Any:
        def outcome(sub_id: str) -> Release:
            last = holdout_releases.latest(api.engine, dataset["id"])
            scores = HoldoutScores(sub_id, {"rmse": holdout}, float(np.mean(cv)), float(np.std(cv, ddof=1)),
                                   71.0, 42)
            return release(policy, scores, state=last["state"] if last else {}, spent_at=[],
                           now=datetime.now(UTC), rng=np.random.default_rng(0))
        return outcome

    for alpha, cv, holdout in ridges:
        made.append(make_submission(api.engine, dataset, api.key_ids["submitter"], label=f"ridge {alpha:g}",
                                    scores=cv, release_with=released(cv, holdout), policy_version=1))
    return made


def test_the_ladder_labels_each_submission_new_best_or_not_in_document_report_and_cli(
    api: Api, dataset: dict[str, Any], ridges: list[tuple[float, list[float], float]]
) -> None:
    made = submit_sequence(api, dataset, ridges)
    expected = ladder_by_hand([h for _, _, h in ridges])
    assert [moved for moved, _ in expected] == [True, False, True, False, True, False]  # every case is met
    holder = None
    for sub_id, (moved, figure), (_, _, own) in zip(made, expected, ridges, strict=True):
        holder = sub_id if moved else holder
        doc = api.get("submitter", f"/v1/submissions/{sub_id}").get_json()
        part = doc["result"]["holdout"]
        assert part["ladder"] == {"metric": "rmse", "new_best": moved, "best_so_far": figure, "held_by": holder}
        assert part["policy_version"] == 1 and part["scores"] == {"rmse": figure}  # existing fields kept
        report = html.unescape(api.get("submitter", f"/v1/submissions/{sub_id}/report").get_data(as_text=True))
        text = remote.summary_text(doc, "http://x")
        if moved:
            said = f"new best: rmse {figure:g} (ladder: this submission set the dataset's best holdout figure so far)"
            assert "not this model's" not in report
        else:
            said = (f"no new best (best so far rmse {figure:g}, held by {holder}); this submission's own holdout "
                    "figure is not released under the ladder")
            assert "dataset's best holdout so far, not this model's" in report
            assert f"best so far {figure:.4g} (not this model's)" in report
            assert "holdout, as released" not in report  # the figure is never labelled as this model's
        assert part["summary"] == said and f"Holdout: {said}." in report
        assert f"  holdout: {said}" in text.splitlines()
        assert f"holdout {figure:g} (ladder)" not in text  # never beside the CV figure as if it were its own
        if not moved:  # a model that did not move the ladder: its own figure appears nowhere
            assert f"{own:.4g}" not in json.dumps(doc) + report + text

    board = api.get("submitter", f"/v1/datasets/{dataset['id']}/board").get_json()
    assert board["holdout_policies"] == [{"mode": "ladder", "policy_version": 1}] and board["mixed_policies"] is None
    by_id = {e["submission"]: e["holdout"] for e in board["entries"]}
    holder = None
    for sub_id, (moved, figure) in zip(made, expected, strict=True):
        holder = sub_id if moved else holder
        shown = by_id[sub_id]
        assert (shown["figure"], shown["mode"], shown["policy_version"], shown["score"]) == (
            "dataset_best_so_far", "ladder", 1, figure)
        assert shown["ladder"] == {"metric": "rmse", "new_best": moved, "best_so_far": figure, "held_by": holder}
        assert shown["summary"].startswith("new best" if moved else "no new best")
    lines = remote.board_text(board).splitlines()
    for sub_id, (moved, figure) in zip(made, expected, strict=True):
        row = next(line for line in lines if sub_id in line)
        assert (f"new best {figure:g}" if moved else f"best so far {figure:g}, not its own") in row
        assert "ladder v1" in row
    assert any(line.startswith("ladder figures are the dataset's best holdout so far") for line in lines)


def test_the_board_says_when_its_figures_were_released_under_different_policies(
    api: Api, dataset: dict[str, Any], ridges: list[tuple[float, list[float], float]]
) -> None:
    exact = make_submission(api.engine, dataset, api.key_ids["submitter"], label="exact",
                            scores=ridges[0][1])  # released exactly, under the default policy (version 0)
    made = submit_sequence(api, dataset, ridges[:2])
    board = api.get("submitter", f"/v1/datasets/{dataset['id']}/board").get_json()
    assert board["holdout_policies"] == [{"mode": "exact", "policy_version": 0},
                                         {"mode": "ladder", "policy_version": 1}]
    assert board["mixed_policies"] == (
        "The holdout figures on this board were released under different policies (exact under policy version 0, "
        "ladder under policy version 1); each row says which, and figures released under different policies are "
        "not comparable.")
    by_id = {e["submission"]: e["holdout"] for e in board["entries"]}
    assert (by_id[exact]["figure"], by_id[exact]["policy_version"]) == ("own_score", 0)
    assert [(by_id[s]["figure"], by_id[s]["policy_version"]) for s in made] == [("dataset_best_so_far", 1)] * 2
    lines = remote.board_text(board).splitlines()
    assert "exact v0" in next(line for line in lines if exact in line)
    assert lines[-1] == f"note: {board['mixed_policies']}"
    # A later page says so too: the note covers the whole board, not the page.
    page = api.get("submitter", f"/v1/datasets/{dataset['id']}/board", query_string={"limit": 1}).get_json()
    assert page["mixed_policies"] == board["mixed_policies"] and len(page["entries"]) == 1
