"""The board: ranked by the primary metric's CV mean in its direction, champion marked, paged by cursor.

Records on a SQLite DB of the test's own; the fold scores are scikit-learn's own cross-validation of
Ridge on the diabetes data (Efron et al. 2004, bundled with scikit-learn), and every ranking is checked
against ``sorted()`` of numpy's per-submission fold means.
"""

from __future__ import annotations

import base64
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold, cross_validate
from sqlalchemy import Engine

from service.errors import InputError, NotFound
from service.gate.board import BoardCursor, BoardOrder, board_page, decode_cursor, encode_cursor
from service.records.keys import KeyInfo, create_key
from service.settings import Settings
from service.team_scope import team_dataset
from tests.support.frames import diabetes_frame
from tests.support.records import add_dataset_row, records_engine, upgraded_engine
from tests.support.reviews import RAW_HOLDOUT, make_submission
from tests.support.servers import postgres_database

ALPHAS = (0.001, 0.03, 0.3, 1.0, 3.0, 30.0, 300.0)
RMSE = BoardOrder("rmse", greater_is_better=False)
R2 = BoardOrder("r2", greater_is_better=True)


@pytest.fixture(scope="module")
def ridge_folds() -> dict[float, dict[str, list[float]]]:
    """Per-fold rmse and r2 of Ridge(alpha) on diabetes, 5 shuffled folds, from scikit-learn's cross_validate."""
    X, y = load_diabetes(return_X_y=True)
    folds = KFold(5, shuffle=True, random_state=0)
    out = {}
    for alpha in ALPHAS:
        cv = cross_validate(Ridge(alpha=alpha), X, y, cv=folds, scoring=("neg_root_mean_squared_error", "r2"))
        out[alpha] = {"rmse": list(-cv["test_neg_root_mean_squared_error"]), "r2": list(cv["test_r2"])}
    return out


@pytest.fixture
def owner(records: Engine) -> KeyInfo:
    return create_key(records, "fleet", "submitter", "owner")[0]


@pytest.fixture
def dataset(records: Engine) -> dict[str, Any]:
    return add_dataset_row(records, diabetes_frame(), "target", "regression", folds=5)


def submit_all(records: Engine, dataset: dict[str, Any], owner: KeyInfo, folds: dict[float, dict[str, list[float]]],
               metric: str) -> dict[str, float]:
    """Record one finished submission per alpha; return {submission id: numpy mean of its fold scores}."""
    made = {}
    for alpha, scores in folds.items():
        sub = make_submission(records, dataset, owner.id, label=f"ridge {alpha:g}", scores=scores[metric],
                              metric=metric)
        made[sub] = float(np.mean(scores[metric]))
    return made


def every_page(records: Engine, dataset: dict[str, Any], order: BoardOrder, limit: int,
               champion: str | None = None) -> list[list[dict[str, Any]]]:
    """Follow the cursor from the first page to the last, through its text form, as a client does."""
    pages: list[list[dict[str, Any]]] = []
    after = None
    for _ in range(50):
        entries, cursor = board_page(records, dataset, order, limit, after, champion)
        pages.append(entries)
        if cursor is None:
            return pages
        after = decode_cursor(encode_cursor(cursor), order)
    raise AssertionError("the board never reached its last page")


@pytest.mark.parametrize(("order", "best_first"), [(RMSE, False), (R2, True)], ids=["rmse-lower", "r2-greater"])
def test_the_board_ranks_by_the_cv_mean_in_the_metrics_direction(
    records: Engine, dataset: dict[str, Any], owner: KeyInfo, ridge_folds: dict[float, dict[str, list[float]]],
    order: BoardOrder, best_first: bool,
) -> None:
    made = submit_all(records, dataset, owner, ridge_folds, order.metric)
    entries, cursor = board_page(records, dataset, order, limit=50)
    assert cursor is None
    # Reference: the submissions sorted by numpy's mean of their fold scores, best first.
    expected = sorted(made, key=lambda s: made[s], reverse=best_first)
    assert [e["submission"] for e in entries] == expected
    assert [e["cv"]["mean"] for e in entries] == pytest.approx([made[s] for s in expected], rel=1e-12)
    assert [e["rank"] for e in entries] == list(range(1, len(ALPHAS) + 1))
    by_label = {e["label"]: e for e in entries}
    assert by_label["ridge 1"]["cv"]["std"] == pytest.approx(float(np.std(ridge_folds[1.0][order.metric], ddof=1)))
    assert by_label["ridge 1"]["cv"]["n"] == 5
    assert all(e["submitter"] == {"key": owner.id, "name": "owner"} for e in entries)
    assert not any(e["champion"] for e in entries)


