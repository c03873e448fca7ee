"""Dataset endpoints: registration by upload and by path, limits, team scoping, the development download."""

from __future__ import annotations

import dataclasses
import io
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from service.ops.data_identity import MARKER_NAME
from service.records import datasets
from service.records.tables import datasets as datasets_table
from service.vault import registration
from service.vault.store import dataset_paths
from tests.support.datasets import csv_bytes, diabetes_frame

if TYPE_CHECKING:
    from tests.support.api import Api


DECLARATION = {"name": "diabetes", "target": "target", "task": "regression"}


def _nothing_written(api: Api) -> None:
    """No dataset row, and no dataset, sealed or spooled file under the data dir."""
    with api.engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(datasets_table)).scalar_one() == 0
    data_dir = Path(api.settings.data_dir)
    # The records DB and the deployment's identity marker exist from the app's start, before any request.
    leftovers = [p for p in data_dir.rglob("*") if p.is_file() and not p.name.startswith("records.sqlite3")
                 and p.name != MARKER_NAME]
    assert leftovers == []


def test_upload_registers_and_answers_201_with_location(api: Api, dataset: dict[str, Any]) -> None:
    assert dataset["id"].startswith("ds_")
    # Diabetes has 442 rows (Efron et al. 2004; scikit-learn's load_diabetes); 20 % are held out
    # under 100k rows (common practice, no source).
    assert dataset["rows"] == {"total": 442, "development": 353, "holdout": 89}
    assert dataset["fold_plan"]["scheme"] == "kfold" and dataset["fold_plan"]["folds"] == 5
    assert [c["name"] for c in dataset["columns"]][-1] == "target"
    # The steward who registered it reads it back exactly; a submitter reads the same record with only
    # the summary of the seal's balance (the per-column table is for stewards).
    as_steward = api.get("steward", f"/v1/datasets/{dataset['id']}")
    assert as_steward.status_code == 200 and as_steward.get_json() == dataset
    reply = api.get("submitter", f"/v1/datasets/{dataset['id']}")
    summary = {k: dataset["balance"][k] for k in ("balanced", "adversarial_auc", "draws")}
    assert reply.status_code == 200 and reply.get_json() == {**dataset, "balance": summary}


def test_the_record_never_carries_the_seal(api: Api, dataset: dict[str, Any]) -> None:
    internal = datasets.get_internal(api.engine, dataset["id"])
    assert internal is not None
    answers = [
        api.get("submitter", f"/v1/datasets/{dataset['id']}").get_data(as_text=True),
        api.get("submitter", "/v1/datasets").get_data(as_text=True),
        api.get("submitter", f"/v1/datasets/{dataset['id']}/development").get_data(as_text=True),
    ]
    for text in answers:
        for secret in ("sealing_seed", "holdout_fingerprint", internal["sealing_seed"],
                       internal["holdout_fingerprint"]):
            assert secret not in text


def test_development_download_is_csv_with_row_id_first_and_no_holdout_rows(
    api: Api, dataset: dict[str, Any]
) -> None:
    reply = api.get("submitter", f"/v1/datasets/{dataset['id']}/development")
    assert reply.status_code == 200 and reply.mimetype == "text/csv"
    assert f'{dataset["id"]}-development.csv' in reply.headers["Content-Disposition"]
    development = pd.read_csv(io.BytesIO(reply.get_data()), dtype={"row_id": str})
    assert list(development.columns) == ["row_id", *[c["name"] for c in dataset["columns"]]]
    assert len(development) == dataset["rows"]["development"] and development["row_id"].is_unique
    # Development and holdout together are exactly the uploaded rows, each once.
    holdout = pd.read_parquet(dataset_paths(api.settings, dataset["id"]).sealed_holdout)
    original = diabetes_frame()
    together = pd.concat([development.drop(columns="row_id"), holdout[original.columns]])
    key = list(original.columns)
    assert sorted(map(tuple, together[key].round(12).to_numpy())) == sorted(
        map(tuple, original[key].round(12).to_numpy()))


