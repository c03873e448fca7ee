"""Review-gate endpoints: policy (GET/PUT, versions, 422s), champion rules, the board, the report page."""

from __future__ import annotations

import html.parser
import json
from typing import TYPE_CHECKING, Any

import pytest

from service.gate.policy import default_policy
from service.records import audit, champions, policies
from tests.support.reviews import RAW_HOLDOUT, make_submission, verdict

if TYPE_CHECKING:
    from tests.support.api import Api



def _sub(api: Api, dataset: dict[str, Any], who: str = "submitter", **kwargs: Any) -> str:
    return make_submission(api.engine, dataset, api.key_ids[who], **kwargs)


# -- policy ---------------------------------------------------------------------------------------

def test_policy_defaults_to_the_task_default_as_version_0(api: Api, dataset: dict[str, Any]) -> None:
    reply = api.get("submitter", f"/v1/datasets/{dataset['id']}/policy")
    assert reply.status_code == 200
    doc = reply.get_json()
    assert doc == default_policy("regression").to_document(0)
    assert doc["version"] == 0 and doc["primary_metric"] == "rmse" and doc["greater_is_better"] is False


def test_put_policy_is_steward_only_versioned_and_audited(api: Api, dataset: dict[str, Any]) -> None:
    path = f"/v1/datasets/{dataset['id']}/policy"
    api.problem(api.call("submitter", "PUT", path, json={"champion_margin": 1.0}), 403)
    api.problem(api.call("other_steward", "PUT", path, json={"champion_margin": 1.0}), 404)
    api.problem(api.call(None, "PUT", path, json={"champion_margin": 1.0}), 401)
    first = api.call("steward", "PUT", path, json={"champion_margin": 2.5, "bar": 60.0})
    assert first.status_code == 200, first.get_data(as_text=True)
    assert first.get_json()["version"] == 1 and first.get_json()["champion_margin"] == 2.5
    # A version sent back from a GET is ignored: the server assigns the next one.
    body = {**first.get_json(), "primary_metric": "mae", "version": 7}
    second = api.call("steward", "PUT", path, json=body)
    assert second.status_code == 200 and second.get_json()["version"] == 2
    now = api.get("submitter2", path).get_json()
    assert now == second.get_json()
    assert now["primary_metric"] == "mae" and now["bar"] == 60.0
    assert policies.current(api.engine, dataset["id"]) == (2, {k: v for k, v in now.items() if k != "version"})
    events = [e for e in audit.events_for(api.engine, dataset["id"]) if e["action"] == "policy.set"]
    assert [e["detail"]["version"] for e in events] == [1, 2]
    assert {e["actor"] for e in events} == {api.key_ids["steward"]}


@pytest.mark.parametrize(("body", "pointer"), [
    ({"primary_metric": "accuracy"}, "/primary_metric"),  # a classification metric on a regression dataset
    ({"primary_metric": "rmsle"}, "/primary_metric"),
    ({"champion_margin": -0.5}, "/champion_margin"),
    ({"baseline_alpha": 0.5}, "/baseline_alpha"),
    ({"champion_alpha": 0}, "/champion_alpha"),
    ({"greater_is_better": True}, "/greater_is_better"),
    ({"release": {"mode": "peek"}}, "/release/mode"),
    ({"holdout_gap": {"floor": -1}}, "/holdout_gap/floor"),
    ({"bogus": 1}, "/bogus"),
    ([1, 2], ""),
])
def test_a_bad_policy_is_422_with_a_pointer_and_stores_nothing(
    api: Api, dataset: dict[str, Any], body: Any, pointer: str
) -> None:
    path = f"/v1/datasets/{dataset['id']}/policy"
    problem = api.problem(api.call("steward", "PUT", path, json=body), 422)
    assert pointer in api.pointers(problem), problem
    assert policies.current(api.engine, dataset["id"]) is None
    assert api.get("steward", path).get_json()["version"] == 0


