"""The table fingerprint: the same rows give the same digest however the frame was built; any change to
one value, name, type or order gives another."""

from __future__ import annotations

import hashlib
import io
import struct

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service.vault.fingerprint import fingerprint_frame
from tests.support.frames import breast_cancer_frame, diabetes_frame


def _mixed() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "litres": [1.5, np.nan, -0.0, 3.25],
            "stops": np.array([1, 2, 3, 4], dtype=np.int64),
            "depot": ["Northgate", None, "Windmere", "Harbourside"],
            "refrigerated": [True, False, True, True],
            "departed": pd.to_datetime(["2024-03-01", "2024-03-02", None, "2024-03-04"]),
        }
    )


def test_digest_follows_the_documented_serialisation() -> None:
    # Pins the format: stored fingerprints must keep meaning the same thing across releases.
    frame = pd.DataFrame({"x": [1.5, np.nan], "n": np.array([7, 8], dtype=np.int32), "s": ["ab", None]})

    def text(value: str) -> bytes:
        raw = value.encode()
        return struct.pack("<q", len(raw)) + raw

    expected = hashlib.sha256()
    expected.update(b"sealfold-frame-v1" + struct.pack("<qq", 2, 3))
    expected.update(text("x") + text("float") + np.array([1.5, np.nan], dtype="<f8").tobytes())
    expected.update(text("n") + text("int") + bytes([1, 1]) + np.array([7, 8], dtype="<i8").tobytes())
    expected.update(text("s") + text("text") + bytes([1, 0]) + np.array([2, 2], dtype="<i8").tobytes() + b"ab")
    assert fingerprint_frame(frame) == expected.hexdigest()


def test_memory_layout_index_and_construction_do_not_matter() -> None:
    values = diabetes_frame().to_numpy()
    columns = list(diabetes_frame().columns)
    reference = fingerprint_frame(pd.DataFrame(values, columns=columns))
    built = [
        pd.DataFrame(np.asfortranarray(values), columns=columns),
        pd.DataFrame(np.ascontiguousarray(values[::-1][::-1]), columns=columns, index=np.arange(442) * 7),
        pd.DataFrame({c: values[:, i].copy() for i, c in enumerate(columns)}),
        pd.DataFrame.from_records([tuple(r) for r in values], columns=columns),
        pd.concat([pd.DataFrame(values[:200], columns=columns), pd.DataFrame(values[200:], columns=columns)]),
        pd.DataFrame(np.repeat(values, 2, axis=0)[::2], columns=columns),  # a strided view
    ]
    for frame in built:
        assert fingerprint_frame(frame) == reference


def test_widths_nan_payloads_and_text_storage_do_not_matter() -> None:
    reference = fingerprint_frame(_mixed())
    other = _mixed()
    other["stops"] = other["stops"].astype(np.int16)
    other["depot"] = other["depot"].astype("category")
    odd_nan = np.array([0x7FF8000000000001], dtype=np.uint64).view(np.float64)[0]  # another NaN bit pattern
    other["litres"] = [1.5, odd_nan, 0.0, 3.25]  # and +0.0 where the reference has -0.0
    assert np.isnan(odd_nan)
    assert fingerprint_frame(other) == reference
    as_objects = _mixed()
    as_objects["depot"] = as_objects["depot"].astype(object)
    assert fingerprint_frame(as_objects) == reference
    nullable = _mixed()
    nullable["stops"] = nullable["stops"].astype("Int64")
    assert fingerprint_frame(nullable) == reference


def test_parquet_round_trip_keeps_the_fingerprint() -> None:
    frame = _mixed()
    frame["shift"] = pd.Categorical(["am", "pm", "am", None])
    frame["bool_with_gap"] = pd.Series([True, None, False, True], dtype=object)
    frame["aware"] = pd.to_datetime(["2024-03-01 08:00"] * 4).tz_localize("Europe/Paris")
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), sink)
    back = pq.read_table(io.BytesIO(sink.getvalue())).to_pandas()
    assert fingerprint_frame(back) == fingerprint_frame(frame)


def test_csv_and_parquet_copies_of_breast_cancer_agree() -> None:
    frame = breast_cancer_frame()
    from_csv = pd.read_csv(io.StringIO(frame.to_csv(index=False)))
    assert fingerprint_frame(from_csv) == fingerprint_frame(frame)


@pytest.mark.parametrize(
    "change",
    [
        lambda f: f.loc.__setitem__((2, "litres"), 2.0),
        lambda f: f.loc.__setitem__((0, "litres"), np.nextafter(1.5, 2.0)),  # one ulp
        lambda f: f.loc.__setitem__((3, "stops"), 5),
        lambda f: f.loc.__setitem__((0, "depot"), "Northgate "),
        lambda f: f.loc.__setitem__((1, "depot"), ""),  # missing -> empty text
        lambda f: f.loc.__setitem__((1, "refrigerated"), True),
        lambda f: f.loc.__setitem__((0, "departed"), pd.Timestamp("2024-03-01 00:00:00.000001")),
        lambda f: f.loc.__setitem__((0, "litres"), np.nan),
    ],
    ids=["float", "float-ulp", "int", "text", "missing-text", "bool", "datetime", "value-to-nan"],
)
def test_one_value_changes_the_fingerprint(change: object) -> None:
    frame = _mixed()
    reference = fingerprint_frame(frame)
    changed = _mixed()
    change(changed)  # type: ignore[operator]
    assert not changed.equals(frame)
    assert fingerprint_frame(changed) != reference


def test_names_types_order_and_text_boundaries_count() -> None:
    frame = _mixed()
    reference = fingerprint_frame(frame)
    assert fingerprint_frame(frame.rename(columns={"stops": "stop"})) != reference
    assert fingerprint_frame(frame[list(reversed(frame.columns))]) != reference
    assert fingerprint_frame(frame.iloc[::-1]) != reference
    assert fingerprint_frame(frame.iloc[:3]) != reference
    assert fingerprint_frame(frame.assign(stops=frame["stops"].astype(float))) != reference
    assert fingerprint_frame(frame.assign(stops=frame["stops"].astype(str))) != reference
    left = pd.DataFrame({"s": ["ab", "c"]})
    right = pd.DataFrame({"s": ["a", "bc"]})
    assert fingerprint_frame(left) != fingerprint_frame(right)
    # A column's name cannot run into its values.
    assert fingerprint_frame(pd.DataFrame({"ab": ["c"]})) != fingerprint_frame(pd.DataFrame({"a": ["bc"]}))