def test_parquet_upload_and_import_by_path(
    api: Api, dataset: dict[str, Any], diabetes_csv: bytes, monkeypatch: pytest.MonkeyPatch
) -> None:
    buffer = io.BytesIO()
    diabetes_frame().to_parquet(buffer, index=False)
    # Names are unique within a team: each registration of the same table is named apart.
    parquet = api.upload("steward", buffer.getvalue(), filename="diabetes.parquet",
                         **{**DECLARATION, "name": "diabetes as parquet"})
    assert parquet.status_code == 201, parquet.get_data(as_text=True)
    assert parquet.get_json()["rows"]["total"] == 442
    # The published fingerprint covers the seal too, so the two registrations below draw the same one.
    monkeypatch.setattr(registration.secrets, "randbits", lambda bits: 2**40 + 7)
    uploaded = api.upload("steward", diabetes_csv, filename="diabetes.csv", **{**DECLARATION, "name": "uploaded"})
    assert uploaded.status_code == 201, uploaded.get_data(as_text=True)
    (Path(api.settings.import_root) / "fleet").mkdir()
    (Path(api.settings.import_root) / "fleet" / "diabetes.csv").write_bytes(diabetes_csv)
    imported = api.post("steward", "/v1/datasets", json={"path": "fleet/diabetes.csv", **DECLARATION,
                                                          "name": "imported"})
    assert imported.status_code == 201, imported.get_data(as_text=True)
    assert imported.headers["Location"] == f"/v1/datasets/{imported.get_json()['id']}"
    # The same CSV file uploaded or imported, sealed alike, is the same table: same fingerprints.
    assert imported.get_json()["fingerprint"] == uploaded.get_json()["fingerprint"]
    assert imported.get_json()["development_fingerprint"] == uploaded.get_json()["development_fingerprint"]
    listed = api.get("submitter", "/v1/datasets").get_json()["datasets"]
    assert [d["id"] for d in listed] == [imported.get_json()["id"], uploaded.get_json()["id"],
                                         parquet.get_json()["id"], dataset["id"]]


@pytest.mark.parametrize("path", ["../outside.csv", "/etc/hostname", "fleet/../../outside.csv", "link.csv",
                                  "missing.csv"])
def test_import_paths_stay_inside_the_import_root(api: Api, path: str) -> None:
    root = Path(api.settings.import_root)
    outside = root.parent / "outside.csv"
    outside.write_bytes(csv_bytes(diabetes_frame()))
    (root / "link.csv").symlink_to(outside)
    problem = api.problem(api.post("steward", "/v1/datasets", json={"path": path, **DECLARATION}), 422)
    assert api.pointers(problem) == ["/path"]
    assert str(root) not in problem["detail"]
    outside.unlink()
    (root / "link.csv").unlink()
    _nothing_written(api)


@pytest.mark.parametrize(("path", "words"), [
    ("fleet/dia\x00betes.csv", "NUL"),
    # Linux refuses a file name over NAME_MAX = 255 bytes with ENAMETOOLONG (limits.h).
    ("d" * 256 + ".csv", "too long"),
])
def test_import_paths_no_file_system_accepts_are_422_on_path(api: Api, path: str, words: str) -> None:
    problem = api.problem(api.post("steward", "/v1/datasets", json={"path": path, **DECLARATION}), 422)
    assert api.pointers(problem) == ["/path"]
    assert words in problem["detail"]
    assert str(api.settings.import_root) not in problem["detail"]
    _nothing_written(api)


def test_import_by_path_is_refused_when_no_root_is_configured(api: Api) -> None:
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(
        ctx, settings=dataclasses.replace(ctx.settings, import_root=None))
    problem = api.problem(api.post("steward", "/v1/datasets", json={"path": "a.csv", **DECLARATION}), 422)
    assert "disabled" in problem["detail"]


