"""Read an uploaded table into a DataFrame, and describe its columns.

This is the one place where a steward's raw file becomes a frame, so every way a file can be
unreadable or ambiguous is turned into a ``DatasetRejected`` (or ``UnsupportedFormat``) here, with a
message that names the offending value. pandas is lenient by design (it renames duplicate columns,
turns a surplus first field into an index, truncates long rows); none of that leniency is allowed
through, because a silently altered table would then be sealed and fingerprinted as if it were
what the steward sent.
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.errors import DatasetRejected, FieldProblem, UnsupportedFormat, field_error

FORMATS: tuple[str, ...] = ("csv", "parquet")
FILE_POINTER = "/file"
_SHOWN_NAMES = 12  # how many column names an error message lists before eliding the rest


def read_table(source: bytes | Path, fmt: str) -> pd.DataFrame:
    """Read CSV or Parquet from bytes or a path into a frame with a fresh RangeIndex.

    CSV is read with pandas' C parser (UTF-8, comma separated, first line is the header, no index
    column); Parquet with pyarrow, where a named pandas index stored in the file becomes a leading
    column again and an unnamed one (row positions) is dropped.
    """
    kind = fmt.strip().lower() if isinstance(fmt, str) else fmt
    if kind not in FORMATS:
        raise field_error(
            UnsupportedFormat, "/format", f"format must be one of {', '.join(FORMATS)}, got {fmt!r}"
        )
    size = len(source) if isinstance(source, bytes) else _file_size(source)
    if size == 0:
        raise _rejected("the file is empty (0 bytes); send a CSV with a header row and data rows, or Parquet")
    frame = _read_csv(source) if kind == "csv" else _read_parquet(source)
    if len(frame) == 0:
        raise _rejected(f"the file has a header ({describe_columns(list(frame.columns))}) but no data rows")
    return frame


def column_kinds(df: pd.DataFrame) -> list[dict[str, str]]:
    """Describe each column as numeric, categorical or datetime, in file order.

    bool counts as numeric (it is 0/1 to every estimator); strings, categories and any other object
    column are categorical.
    """
    kinds = []
    for position, name in enumerate(df.columns):
        dtype = df.dtypes.iloc[position]
        kinds.append({"name": str(name), "kind": _kind(dtype), "dtype": str(dtype)})
    return kinds


def time_order_key(series: pd.Series, pointer: str) -> np.ndarray:
    """Return a numeric array that sorts rows by the time column ``series``.

    Numbers are used as they are (a period index, a Unix time); datetimes as their integer ticks;
    text is parsed as ISO 8601 first, then by pandas' format inference. Missing values are rejected,
    because a row without a time cannot be placed before or after any other.
    """
    name = series.name
    if pd.api.types.is_bool_dtype(series.dtype):
        raise _rejected(f"time column {name!r} is boolean; a time column needs dates or numbers", pointer)
    missing = int(series.isna().sum())
    if missing:
        first = int(np.flatnonzero(series.isna().to_numpy())[0]) + 1
        raise _rejected(
            f"time column {name!r} has {missing} missing values (first in data row {first}); "
            "every row needs a time",
            pointer,
        )
    if pd.api.types.is_datetime64_any_dtype(series.dtype):
        return _datetime_ticks(series)
    if pd.api.types.is_numeric_dtype(series.dtype):
        values = series.to_numpy()
        return values.astype(np.int64) if values.dtype.kind in "iu" else values.astype(np.float64)
    parsed = _parse_datetimes(series)
    if parsed is None:
        bad = _first_unparsed(series)
        raise _rejected(
            f"time column {name!r} is neither numbers nor dates: {bad}; "
            "use ISO 8601 dates such as 2024-03-01 or 2024-03-01T08:30:00, or numbers",
            pointer,
        )
    return _datetime_ticks(parsed)


def _kind(dtype: Any) -> str:
    if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_numeric_dtype(dtype):
        return "numeric"
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return "datetime"
    return "categorical"


def _file_size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError as exc:
        raise _rejected(f"cannot read the file {path.name!r}: {exc.strerror}") from exc


def _read_csv(source: bytes | Path) -> pd.DataFrame:
    def stream() -> Any:
        return io.BytesIO(source) if isinstance(source, bytes) else source

    try:
        # The raw header, read separately: read_csv would rename a second "price" to "price.1".
        header = pd.read_csv(stream(), header=None, nrows=1, dtype=str, index_col=False, keep_default_na=False)
        with warnings.catch_warnings():
            # index_col=False makes pandas *warn* and drop fields when a row is longer than the header.
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(stream(), index_col=False, low_memory=False)
    except pd.errors.EmptyDataError as exc:
        raise _rejected("the file has no header row and no data; the first line must name the columns") from exc
    except pd.errors.ParserWarning as exc:
        raise _rejected(
            "some data rows have more fields than the header has column names; "
            "every row must have one field per column"
        ) from exc
    except pd.errors.ParserError as exc:
        raise _rejected(f"the file is not readable as CSV: {_first_line(exc)}") from exc
    except UnicodeDecodeError as exc:
        raise _rejected(
            f"the file is not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at offset {exc.start}); "
            "save the CSV as UTF-8, or send Parquet"
        ) from exc
    _check_names(list(header.iloc[0]) if len(header) else [])
    return frame


def _read_parquet(source: bytes | Path) -> pd.DataFrame:
    where: Any = pa.BufferReader(source) if isinstance(source, bytes) else str(source)
    try:
        parquet = pq.ParquetFile(where)
        schema = parquet.schema_arrow
        _check_names(list(schema.names))
        for field in schema:
            if not _accepted_arrow_type(field.type):
                raise _rejected(
                    f"column {field.name!r} has Parquet type {field.type}, which is not accepted; "
                    "accepted: integers, floats, booleans, strings, dictionary-encoded strings, "
                    "timestamps and dates"
                )
        frame: pd.DataFrame = parquet.read().to_pandas(date_as_object=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError) as exc:
        raise _rejected(f"the file is not readable as Parquet: {_first_line(exc)}") from exc
    # A pandas index saved in the file: a named one was a column the steward set aside (set_index),
    # so it comes back as a leading column; an unnamed one is only row positions and is dropped.
    named = [level for level in frame.index.names if level is not None]
    frame = frame.reset_index(level=named) if named else frame
    frame = frame.reset_index(drop=True)
    _check_names(list(frame.columns))
    return frame


def _accepted_arrow_type(kind: pa.DataType) -> bool:
    if pa.types.is_dictionary(kind):
        return _accepted_arrow_type(kind.value_type)
    return bool(
        pa.types.is_integer(kind)
        or pa.types.is_floating(kind)
        or pa.types.is_boolean(kind)
        or pa.types.is_string(kind)
        or pa.types.is_large_string(kind)
        or pa.types.is_string_view(kind)
        or pa.types.is_timestamp(kind)
        or pa.types.is_date(kind)
        or pa.types.is_null(kind)
    )


def _check_names(raw_names: list[Any]) -> None:
    seen: set[str] = set()
    duplicates: list[str] = []
    for position, raw in enumerate(raw_names, start=1):
        if raw is None or (isinstance(raw, float) and np.isnan(raw)) or str(raw).strip() == "":
            raise _rejected(f"column {position} of the header has no name; every column needs a name")
        name = str(raw)
        if name in seen and name not in duplicates:
            duplicates.append(name)
        seen.add(name)
    if duplicates:
        raise _rejected(
            f"duplicate column names: {', '.join(repr(d) for d in duplicates)}; every column name must be unique"
        )


def _datetime_ticks(series: pd.Series) -> np.ndarray:
    values = series
    if isinstance(values.dtype, pd.DatetimeTZDtype):
        values = values.dt.tz_convert("UTC").dt.tz_localize(None)
    # Ticks in the column's own unit: only their order is used, and no unit conversion can overflow.
    return np.asarray(values.to_numpy()).astype(np.int64)


def _parse_datetimes(series: pd.Series) -> pd.Series | None:
    for fmt in ("ISO8601", None):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # "could not infer format" chatter
                return pd.to_datetime(series, utc=True, format=fmt)
        except (ValueError, TypeError, OverflowError, pd.errors.OutOfBoundsDatetime):
            continue
    return None


def _first_unparsed(series: pd.Series) -> str:
    coerced = pd.to_datetime(series, utc=True, format="ISO8601", errors="coerce")
    bad = np.flatnonzero(coerced.isna().to_numpy())
    if len(bad) == 0:
        return "its values use more than one date format"
    return f"value {series.iloc[int(bad[0])]!r} in data row {int(bad[0]) + 1} is not a date"


def describe_columns(names: list[Any]) -> str:
    """Render column names for an error message, eliding a long list."""
    shown = ", ".join(repr(str(n)) for n in names[:_SHOWN_NAMES])
    more = len(names) - _SHOWN_NAMES
    return shown + (f" and {more} more" if more > 0 else "")


def describe_value(value: Any) -> str:
    """Render one cell value for an error message as Python would write it (no numpy wrappers)."""
    plain = value.item() if isinstance(value, np.generic) else value
    return repr(plain)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _rejected(detail: str, pointer: str = FILE_POINTER) -> DatasetRejected:
    return DatasetRejected(detail, [FieldProblem(pointer, detail)])
