"""Reading uploaded tables: what is accepted as it is, and every way a file is refused."""

from __future__ import annotations

import datetime as dt
import decimal
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service.errors import DatasetRejected, UnsupportedFormat
from service.vault.tables import column_kinds, read_table, time_order_key
from tests.support.frames import breast_cancer_frame, iris_frame


def _parquet(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def _rejection(source: bytes | Path, fmt: str = "csv") -> DatasetRejected:
    with pytest.raises(DatasetRejected) as caught:
        read_table(source, fmt)
    return caught.value


def test_breast_cancer_csv_reads_back_exactly() -> None:
    frame = breast_cancer_frame()
    read = read_table(frame.to_csv(index=False).encode(), "csv")
    # Shape 569 x 30 features + target: scikit-learn's load_breast_cancer.
    assert read.shape == (569, 31)
    pd.testing.assert_frame_equal(read, frame, check_dtype=False)
    assert np.array_equal(read.to_numpy(), frame.to_numpy())  # floats round-trip bit for bit


def test_csv_from_a_path_and_parquet_give_the_same_frame(tmp_path: Path) -> None:
    frame = iris_frame()
    frame.to_csv(tmp_path / "iris.csv", index=False)
    frame.to_parquet(tmp_path / "iris.parquet")
    from_csv = read_table(tmp_path / "iris.csv", "csv")
    from_parquet = read_table(tmp_path / "iris.parquet", "PARQUET")
    pd.testing.assert_frame_equal(from_csv, from_parquet)
    assert from_csv.shape == (150, 5)  # iris 150 x 4 + target: scikit-learn's load_iris


def test_unsupported_format_is_415_with_the_accepted_ones() -> None:
    with pytest.raises(UnsupportedFormat) as caught:
        read_table(b"a,b\n1,2\n", "xlsx")
    assert caught.value.status == 415
    assert caught.value.problems[0].pointer == "/format"
    assert "'xlsx'" in caught.value.detail and "csv, parquet" in caught.value.detail


def test_empty_file_is_rejected() -> None:
    error = _rejection(b"")
    assert error.problems[0].pointer == "/file" and "empty" in error.detail


def test_blank_lines_only_is_rejected() -> None:
    assert "no header" in _rejection(b"\n\n\n").detail


def test_header_without_rows_is_rejected() -> None:
    error = _rejection(b"distance_km,stops\n")
    assert "no data rows" in error.detail and "'distance_km'" in error.detail


def test_duplicate_column_names_are_caught_from_the_raw_header() -> None:
    # pandas would silently rename the second 'stops' to 'stops.1'.
    error = _rejection(b"stops,payload,stops\n1,2,3\n4,5,6\n")
    assert error.problems[0].pointer == "/file"
    assert "duplicate column names: 'stops'" in error.detail


def test_duplicate_column_names_in_parquet_are_rejected() -> None:
    table = pa.table([pa.array([1, 2]), pa.array([3, 4])], names=["depot", "depot"])
    assert "duplicate column names: 'depot'" in _rejection(_parquet(table), "parquet").detail


def test_a_blank_column_name_is_rejected() -> None:
    # What DataFrame.to_csv() writes with its default index=True: an unnamed first column.
    assert "column 1 of the header has no name" in _rejection(b",a\n0,1\n1,2\n").detail


def test_rows_longer_than_the_header_are_rejected_not_truncated() -> None:
    assert "more fields than the header" in _rejection(b"a,b\n1,2,3\n4,5,6\n").detail
    assert "not readable as CSV" in _rejection(b"a,b\n1,2\n4,5,6\n").detail


def test_unclosed_quote_is_unparsable() -> None:
    assert "not readable as CSV" in _rejection(b'a,b\n"1,2\n').detail


def test_non_utf8_text_is_rejected_with_the_byte() -> None:
    error = _rejection("depot,litres\nKöln,3\n".encode("latin-1"))
    assert "not UTF-8" in error.detail and "0xf6" in error.detail


def test_garbage_is_not_parquet() -> None:
    assert "not readable as Parquet" in _rejection(b"PAR1 certainly not a footer", "parquet").detail


@pytest.mark.parametrize(
    "array",
    [
        pa.array([decimal.Decimal("1.50")], pa.decimal128(5, 2)),
        pa.array([[1, 2]], pa.list_(pa.int64())),
        pa.array([b"\x00"], pa.binary()),
    ],
    ids=["decimal", "list", "binary"],
)
def test_parquet_types_without_a_column_kind_are_rejected(array: pa.Array) -> None:
    error = _rejection(_parquet(pa.table({"x": array})), "parquet")
    assert "column 'x' has Parquet type" in error.detail and "accepted:" in error.detail


def test_a_named_pandas_index_in_parquet_comes_back_as_a_column() -> None:
    frame = pd.DataFrame({"route_id": ["R1", "R2"], "litres": [1.0, 2.0]}).set_index("route_id")
    sink = io.BytesIO()
    frame.to_parquet(sink)
    read = read_table(sink.getvalue(), "parquet")
    assert list(read.columns) == ["route_id", "litres"]
    assert isinstance(read.index, pd.RangeIndex)


def test_an_unnamed_pandas_index_in_parquet_is_dropped() -> None:
    frame = pd.DataFrame({"litres": [1.0, 2.0, 3.0]}, index=[10, 20, 30])
    sink = io.BytesIO()
    frame.to_parquet(sink)
    read = read_table(sink.getvalue(), "parquet")
    assert list(read.columns) == ["litres"] and list(read.index) == [0, 1, 2]


def test_column_kinds_in_file_order() -> None:
    frame = pd.DataFrame(
        {
            "stops": np.array([1, 2], dtype=np.int64),
            "litres": [1.5, 2.5],
            "refrigerated": [True, False],
            "depot": ["Northgate", "Windmere"],
            "shift": pd.Categorical(["am", "pm"]),
            "departed": pd.to_datetime(["2024-03-01", "2024-03-02"]),
            "arrived": pd.to_datetime(["2024-03-01", "2024-03-02"]).tz_localize("UTC"),
        }
    )
    kinds = column_kinds(frame)
    assert [k["name"] for k in kinds] == list(frame.columns)
    assert [k["kind"] for k in kinds] == [
        "numeric", "numeric", "numeric", "categorical", "categorical", "datetime", "datetime"
    ]
    assert kinds[0]["dtype"] == "int64" and kinds[2]["dtype"] == "bool"


def test_time_order_key_sorts_iso_text_numbers_and_datetimes() -> None:
    text = pd.Series(["2024-03-02", "2024-03-01T08:30:00", "2024-03-01"], name="t")
    assert list(np.argsort(time_order_key(text, "/time_column"), kind="stable")) == [2, 1, 0]
    numbers = pd.Series([30, 10, 20], name="t")
    assert list(np.argsort(time_order_key(numbers, "/time_column"))) == [1, 2, 0]
    offsets = pd.Series(["2024-03-01T10:00+02:00", "2024-03-01T09:00+00:00"], name="t")
    assert list(np.argsort(time_order_key(offsets, "/time_column"))) == [0, 1]  # 08:00 UTC before 09:00 UTC
    aware = pd.Series(pd.to_datetime(["2024-03-01 09:00", "2024-03-01 08:00"], utc=True), name="t")
    assert list(np.argsort(time_order_key(aware.dt.tz_convert("Asia/Tokyo"), "/time_column"))) == [1, 0]
    dates = pd.Series([dt.datetime(2024, 1, 2), dt.datetime(2023, 12, 31)], name="t")
    assert list(np.argsort(time_order_key(dates, "/time_column"))) == [1, 0]


@pytest.mark.parametrize(
    ("values", "expected"),
    [
        (["2024-03-01", "banana"], "value 'banana' in data row 2 is not a date"),
        (["2024-03-01", None], "1 missing values (first in data row 2)"),
        ([True, False], "is boolean"),
    ],
)
def test_time_order_key_rejects_what_is_not_a_time(values: list[object], expected: str) -> None:
    with pytest.raises(DatasetRejected) as caught:
        time_order_key(pd.Series(values, name="departed"), "/time_column")
    assert caught.value.problems[0].pointer == "/time_column"
    assert expected in caught.value.detail and "'departed'" in caught.value.detail