def test_a_policy_body_must_be_json(api: Api, dataset: dict[str, Any]) -> None:
    path = f"/v1/datasets/{dataset['id']}/policy"
    api.problem(api.call("steward", "PUT", path, data="bar=3", content_type="application/x-www-form-urlencoded"),
                415)
    api.problem(api.call("steward", "PUT", path, data="{not json", content_type="application/json"), 400)
    assert policies.current(api.engine, dataset["id"]) is None


# -- champion -------------------------------------------------------------------------------------

def test_promoting_a_pass_keeps_the_previous_champion_in_the_history(api: Api, dataset: dict[str, Any]) -> None:
    path = f"/v1/datasets/{dataset['id']}/champion"
    first = _sub(api, dataset, label="first", scores=[50, 52, 51, 53, 49])
    second = _sub(api, dataset, label="second", scores=[48, 50, 49, 51, 47])
    assert api.get("submitter", path).get_json() == {"dataset": dataset["id"], "champion": None, "history": []}
    reply = api.post("steward", path, json={"submission": first})
    assert reply.status_code == 200, reply.get_data(as_text=True)
    assert reply.get_json()["champion"]["submission"] == first
    again = api.post("steward", path, json={"submission": first})  # already champion: no new history row
    assert len(again.get_json()["history"]) == 1
    doc = api.post("steward", path, json={"submission": second}).get_json()
    assert doc["champion"]["submission"] == second and doc["champion"]["label"] == "second"
    assert doc["champion"]["verdict"] == "pass" and doc["champion"]["promoted_by"] == api.key_ids["steward"]
    assert [h["submission"] for h in doc["history"]] == [second, first]
    assert api.get("submitter", path).get_json() == doc
    assert champions.current(api.engine, dataset["id"]) == second
    events = [e for e in audit.events_for(api.engine, dataset["id"]) if e["action"] == "champion.promoted"]
    assert [(e["detail"]["submission"], e["detail"]["previous"]) for e in events] == [(first, None), (second, first)]


def test_only_a_pass_of_this_dataset_in_the_team_can_be_champion(
    api: Api, dataset: dict[str, Any], diabetes_csv: bytes
) -> None:
    path = f"/v1/datasets/{dataset['id']}/champion"
    failed = _sub(api, dataset, scores=[70, 71, 72, 70, 69], decision="fail")
    unsure = _sub(api, dataset, scores=[70, 71, 72, 70, 69], decision="inconclusive")
    queued = _sub(api, dataset, state="queued", decision=None)
    for sub_id, said in ((failed, "'fail'"), (unsure, "'inconclusive'"), (queued, "no verdict yet")):
        problem = api.problem(api.post("steward", path, json={"submission": sub_id}), 409)
        assert said in problem["detail"] and "pass" in problem["detail"]
    other = api.upload("steward", diabetes_csv, name="diabetes again", target="target", task="regression").get_json()
    elsewhere = _sub(api, other, scores=[50, 51, 52, 50, 49])
    problem = api.problem(api.post("steward", path, json={"submission": elsewhere}), 422)
    assert api.pointers(problem) == ["/submission"] and other["id"] in problem["detail"]
    assert api.pointers(api.problem(api.post("steward", path, json={"submission": "sub_nope"}), 404)) == [
        "/submission"]
    api.problem(api.post("steward", path, json={}), 422)
    good = _sub(api, dataset, scores=[50, 51, 52, 50, 49])
    api.problem(api.post("submitter", path, json={"submission": good}), 403)
    api.problem(api.post("other_steward", path, json={"submission": good}), 404)
    assert champions.history(api.engine, dataset["id"]) == []


# -- board ----------------------------------------------------------------------------------------

def _board(api: Api, ds_id: str, who: str = "submitter", **query: Any) -> dict[str, Any]:
    reply = api.get(who, f"/v1/datasets/{ds_id}/board", query_string=query)
    assert reply.status_code == 200, reply.get_data(as_text=True)
    return dict(reply.get_json())