def test_upload_over_the_limit_is_413_and_leaves_nothing(api: Api) -> None:
    limit = api.settings.max_upload_bytes
    big = b"x,y\n" + b"1,2\n" * (limit // 4 + 10)
    problem = api.problem(api.upload("steward", big, **DECLARATION), 413)
    assert str(limit) in problem["detail"]
    assert problem["type"].endswith(":payload-too-large")
    _nothing_written(api)


def test_unknown_file_format_is_415(api: Api, diabetes_csv: bytes) -> None:
    problem = api.problem(api.upload("steward", diabetes_csv, filename="diabetes.xlsx", **DECLARATION), 415)
    assert "diabetes.xlsx" in problem["detail"]
    api.problem(api.post("steward", "/v1/datasets", data="x", content_type="text/plain"), 415)
    _nothing_written(api)


def test_bad_declaration_is_422_with_pointers_and_leaves_nothing(api: Api, diabetes_csv: bytes) -> None:
    missing = api.problem(api.upload("steward", diabetes_csv, name="d", folds="many"), 422)
    assert sorted(api.pointers(missing)) == ["/folds", "/target", "/task"]
    no_file = api.post("steward", "/v1/datasets", data=DECLARATION, content_type="multipart/form-data")
    assert api.pointers(api.problem(no_file, 422)) == ["/file"]
    unknown_target = api.problem(api.upload("steward", diabetes_csv, **{**DECLARATION, "target": "fuel"}), 422)
    assert "/target" in api.pointers(unknown_target)
    one_fold = api.problem(api.upload("steward", diabetes_csv, **DECLARATION, folds=1), 422)
    assert api.pointers(one_fold) == ["/folds"] and "got 1" in one_fold["detail"]
    _nothing_written(api)


def test_registration_needs_a_steward(api: Api, diabetes_csv: bytes) -> None:
    api.problem(api.upload("submitter", diabetes_csv, **DECLARATION), 403)
    api.problem(api.upload(None, diabetes_csv, **DECLARATION), 401)
    _nothing_written(api)


def test_another_teams_dataset_is_404_like_an_unknown_one(api: Api, dataset: dict[str, Any]) -> None:
    for path in (f"/v1/datasets/{dataset['id']}", f"/v1/datasets/{dataset['id']}/development"):
        theirs = api.problem(api.get("other_submitter", path), 404)
        unknown = api.problem(api.get("other_submitter", path.replace(dataset["id"], "ds_00000000000000000000")),
                              404)
        assert {k: v for k, v in theirs.items() if k != "detail"} == {
            k: v for k, v in unknown.items() if k != "detail"}
        assert theirs["detail"].replace(dataset["id"], "ds_00000000000000000000") == unknown["detail"]
    assert api.get("other_steward", "/v1/datasets").get_json() == {"datasets": []}
    assert json.dumps(api.get("steward", "/v1/datasets").get_json()).count(dataset["id"]) == 1


def test_balance_of_the_seal_is_a_flag_for_submitters_and_a_table_for_stewards(api: Api) -> None:
    frame = diabetes_frame().assign(patient=[f"P{i:04d}" for i in range(442)])
    reply = api.upload("steward", csv_bytes(frame), **DECLARATION, id_column="patient")
    assert reply.status_code == 201, reply.get_data(as_text=True)
    ds_id = reply.get_json()["id"]
    summary_keys = {"balanced", "adversarial_auc", "draws"}
    for path in (f"/v1/datasets/{ds_id}", "/v1/datasets"):
        as_submitter = api.get("submitter", path).get_json()
        as_steward = api.get("steward", path).get_json()
        record = as_submitter if "id" in as_submitter else as_submitter["datasets"][0]
        full = as_steward if "id" in as_steward else as_steward["datasets"][0]
        assert set(record["balance"]) == summary_keys and isinstance(record["balance"]["balanced"], bool)
        assert {"columns", "attempts", "adversarial", "limits"} <= set(full["balance"])
        assert {k: full["balance"][k] for k in summary_keys} == record["balance"]
    names = [row["name"] for row in full["balance"]["columns"]]
    assert "patient" not in names and full["balance"]["excluded"] == ["patient"]
    # Nothing in the steward's document names a holdout row or carries the seal's seed.
    internal = datasets.get_internal(api.engine, ds_id)
    assert internal is not None
    text = api.get("steward", f"/v1/datasets/{ds_id}").get_data(as_text=True)
    held = pd.read_parquet(dataset_paths(api.settings, ds_id).sealed_holdout)["patient"]
    assert len(held) == 89 and not any(patient in text for patient in held)
    assert internal["sealing_seed"] not in text
    # Another team still gets the plain 404 of an unknown id.
    api.problem(api.get("other_steward", f"/v1/datasets/{ds_id}"), 404)


def test_a_name_the_team_already_has_is_a_409_and_another_team_may_use_it(
    api: Api, dataset: dict[str, Any], diabetes_csv: bytes
) -> None:
    again = api.upload("steward", diabetes_csv, **{**DECLARATION, "name": f"  {dataset['name']} "})
    problem = api.problem(again, 409)
    assert api.pointers(problem) == ["/name"] and dataset["id"] in problem["detail"]
    assert [d["id"] for d in api.get("steward", "/v1/datasets").get_json()["datasets"]] == [dataset["id"]]
    assert [p.name for p in (Path(api.settings.data_dir) / "datasets").iterdir()] == [dataset["id"]]
    rivals = api.upload("other_steward", diabetes_csv, **{**DECLARATION, "name": dataset["name"]})
    assert rivals.status_code == 201, rivals.get_data(as_text=True)


def test_the_record_counts_missing_values_per_column_on_the_development_rows(api: Api) -> None:
    # scikit-learn's diabetes data with holes punched in two columns: 'bmi' in every 4th row, 's5' in one.
    frame = diabetes_frame()
    frame.loc[frame.index % 4 == 0, "bmi"] = np.nan
    frame.loc[7, "s5"] = np.nan
    reply = api.upload("steward", frame.to_csv(index=False).encode(), **{**DECLARATION, "name": "with holes"})
    assert reply.status_code == 201, reply.get_data(as_text=True)
    record = reply.get_json()
    development = pd.read_csv(io.BytesIO(api.get("submitter", f"/v1/datasets/{record['id']}/development").data))
    missing = {c["name"]: c["missing"] for c in record["columns"]}
    assert missing == {name: int(development[name].isna().sum()) for name in frame.columns}
    assert 0 < missing["bmi"] < len(development) and missing["age"] == 0
    assert api.get("submitter", f"/v1/datasets/{record['id']}").get_json()["columns"] == record["columns"]
