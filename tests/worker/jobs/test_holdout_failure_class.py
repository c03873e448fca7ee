"""Every way a pipeline's success can depend on the sealed rows is one counted query, told in fixed words.

Whether a refit-and-score runs at all depends on what the rows it is applied to hold: a category the
development rows lack (an encoder that refuses unknown values, or one given a category list), a
missing value where the development rows have none (an estimator that refuses NaN). Each such
configuration, when the sealed rows hold the value, fails on the holdout. The tests enumerate the
catalog's parameters of that class (``handle_unknown`` and ``categories`` of every transformer that
has them), confirm with scikit-learn itself which values raise on the same rows, and show that each
failing one spends one unit of budget and leaves the same document, in the same words, as any other.
"""

from __future__ import annotations

import json
import warnings
from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from sklearn.datasets import load_diabetes
from sklearn.preprocessing import OneHotEncoder, OrdinalEncoder, TargetEncoder

from service.catalog import load_catalog
from service.records import holdout_releases, policies, submissions
from service.submission.document import submission_document
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict

SECRET = "secret-depot-7"  # a category only the sealed rows hold
KNOWN = ["north", "south"]
ENCODERS = {"OneHotEncoder": OneHotEncoder, "OrdinalEncoder": OrdinalEncoder}
# Whether a fixed category list that lacks a value makes transform raise on that value (checked against
# scikit-learn below): TargetEncoder encodes an unknown category with the target mean instead.
CATEGORY_LIST_RAISES = {"OneHotEncoder": True, "OrdinalEncoder": True, "TargetEncoder": False}
CATEGORY_LISTS = {**ENCODERS, "TargetEncoder": TargetEncoder}

# Each catalog value of a parameter that decides what an encoder does with a value it was not fitted
# on, and whether that value makes transform raise (checked against scikit-learn below).
UNKNOWN_HANDLING: dict[tuple[str, str], bool] = {
    ("OneHotEncoder", "error"): True,
    ("OneHotEncoder", "ignore"): False,
    ("OneHotEncoder", "infrequent_if_exist"): False,
    ("OneHotEncoder", "warn"): False,
    ("OrdinalEncoder", "error"): True,
    ("OrdinalEncoder", "use_encoded_value"): False,
}


def _frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn) with a depot column; the seal holds an extra
    depot and a missing bmi, neither of which the development rows have."""
    frame = load_diabetes(as_frame=True).frame
    frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
    frame = frame.drop(columns="sex")
    dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
    hold.loc[hold.index[0], "depot"] = SECRET
    hold.loc[hold.index[1], "bmi"] = np.nan
    return dev, hold


def _encoder_params(name: str, handling: str) -> dict[str, Any]:
    params: dict[str, Any] = {"handle_unknown": handling}
    if name == "OrdinalEncoder" and handling == "use_encoded_value":
        params["unknown_value"] = -1
    return params


def _catalog_unknown_handling() -> set[tuple[str, str]]:
    """Every (transformer, handle_unknown value) the catalog allows, read from its type description."""
    found = set()
    for entry in load_catalog().transformers():
        spec = entry.params.get("handle_unknown")
        if spec is not None:
            found |= {(entry.name, v) for v in spec["type"].split("'")[1::2]}
    return found


def test_the_table_covers_every_unknown_handling_the_catalog_allows() -> None:
    assert _catalog_unknown_handling() == set(UNKNOWN_HANDLING)
    # ... and every transformer that takes a category list is an encoder enumerated here.
    with_categories = {e.name for e in load_catalog().transformers() if "categories" in e.params}
    assert with_categories == set(CATEGORY_LIST_RAISES)


def _raises_on_sealed(encoder: Any, hold: pd.DataFrame) -> bool:
    """Whether scikit-learn's fitted ``encoder`` raises on the sealed depot column."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            encoder.transform(hold[["depot"]])
        except ValueError as exc:
            assert SECRET in str(exc)  # scikit-learn's message quotes the sealed value
            return True
    return False


@pytest.mark.parametrize("name", sorted(CATEGORY_LIST_RAISES))
def test_a_category_list_raises_exactly_where_the_table_says(name: str) -> None:
    dev, hold = _frames()
    params: dict[str, Any] = {"categories": [KNOWN]}
    if name == "TargetEncoder":
        params.update(target_type="continuous", random_state=0)
    encoder = CATEGORY_LISTS[name](**params).fit(dev[["depot"]], dev["target"])
    assert _raises_on_sealed(encoder, hold) is CATEGORY_LIST_RAISES[name]


@pytest.mark.parametrize(("name", "handling"), sorted(UNKNOWN_HANDLING))
def test_scikit_learn_raises_exactly_where_the_table_says(name: str, handling: str) -> None:
    dev, hold = _frames()
    encoder = ENCODERS[name](**_encoder_params(name, handling)).fit(dev[["depot"]])
    assert _raises_on_sealed(encoder, hold) is UNKNOWN_HANDLING[(name, handling)]