def test_board_ranks_by_the_primary_metric_and_shows_only_released_figures(
    api: Api, dataset: dict[str, Any]
) -> None:
    worst = _sub(api, dataset, label="worst", scores=[70, 72, 71, 69, 73], decision="fail")
    best = _sub(api, dataset, "submitter2", label="best", scores=[50, 51, 49, 52, 48])
    middle = _sub(api, dataset, label="middle", scores=[60, 61, 59, 62, 58], released=None)
    _sub(api, dataset, label="queued", state="queued", decision=None)
    _sub(api, dataset, label="canceled", scores=[10, 10, 10, 10, 10], state="canceled", decision=None)
    _sub(api, dataset, label="failed", scores=[10, 10, 10, 10, 10], state="failed", decision=None)
    api.post("steward", f"/v1/datasets/{dataset['id']}/champion", json={"submission": best})
    doc = _board(api, dataset["id"])
    assert (doc["primary_metric"], doc["greater_is_better"], doc["policy_version"]) == ("rmse", False, 0)
    assert [e["submission"] for e in doc["entries"]] == [best, middle, worst]  # rmse: lower first
    assert [e["rank"] for e in doc["entries"]] == [1, 2, 3] and doc["next_cursor"] is None
    top = doc["entries"][0]
    assert top["label"] == "best" and top["champion"] is True and doc["champion"] == best
    assert top["cv"]["mean"] == pytest.approx(50.0) and top["cv"]["n"] == 5
    low, high = top["cv"]["naive_interval_95"]
    assert low < 50.0 < high
    assert top["holdout"] == {"released": True, "mode": "exact", "score": 50.0, "withheld_until": None,
                              "policy_version": 0, "figure": "own_score", "ladder": None,
                              "summary": "this submission's holdout score: rmse 50 (exact, rounded)"}
    assert doc["holdout_policies"] == [{"mode": "exact", "policy_version": 0}] and doc["mixed_policies"] is None
    assert top["verdict"] == "pass" and top["submitter"] == {"key": api.key_ids["submitter2"], "name": "submitter2"}
    assert top["created_at"].endswith("Z")
    assert doc["entries"][1]["holdout"]["released"] is False and doc["entries"][1]["holdout"]["score"] is None
    assert doc["entries"][2]["verdict"] == "fail" and doc["entries"][2]["champion"] is False
    # The raw holdout score (stored for each succeeded submission) never leaves.
    assert str(RAW_HOLDOUT)[:6] not in json.dumps(doc)


def test_board_follows_the_policy_in_force(api: Api, dataset: dict[str, Any]) -> None:
    a = _sub(api, dataset, label="a", metric="r2", scores=[0.40, 0.42, 0.41, 0.39, 0.43])
    b = _sub(api, dataset, label="b", metric="r2", scores=[0.50, 0.52, 0.51, 0.49, 0.53])
    _sub(api, dataset, label="rmse only", scores=[50, 51, 49, 52, 48])
    old = _board(api, dataset["id"], limit=1)
    assert [e["label"] for e in old["entries"]] == ["rmse only"] and old["next_cursor"] is None
    api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json={"primary_metric": "r2"})
    doc = _board(api, dataset["id"], limit=1)
    assert doc["primary_metric"] == "r2" and doc["greater_is_better"] is True and doc["policy_version"] == 1
    assert [e["submission"] for e in doc["entries"]] == [b]  # r2: higher first
    cursor = doc["next_cursor"]
    assert [e["submission"] for e in _board(api, dataset["id"], limit=1, cursor=cursor)["entries"]] == [a]
    # A cursor of the r2 board is refused once the policy ranks by another metric.
    api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json={"primary_metric": "mae"})
    problem = api.problem(api.get("submitter", f"/v1/datasets/{dataset['id']}/board",
                                  query_string={"cursor": cursor}), 422)
    assert api.pointers(problem) == ["/cursor"] and "'r2'" in problem["detail"]