@pytest.mark.parametrize("limit", [1, 2, 3, 10, 11])
def test_pages_neither_repeat_nor_skip_an_entry_even_across_ties(
    records: Engine, dataset: dict[str, Any], owner: KeyInfo, ridge_folds: dict[float, dict[str, list[float]]],
    limit: int,
) -> None:
    made = submit_all(records, dataset, owner, ridge_folds, "rmse")
    for alpha in (0.3, 0.3, 30.0):  # resubmitted under other labels: equal means, told apart by id
        sub = make_submission(records, dataset, owner.id, label=f"again {alpha:g}", scores=ridge_folds[alpha]["rmse"])
        made[sub] = float(np.mean(ridge_folds[alpha]["rmse"]))
    pages = every_page(records, dataset, RMSE, limit)
    seen = [e for page in pages for e in page]
    assert [len(p) for p in pages[:-1]] == [limit] * (len(pages) - 1) and 1 <= len(pages[-1]) <= limit
    assert len(pages) == -(-len(made) // limit)  # ceil: no empty last page
    # Reference: sorted() by (mean, id), the order a keyset over (mean, id) has to reproduce.
    assert [e["submission"] for e in seen] == sorted(made, key=lambda s: (made[s], s))
    assert [e["rank"] for e in seen] == list(range(1, len(made) + 1))
    assert [e["submission"] for e in seen] == [e["submission"] for e in every_page(records, dataset, RMSE, 50)[0]]


def test_the_cursor_keeps_the_mean_to_the_last_bit(records: Engine, dataset: dict[str, Any], owner: KeyInfo) -> None:
    # 0.1 + 0.2 and 0.3 differ in the last bit of a double (IEEE 754); a cursor that rounded would skip one.
    means = [0.1 + 0.2, 0.3, 0.30000000000000004, 0.2999999999999999]
    made = {make_submission(records, dataset, owner.id, label=str(i), scores=[m] * 5): m
            for i, m in enumerate(means)}
    seen = [e["submission"] for page in every_page(records, dataset, RMSE, 1) for e in page]
    assert seen == sorted(made, key=lambda s: (made[s], s))
    cursor = BoardCursor(RMSE, 0.1 + 0.2, "sub_x", 3)
    assert decode_cursor(encode_cursor(cursor), RMSE) == cursor


def test_the_champion_is_marked_on_whichever_page_it_falls(
    records: Engine, dataset: dict[str, Any], owner: KeyInfo, ridge_folds: dict[float, dict[str, list[float]]],
) -> None:
    made = submit_all(records, dataset, owner, ridge_folds, "rmse")
    champion = sorted(made, key=lambda s: made[s])[4]
    marked = [e["submission"] for page in every_page(records, dataset, RMSE, 2, champion) for e in page
              if e["champion"]]
    assert marked == [champion]


def test_only_the_teams_live_or_finished_submissions_with_the_metric_are_on_the_board(
    records: Engine, dataset: dict[str, Any], owner: KeyInfo, ridge_folds: dict[float, dict[str, list[float]]],
) -> None:
    scores = ridge_folds[1.0]["rmse"]
    shown = {make_submission(records, dataset, owner.id, scores=scores),
             make_submission(records, dataset, owner.id, scores=scores, state="running", decision=None,
                             released=None)}
    make_submission(records, dataset, owner.id, scores=scores, state="failed", decision=None)
    make_submission(records, dataset, owner.id, scores=scores, state="canceled", decision=None)
    make_submission(records, dataset, owner.id, state="queued")  # no folds and no summary yet
    make_submission(records, dataset, owner.id, scores=ridge_folds[1.0]["r2"], metric="r2")  # no rmse
    entries, _ = board_page(records, dataset, RMSE, 50)
    assert {e["submission"] for e in entries} == shown
    # Another team never reaches the board: the dataset itself is not found for its keys.
    rival = create_key(records, "rivals", "submitter", "rival")[0]
    with pytest.raises(NotFound):
        team_dataset(records, rival, dataset["id"])


def test_the_holdout_column_shows_the_released_figure_never_the_raw_score(
    records: Engine, dataset: dict[str, Any], owner: KeyInfo, ridge_folds: dict[float, dict[str, list[float]]],
) -> None:
    scores = ridge_folds[1.0]["rmse"]
    released = make_submission(records, dataset, owner.id, label="released", scores=scores)
    withheld = make_submission(records, dataset, owner.id, label="withheld", scores=[s + 1 for s in scores],
                               released={})
    entries, _ = board_page(records, dataset, RMSE, 50)
    holdout = {e["submission"]: e["holdout"] for e in entries}
    assert holdout[released]["released"] is True and holdout[released]["mode"] == "exact"
    assert holdout[released]["score"] == round(float(np.mean(scores)), 3)  # make_submission releases the CV mean
    assert holdout[withheld]["released"] is False and holdout[withheld]["score"] is None
    assert str(RAW_HOLDOUT)[:6] not in json.dumps(entries)
    assert [e["verdict"] for e in entries] == ["pass", "pass"]


def _raw(value: Any) -> str:
    return base64.urlsafe_b64encode(json.dumps(value).encode()).decode().rstrip("=")


@pytest.mark.parametrize("text", [
    "garbage", "", "%%%", _raw({"metric": "rmse"}), _raw(["rmse", False, 55.0, "sub_x"]),
    _raw(["rmse", False, True, "sub_x", 3]), _raw(["rmse", False, 55.0, "sub_x", -1]),
    _raw(["rmse", False, 55.0, 7, 3]), _raw(["rmse", "no", 55.0, "sub_x", 3]), _raw(["rmse", False, "55", "sub_x", 3]),
    base64.urlsafe_b64encode(b"\xff\xfe").decode(),
], ids=["garbage", "empty", "not-base64", "object", "four-fields", "bool-mean", "negative-position", "int-id",
        "str-direction", "str-mean", "not-utf8"])
def test_a_malformed_cursor_is_refused_on_cursor(text: str) -> None:
    with pytest.raises(InputError) as caught:
        decode_cursor(text, RMSE)
    assert [p.pointer for p in caught.value.problems] == ["/cursor"]
    assert "next_cursor from an earlier page" in caught.value.detail


@pytest.mark.parametrize("other", [R2, BoardOrder("rmse", greater_is_better=True)], ids=["metric", "direction"])
def test_a_cursor_of_a_board_ranked_another_way_is_refused(other: BoardOrder) -> None:
    text = encode_cursor(BoardCursor(other, 0.5, "sub_x", 2))
    assert decode_cursor(text, other) == BoardCursor(other, 0.5, "sub_x", 2)
    with pytest.raises(InputError) as caught:
        decode_cursor(text, RMSE)
    assert [p.pointer for p in caught.value.problems] == ["/cursor"]
    assert "start again from the first page" in caught.value.detail


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def any_records(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Engine]:
    """A records DB on each dialect: their JSON paths quote keys differently."""
    if request.param == "sqlite":
        engine = records_engine(tmp_path / "records")
        yield engine
        engine.dispose()
        return
    with postgres_database() as url:
        engine = upgraded_engine(Settings.load({"data_dir": tmp_path, "database_url": url}, environ={}))
        yield engine
        engine.dispose()


@pytest.mark.parametrize("metric", ["pinball_loss(alpha=0.9)", "tweedie_deviance(power=1.5)",
                                    "f1(average=binary;pos_label=on%20time)"])
def test_a_metric_key_with_choices_ranks_on_every_dialect(
    any_records: Engine, ridge_folds: dict[float, dict[str, list[float]]], metric: str
) -> None:
    # A key is used inside the JSON path of the ranking query; PostgreSQL's path array splits on commas
    # and SQLite's quoted path keys end at a double quote, so keys hold neither (service.catalog.metric_keys).
    dataset = add_dataset_row(any_records, diabetes_frame(), "target", "regression", folds=5)
    owner = create_key(any_records, "fleet", "submitter", "owner")[0]
    made = submit_all(any_records, dataset, owner, {a: {metric: s["rmse"]} for a, s in ridge_folds.items()}, metric)
    entries, _ = board_page(any_records, dataset, BoardOrder(metric, greater_is_better=False), limit=50)
    assert [e["submission"] for e in entries] == sorted(made, key=lambda s: made[s])
