"""Request parsing of learning-curve sizes and nested searches: resolved documents and 422 pointers."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import pytest

from service.submission.config import MAX_CANDIDATES
from tests.support.api import count_submissions, submission_body

if TYPE_CHECKING:
    from tests.support.api import Api



def test_curve_and_search_reach_the_worker_check_as_resolved(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    body = submission_body(dataset, validation={"learning_curve": [0.1, 0.5, 1.0]},
                 search={"grid": {"alpha": [0.1, 1, 10]}, "inner_folds": 3})
    body["model"]["params"] = {}
    response = api.post("submitter", "/v1/submissions", json=body)
    assert response.status_code == 202, response.get_json()
    (asked,) = worker_says_ok
    assert asked["validation"]["learning_curve"] == [0.1, 0.5, 1.0]
    assert asked["search"] == {"grid": {"alpha": [0.1, 1, 10]}, "distributions": None, "n_iter": None,
                               "inner_folds": 3}
    document = response.get_json()
    assert document["config"]["validation"]["learning_curve"] == [0.1, 0.5, 1.0]
    assert document["config"]["search"]["grid"] == {"alpha": [0.1, 1, 10]}


def test_without_options_the_document_has_no_search(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]]
) -> None:
    assert api.post("submitter", "/v1/submissions", json=submission_body(dataset)).status_code == 202
    (asked,) = worker_says_ok
    assert asked["search"] is None and "learning_curve" not in asked["validation"]


@pytest.mark.parametrize(("change", "pointer"), [
    ({"validation": {"learning_curve": [0.5, 1.5]}}, "/validation/learning_curve/1"),
    ({"validation": {"learning_curve": [0.5, 0.1]}}, "/validation/learning_curve"),
    ({"validation": {"learning_curve": ["half"]}}, "/validation/learning_curve/0"),
    ({"search": {"grid": {"alpha": [0.1]}, "inner_folds": 1}}, "/search/inner_folds"),
    ({"search": {"grid": {"alpha": [0.1]}, "inner_folds": "3"}}, "/search/inner_folds"),
    ({"search": {"grid": {"alpha": "0.1"}}}, "/search/grid/alpha"),
    ({"search": {"inner_folds": 3}}, "/search"),
    ({"search": {"distributions": {"alpha": [0.1, 1.0]}, "n_iter": MAX_CANDIDATES + 1}}, "/search/n_iter"),
    ({"search": {"grid": {"alpha": list(range(1, 11)), "tol": [1e-4, 1e-3, 1e-2, 1e-1, 1, 2]}}}, "/search/grid"),
])
def test_bad_options_are_422_with_a_pointer(
    api: Api, dataset: dict[str, Any], worker_says_ok: list[dict[str, Any]], change: dict[str, Any], pointer: str
) -> None:
    body = submission_body(dataset, **change)
    body["model"]["params"] = {}
    problem = api.problem(api.post("submitter", "/v1/submissions", json=body), 422)
    assert pointer in api.pointers(problem), problem
    assert count_submissions(api) == 0 and worker_says_ok == []