def _every_page(api: Api, ds_id: str, limit: int) -> list[dict[str, Any]]:
    """Follow next_cursor from the first page to the last (at most 10 pages) and return every entry."""
    seen: list[dict[str, Any]] = []
    cursor = None
    for _ in range(10):
        page = _board(api, ds_id, limit=limit, **({} if cursor is None else {"cursor": cursor}))
        seen += page["entries"]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    return seen


def test_board_pages_cover_every_entry_once_across_ties(api: Api, dataset: dict[str, Any]) -> None:
    means = [55, 50, 55, 60, 50, 55, 45]
    made = {_sub(api, dataset, label=f"m{m}-{i}", scores=[m - 1, m + 1, m, m, m]): m for i, m in enumerate(means)}
    seen = _every_page(api, dataset["id"], limit=2)
    assert sorted(e["submission"] for e in seen) == sorted(made)
    assert [e["cv"]["mean"] for e in seen] == pytest.approx(sorted(means))
    assert [e["rank"] for e in seen] == list(range(1, len(means) + 1))
    ties = [e["submission"] for e in seen if made[e["submission"]] == 55]
    assert ties == sorted(ties)  # ties in id order, so a page boundary inside them loses nothing


def test_board_is_team_scoped_and_checks_its_query(api: Api, dataset: dict[str, Any]) -> None:
    _sub(api, dataset, scores=[50, 51, 49, 52, 48])
    api.problem(api.get("other_submitter", f"/v1/datasets/{dataset['id']}/board"), 404)
    api.problem(api.get("submitter", "/v1/datasets/ds_nope/board"), 404)
    api.problem(api.get(None, f"/v1/datasets/{dataset['id']}/board"), 401)
    bad = api.problem(api.get("submitter", f"/v1/datasets/{dataset['id']}/board?cursor=garbage"), 422)
    assert api.pointers(bad) == ["/cursor"]
    assert api.pointers(api.problem(api.get("submitter", f"/v1/datasets/{dataset['id']}/board?limit=0"),
                                    422)) == ["/limit"]


@pytest.fixture
def pg_api(tmp_path: Any) -> Any:
    """The app on a throwaway PostgreSQL records DB (the board's JSON-path SQL differs per dialect)."""
    import dataclasses

    import fakeredis

    from service.app import create_app
    from service.records.keys import create_key
    from service.settings import Settings
    from tests.support.api import WHO, Api
    from tests.support.records import upgraded_engine
    from tests.support.servers import postgres_database

    with postgres_database() as url:
        overrides = {"data_dir": tmp_path / "data", "database_url": url, "redis_url": "redis://127.0.0.1:1/0",
                     "min_rows": 50}
        upgraded_engine(Settings.load(overrides)).dispose()
        app = create_app(overrides)
        ctx = app.extensions["sealfold"]
        app.extensions["sealfold"] = dataclasses.replace(ctx, redis=fakeredis.FakeRedis())
        made = {who: create_key(ctx.engine, team, role, who) for who, (team, role) in WHO.items()}
        yield Api(app, app.test_client(), {w: t for w, (_, t) in made.items()},
                  {w: i.id for w, (i, _) in made.items()})
        ctx.engine.dispose()


@pytest.mark.postgres
def test_board_ranks_and_pages_on_postgresql(pg_api: Api, diabetes_csv: bytes) -> None:
    api = pg_api
    dataset = api.upload("steward", diabetes_csv, name="diabetes", target="target", task="regression").get_json()
    means = [0.1 + 0.2, 55.0, 0.3, 55.0, 12.5]  # 0.1 + 0.2 != 0.3: the cursor must keep full precision
    made = {_sub(api, dataset, label=str(i), scores=[m] * 5): m for i, m in enumerate(means)}
    seen = _every_page(api, dataset["id"], limit=1)
    assert sorted(e["submission"] for e in seen) == sorted(made)
    assert [e["cv"]["mean"] for e in seen] == pytest.approx(sorted(means))
    assert seen[0]["holdout"]["score"] == pytest.approx(0.3) and seen[0]["holdout"]["released"] is True
    assert str(RAW_HOLDOUT)[:6] not in json.dumps(seen)


