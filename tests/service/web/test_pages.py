"""The desk's pages through the Flask test client: what each shows, to whom, and what it never shows."""

from __future__ import annotations

import html
import io
import re
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from service.gate.release import Release
from service.records import champions, keys, policies
from tests.service.web.conftest import csrf_of, form_field, inputs, sign_in
from tests.support.api import Api
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.reviews import RAW_HOLDOUT, make_submission, verdict


def _client(api: Api, who: str) -> Any:
    client = api.app.test_client()
    assert sign_in(client, api.tokens[who]).status_code == 303
    return client


def _text(reply: Any) -> str:
    assert reply.status_code == 200, reply.get_data(as_text=True)[-2000:]
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", reply.get_data(as_text=True))).split())


def test_the_board_is_ranked_paged_and_marks_the_champion(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    champion = make_submission(api.engine, dataset, owner, label="the champion", scores=[55, 56, 54, 57, 53])
    api.post("steward", f"/v1/datasets/{dataset['id']}/champion", json={"submission": champion})
    tries = [make_submission(api.engine, dataset, owner, label=f"try {i}", scores=[50 + i, 52 + i, 49 + i, 53 + i,
                                                                                   51 + i]) for i in range(4)]
    client = _client(api, "submitter2")
    seen: list[str] = []
    url: str | None = f"/desk/datasets/{dataset['id']}?per=2"
    while url:
        page = client.get(url).get_data(as_text=True)
        seen += re.findall(r'<a href="/desk/submissions/(sub_\w+)/report">', page.split('id="board"')[1]
                           .split('aria-label="board pages"')[0])
        nxt = re.search(r'<a href="([^"]+)" rel="next">', page)
        url = html.unescape(nxt.group(1)).split("#")[0] if nxt else None
    # rmse: lower is better, so the tries rank by their means (51, 52, 53, 54), then the champion (55).
    assert seen == [*tries, champion]
    first = _text(client.get(f"/desk/datasets/{dataset['id']}"))
    assert "champion" in first and "version 0" in first and "pass" in first
    assert "holdout (as released)" in first and "51 this submission's score, rounded (exact, policy version 0)" in first


def test_a_ladder_figure_on_the_board_is_labelled_as_the_dataset_best(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    holder = make_submission(api.engine, dataset, owner, label="holder", scores=[50, 51, 49, 52, 48],
                             release_with=lambda sub: Release("ladder", {"rmse": 50.1}, 1,
                                                              {"ladder": {"best_submission": sub}}))
    make_submission(api.engine, dataset, owner, label="follower", scores=[51, 52, 50, 53, 49],
                    release_with=lambda sub: Release("ladder", {"rmse": 50.1}, 1,
                                                     {"ladder": {"best_submission": holder}}), policy_version=0)
    text = _text(_client(api, "submitter").get(f"/desk/datasets/{dataset['id']}"))
    assert "50.1 new best: this submission set the dataset's best so far (ladder, policy version 0)" in text
    assert "50.1 the dataset's best so far, not this submission's (ladder, policy version 0)" in text


def test_no_page_shows_the_raw_holdout_or_the_seal(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    a = make_submission(api.engine, dataset, owner, label="a", scores=[55, 56, 54, 57, 53])
    b = make_submission(api.engine, dataset, owner, label="b", scores=[50, 52, 49, 53, 51], released=None)
    for who in ("submitter", "steward", "admin"):
        client = _client(api, who)
        for path in ("/desk/", f"/desk/datasets/{dataset['id']}", f"/desk/compare?a={a}&b={b}",
                     f"/desk/submissions/{b}/report", *(("/desk/audit",) if who != "submitter" else ())):
            page = client.get(path).get_data(as_text=True)
            assert str(RAW_HOLDOUT)[:6] not in page, (who, path)
            assert "sealing_seed" not in page and "holdout_fingerprint" not in page


def test_the_balance_table_reaches_stewards_only(api: Api, dataset: dict[str, Any]) -> None:
    submitter = _text(_client(api, "submitter").get(f"/desk/datasets/{dataset['id']}"))
    steward = _text(_client(api, "steward").get(f"/desk/datasets/{dataset['id']}"))
    for text in (submitter, steward):
        assert "Balanced: a classifier told development rows from holdout rows with an AUC of" in text
    assert "Per column, development against holdout" in steward and "Every draw of the holdout" in steward
    assert "Per column" not in submitter and "standardised mean difference" not in submitter


def test_missing_values_are_counted_on_the_development_rows(api: Api) -> None:
    frame = diabetes_frame()
    rng = np.random.default_rng(7)
    frame.loc[rng.choice(len(frame), 40, replace=False), "bmi"] = np.nan
    frame.loc[rng.choice(len(frame), 9, replace=False), "s3"] = np.nan
    reply = api.upload("steward", csv_bytes(frame), name="gaps", target="target", task="regression")
    assert reply.status_code == 201, reply.get_data(as_text=True)
    ds = reply.get_json()
    # Reference: pandas' own count on the development CSV the API serves.
    development = pd.read_csv(io.BytesIO(api.get("submitter", f"/v1/datasets/{ds['id']}/development").data))
    expected = development.isna().sum()
    page = _client(api, "submitter").get(f"/desk/datasets/{ds['id']}").get_data(as_text=True)
    columns = page.split('id="columns"')[1]
    for name in ("bmi", "s3", "age"):
        row = re.search(rf"<tr><td>{name}</td><td>[^<]*</td><td>[^<]*</td><td class=\"num\">(\d+)</td></tr>", columns)
        assert row is not None and int(row.group(1)) == int(expected[name]), name
    assert int(expected["bmi"]) > 0


def test_the_policy_form_refuses_what_the_api_refuses_with_its_messages(api: Api, dataset: dict[str, Any]) -> None:
    client = _client(api, "steward")
    path = f"/desk/datasets/{dataset['id']}/policy"
    form = client.get(path).get_data(as_text=True)
    assert form_field(form, "champion_margin") == "0" and 'value="rmse" selected' in form
    fields = {**inputs(form), "primary_metric": "rmse", "release.mode": "ladder"}
    fields.update({"champion_margin": "-2", "baseline_alpha": "lots", "release.digits": "2.5"})
    refused = client.post(path, data=fields)
    assert refused.status_code == 422
    shown = html.unescape(refused.get_data(as_text=True))
    # The API, sent the same document as JSON.
    body = {"champion_margin": -2, "baseline_alpha": "lots", "release": {"digits": 2.5}}
    problem = api.problem(api.call("steward", "PUT", f"/v1/datasets/{dataset['id']}/policy", json=body), 422)
    assert len(problem["errors"]) == 3
    for item in problem["errors"]:
        assert item["detail"] in shown
    assert 'aria-invalid="true"' in shown and policies.current(api.engine, dataset["id"]) is None
    fields.update({"champion_margin": "2.5", "baseline_alpha": "0.1", "release.digits": "4"})
    saved = client.post(path, data=fields)
    assert saved.status_code == 303 and saved.headers["Location"].endswith("#policy")
    stored = policies.current(api.engine, dataset["id"])
    assert stored is not None and stored[0] == 1
    assert stored[1]["champion_margin"] == 2.5 and stored[1]["release"]["digits"] == 4
    assert stored[1] == {k: v for k, v in api.get("steward", f"/v1/datasets/{dataset['id']}/policy")
                         .get_json().items() if k != "version"}
    page = _text(client.get(f"/desk/datasets/{dataset['id']}"))
    assert "Policy versions, newest first" in page and "margin allowed behind the champion 2.5" in page


def test_a_submitter_is_refused_the_steward_and_admin_pages(api: Api, dataset: dict[str, Any]) -> None:
    client = _client(api, "submitter")
    for path in (f"/desk/datasets/{dataset['id']}/policy", "/desk/audit", "/desk/keys",
                 f"/desk/datasets/{dataset['id']}/promote?submission=x"):
        reply = client.get(path)
        assert reply.status_code == 403 and "needs a" in reply.get_data(as_text=True), path
    steward = _client(api, "steward")
    assert steward.get("/desk/keys").status_code == 403
    other = _client(api, "other_steward")
    assert other.get(f"/desk/datasets/{dataset['id']}").status_code == 404


def test_promotion_asks_first_and_refuses_a_failed_verdict(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    good = make_submission(api.engine, dataset, owner, label="good", scores=[55, 56, 54, 57, 53])
    bad = make_submission(api.engine, dataset, owner, label="bad", scores=[65, 66, 64, 67, 63], decision="fail")
    client = _client(api, "steward")
    ask = client.get(f"/desk/datasets/{dataset['id']}/promote?submission={good}")
    assert "Yes, promote it" in ask.get_data(as_text=True) and champions.current(api.engine, dataset["id"]) is None
    token = form_field(ask.get_data(as_text=True), "csrf")
    refused = client.post(f"/desk/datasets/{dataset['id']}/promote", data={"submission": bad, "csrf": token})
    expected = api.problem(api.post("steward", f"/v1/datasets/{dataset['id']}/champion",
                                    json={"submission": bad}), 409)["detail"]
    assert refused.status_code == 409 and expected in html.unescape(refused.get_data(as_text=True))
    done = client.post(f"/desk/datasets/{dataset['id']}/promote", data={"submission": good, "csrf": token})
    assert done.status_code == 303 and champions.current(api.engine, dataset["id"]) == good
    trail = _text(client.get("/desk/audit"))
    assert "promoted a champion" in trail and f"{good}, the first champion" in trail


def test_an_admin_creates_and_revokes_keys(api: Api) -> None:
    client = _client(api, "admin")
    token = csrf_of(client, "/desk/keys")
    made = client.post("/desk/keys", data={"csrf": token, "role": "steward", "name": "night shift"})
    assert made.status_code == 201 and made.headers["Cache-Control"] == "private, no-store"
    secret = re.search(r"<code>(sf_[^<]+)</code>", made.get_data(as_text=True))
    assert secret is not None
    assert api.get(secret.group(1), "/v1/datasets").status_code == 200
    bad = client.post("/desk/keys", data={"csrf": token, "role": "owner", "name": "x"})
    assert bad.status_code == 422 and "Must be one of: submitter, steward, admin." in bad.get_data(as_text=True)
    made_id = next(k.id for k in keys.live_keys_named(api.engine, "fleet", "night shift"))
    gone = client.post(f"/desk/keys/{made_id}/revoke", data={"csrf": token})
    assert gone.status_code == 303
    assert api.get(secret.group(1), "/v1/datasets").status_code == 401
    assert "revoked" in _text(client.get("/desk/keys"))


def test_two_submissions_side_by_side(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    a_scores, b_scores = [50.0, 52.5, 49.0, 53.0, 51.5], [51.0, 52.0, 50.5, 54.0, 53.0]
    a = make_submission(api.engine, dataset, owner, label="first", scores=a_scores)
    b = make_submission(api.engine, dataset, owner, label="second", scores=b_scores)
    text = _text(_client(api, "submitter").get(f"/desk/compare?a={a}&b={b}"))
    # Reference: the corrected resampled t of Nadeau & Bengio (2003), t = mean(d) / sqrt((1/J + n2/n1) var(d)),
    # with J-1 degrees of freedom; rmse is lower-is-better, so d = B - A (positive: A better).
    d = np.array(b_scores) - np.array(a_scores)
    t = d.mean() / np.sqrt((1 / len(d) + 71 / 283) * d.var(ddof=1))
    p = 2 * stats.t.sf(abs(t), len(d) - 1)
    assert f"corrected resampled t = {t:.3f}, df 4, two-sided p = {p:.3g}" in text
    assert f"A is better than B by {abs(d.mean()):.3g} rmse on average" in text
    assert "over 5 shared folds" in text and "A better by" in text
    assert "<polyline" not in _client(api, "submitter").get(f"/desk/compare?a={a}&b={b}").get_data(as_text=True)
    refused = _client(api, "submitter").get(f"/desk/compare?a={a}&b={a}")
    assert refused.status_code == 422 and "pick two different submissions" in refused.get_data(as_text=True)


def test_a_verdict_that_judged_one_against_the_other_is_the_test_shown(api: Api, dataset: dict[str, Any]) -> None:
    owner = api.key_ids["submitter"]
    champion = make_submission(api.engine, dataset, owner, label="old", scores=[50, 51, 49, 52, 48])
    rule = {"rule": "champion", "outcome": "fail", "sentence": "Worse than champion ... t = -7.589, df 4",
            "figures": {"cells": 5, "margin": 0.0, "mean_difference": -2.56, "alpha": 0.05}}
    doc = {**verdict("fail", champion=champion), "rules": [rule]}
    new = make_submission(api.engine, dataset, owner, label="new", scores=[52, 54, 51, 55, 51], verdict_doc=doc,
                          champion_id=champion)
    text = _text(_client(api, "submitter").get(f"/desk/compare?a={new}&b={champion}"))
    assert "A's verdict judged it against B" in text
    assert "Worse than the champion by 2.56 rmse, beyond the margin of 0; the folds show it clearly." in text
    assert "t = -7.589, df 4" in text