def _cases() -> dict[str, dict[str, Any]]:
    """Configurations whose holdout step fails on these sealed rows (and controls that run)."""
    cases: dict[str, dict[str, Any]] = {}
    for (name, handling), raises in UNKNOWN_HANDLING.items():
        cases[f"{name}-{handling}"] = {"raises": raises, "features": ["depot", "age"], "preprocess": [
            {"transformer": name, "columns": ["depot"], "params": _encoder_params(name, handling)}]}
    for name in ENCODERS:  # a category list that lacks the sealed value, with unknowns refused
        cases[f"{name}-categories"] = {"raises": CATEGORY_LIST_RAISES[name], "features": ["depot", "age"],
                                       "preprocess": [{"transformer": name, "columns": ["depot"],
                                                       "params": {"categories": [KNOWN]}}]}
    # An estimator that refuses NaN, on a column whose missing value only the seal holds ...
    cases["Ridge-nan"] = {"raises": True, "features": ["bmi", "age"], "preprocess": []}
    # ... and an imputer in front of it, which makes it run.
    cases["SimpleImputer-nan"] = {"raises": False, "features": ["bmi", "age"], "preprocess": [
        {"transformer": "SimpleImputer", "columns": ["bmi"], "params": {"strategy": "mean"}}]}
    return cases


def _judge(ctx: WorkerContext, redis: Redis, dataset: dict[str, Any], case: dict[str, Any]) -> str:
    config = config_document(dataset, "Ridge", params={"alpha": 0.5}, features=case["features"],
                             preprocess=case["preprocess"], metrics=["rmse"])
    sub_id = add_submission(ctx, dataset, config)
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    jobs.score_holdout(sub_id)
    give_verdict(ctx, redis, sub_id)
    return sub_id


def _shown(ctx: WorkerContext, sub_id: str) -> dict[str, Any]:
    """What the submitter sees that could differ between failures: state, error, holdout part, holdout rule."""
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    doc = submission_document(ctx.engine, sub)
    rule = next(r for r in sub["verdict"]["rules"] if r["rule"] == "holdout_gap")
    return {"state": sub["state"], "error": sub["error"], "holdout": doc["result"]["holdout"], "rule": rule,
            "decision": sub["verdict"]["decision"]}


def test_each_data_dependent_failure_counts_and_reads_the_same(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    dev, hold = _frames()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "exact", "budget": 100}}, "key_steward")
    failed_views = []
    for label, case in _cases().items():
        sub_id = _judge(ctx, redis, dataset, case)
        stored = submissions.get_holdout(ctx.engine, sub_id)
        release = holdout_releases.get(ctx.engine, sub_id)
        assert stored is not None and release is not None, label
        assert bool(stored["error"]) is case["raises"], (label, stored["error"])
        assert release["spent"] == 1, label  # success or failure: one query
        if not case["raises"]:
            assert release["outcome"] == "released", label
            continue
        assert release["outcome"] == "failed" and release["released"] is None, label
        view = _shown(ctx, sub_id)
        text = json.dumps(view)
        for leak in (SECRET, "ValueError", "NaN", "unknown", "categor", "scoring", "refitting on"):
            assert leak not in text, (label, leak)
        failed_views.append(view)
    assert len(failed_views) == 5
    assert all(v == failed_views[0] for v in failed_views)  # one shape and one wording for all
    assert failed_views[0]["state"] == "succeeded" and failed_views[0]["error"] is None
    assert failed_views[0]["decision"] == "fail" and failed_views[0]["rule"]["outcome"] == "fail"


def test_a_refit_failure_reads_like_a_scoring_failure(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    dev, hold = _frames()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "exact"}}, "key_steward")
    views = []
    for error in ("refitting on all development rows failed: ValueError: solver diverged",
                  "scoring on the holdout failed with ValueError; its message is withheld"):
        config = config_document(dataset, "Ridge", features=["age", "bmi"], metrics=["rmse"])
        sub_id = add_submission(ctx, dataset, config)
        for f in range(3):
            jobs.run_fold(sub_id, 0, f)
        jobs.summarize(sub_id)
        submissions.store_holdout_once(ctx.engine, sub_id, {}, dataset["holdout_fingerprint"], None, error=error)
        give_verdict(ctx, redis, sub_id)
        views.append(_shown(ctx, sub_id))
    assert views[0] == views[1]


def test_beyond_the_budget_a_failure_is_withheld_like_a_figure(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    dev, hold = _frames()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=4)
    policies.put(ctx.engine, dataset["id"], {"release": {"mode": "exact", "budget": 1}}, "key_steward")
    cases = _cases()
    _judge(ctx, redis, dataset, cases["SimpleImputer-nan"])  # spends the one unit
    failing = _judge(ctx, redis, dataset, cases["OneHotEncoder-error"])
    running = _judge(ctx, redis, dataset, cases["OneHotEncoder-ignore"])
    assert submissions.get_holdout(ctx.engine, failing)["error"]  # type: ignore[index]
    assert not submissions.get_holdout(ctx.engine, running)["error"]  # type: ignore[index]
    a, b = _shown(ctx, failing), _shown(ctx, running)
    assert a["holdout"] == b["holdout"] and a["rule"] == b["rule"] and a["state"] == b["state"] == "succeeded"
    assert a["rule"]["outcome"] == "skipped" and a["holdout"]["released"] is False
    assert holdout_releases.get(ctx.engine, failing)["spent"] == 0  # type: ignore[index]