# -- report ---------------------------------------------------------------------------------------

HOSTILE = '<script>alert("label")</script>'


class _Tags(html.parser.HTMLParser):
    """Collect every start tag and attribute name the browser would see."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.attributes: set[str] = set()
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.attributes.update(name for name, _ in attrs)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _coefficients(names: list[str], folds: int) -> dict[tuple[int, int], dict[str, Any]]:
    # The first term keeps its sign in every fold, the second flips in fold 2.
    return {(0, f): {"names": names, "outputs": ["target"], "intercept": [150.0 + f],
                     "values": [[10.0 + f, -1.0 if f == 2 else 1.0]]} for f in range(folds)}


def test_report_escapes_user_text_and_shows_the_evidence(api: Api, dataset: dict[str, Any]) -> None:
    champion = _sub(api, dataset, label="champion", scores=[55, 56, 54, 57, 53])
    api.post("steward", f"/v1/datasets/{dataset['id']}/champion", json={"submission": champion})
    hostile_term = '<img src=x onerror="alert(1)">'
    doc = verdict("fail", reasons=[f"the model does not beat the baseline on {HOSTILE}", "no bar is set"],
                  champion=champion)
    sub_id = _sub(api, dataset, label=HOSTILE, scores=[50.5, 51.5, 49.5, 52.5, 48.5], verdict_doc=doc,
                  champion_id=champion, coefficients=_coefficients(["bmi", hostile_term], 5))
    reply = api.get("submitter2", f"/v1/submissions/{sub_id}/report")
    assert reply.status_code == 200 and reply.mimetype == "text/html"
    assert "script-src" not in reply.headers["Content-Security-Policy"]
    assert reply.headers["Content-Security-Policy"].startswith("default-src 'none'")
    page = reply.get_data(as_text=True)
    parsed = _Tags()
    parsed.feed(page)
    # Escaped: the browser sees no script or img element and no event-handler attribute, only the text.
    assert "script" not in parsed.tags and "img" not in parsed.tags
    assert not {a for a in parsed.attributes if a.startswith("on")}
    assert HOSTILE not in page and "&lt;script&gt;alert(&quot;label&quot;)&lt;/script&gt;" in page
    text = "".join(parsed.text)
    assert HOSTILE in text and hostile_term in text
    # Verdict and reasons at the top, before the charts.
    assert page.index("fail") < page.index("<svg")
    assert "does not beat the baseline" in text and "corrected resampled t-test" in text
    # Fold chart with candidate, baseline and the champion on the same folds; the naive interval; the release.
    assert parsed.tags.count("svg") >= 3
    assert "champion, fold 3: rmse 57" in text and "baseline, fold 0: rmse 65.65" in text
    assert "naive" in text and "holdout, as released: rmse 50.5" in text
    assert str(RAW_HOLDOUT)[:6] not in page
    # Coefficient stability: bmi keeps its sign, the hostile term does not.
    assert "\u2713 yes" in text and "\u2717 no" in text
    assert dataset["fingerprint"] in text and "scikit-learn version" in text


def test_report_of_an_unfinished_submission_and_scoping(api: Api, dataset: dict[str, Any]) -> None:
    queued = _sub(api, dataset, label="waiting", state="queued", decision=None)
    reply = api.get("submitter", f"/v1/submissions/{queued}/report")
    assert reply.status_code == 200 and "No verdict yet: the submission is queued." in reply.get_data(as_text=True)
    api.problem(api.get("other_submitter", f"/v1/submissions/{queued}/report"), 404)
    api.problem(api.get(None, f"/v1/submissions/{queued}/report"), 401)
    api.problem(api.get("submitter", "/v1/submissions/sub_nope/report"), 404)
