"""Register a dataset: validate it, seal its holdout, fix its fold plan, write its files, record it.

Lifecycle: the declaration is checked before the file is read; the table is checked before any
row is sealed; the seal and the fold plan are checked on the development rows; only then are files
written (each directory renamed into place whole) and the record inserted (with its audit event,
in one transaction). Any failure on the way removes whatever was written, so a rejected dataset
leaves no files and no row.

Two seeds are drawn from ``secrets``: the sealing seed (63 bits, stored, never shown, so nobody
outside can recompute which rows were sealed) and the fold seed (31 bits, shown in the fold plan so
that anyone can reproduce the folds on the development rows).

The development rows are also checked for structure the declaration left out
(``vault.structure``): a column that looks like groups, rows in time order. What it finds is a
warning in the record (and so in the registration answer), never a refusal.

Each draw of the seal is measured against the development rows (``vault.balance``). A draw out of
balance is redrawn with a fresh sealing seed, at most ``BalanceLimits.redraws`` times, and the best
draw is kept: rerandomisation (Morgan K.L., Rubin D.B. 2012, "Rerandomization to improve covariate
balance in experiments", Annals of Statistics 40:1263-1282, from memory). Every draw's summary is
recorded, never its seed. A time holdout is the latest rows whatever the seed, so it is measured
once and never redrawn; its balance figures then describe how the future differs from the past.
"""

from __future__ import annotations

import secrets
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from service.errors import DatasetRejected, FieldProblem, Forbidden, PayloadTooLarge, SealfoldError
from service.ids import new_id
from service.records import datasets
from service.records.engine import utcnow
from service.records.keys import KeyInfo
from service.settings import Settings
from service.vault import balance, sealing, store, structure
from service.vault.fingerprint import fingerprint_frame, published_fingerprint
from service.vault.folds import (
    FOLD_SCHEMES,
    FoldPlan,
    SplitKeys,
    check_plan_feasible,
    default_plan_scheme,
    fold_assignment,
    plan_problems,
    split_keys_from_frame,
)
from service.vault.tables import column_kinds, describe_columns, describe_value, read_table, time_order_key
from service.vocabulary import TASKS

_ROLE_COLUMNS: tuple[str, ...] = ("id_column", "group_column", "time_column")


@dataclass(frozen=True)
class DatasetDeclaration:
    """What the steward declares about an uploaded table."""

    name: str
    target: str
    task: str
    id_column: str | None = None
    group_column: str | None = None
    time_column: str | None = None
    holdout_fraction: float | None = None
    holdout_scheme: str | None = None
    folds: int = 5
    fold_scheme: str | None = None  # None: follow the declared columns (default_plan_scheme)


@dataclass(frozen=True)
class _Sealed:
    development: pd.DataFrame  # row_id first
    holdout: pd.DataFrame
    scheme: str
    fraction: float
    seed: int
    plan: FoldPlan
    balance: dict[str, Any]
    keys: SplitKeys


def register_dataset(
    settings: Settings,
    engine: Engine,
    actor: KeyInfo,
    source: bytes | Path,
    fmt: str,
    declaration: DatasetDeclaration,
) -> dict[str, Any]:
    """Register the table in ``source`` and return its record as ``records.datasets.get`` shows it."""
    if not actor.can("steward"):
        raise Forbidden(f"registering a dataset needs the steward role; key {actor.id!r} is a {actor.role}")
    scheme = _check_declaration(declaration)
    datasets.refuse_taken_name(engine, actor.team, declaration.name.strip())
    frame = read_table(_checked_source(settings, source), fmt)
    fraction = declaration.holdout_fraction
    if fraction is None:
        fraction = sealing.default_fraction(len(frame))  # 20 / 10 / 1 %: common practice, no source
    _check_frame(settings, frame, declaration, scheme, fraction)
    sealed = _seal(frame, declaration, scheme, fraction)
    kinds = column_kinds(frame)
    manifest = {
        "columns": kinds,
        "numeric_columns": [c["name"] for c in kinds if c["kind"] == "numeric"],
        "target": declaration.target,
        "task": declaration.task,
        **{role: getattr(declaration, role) for role in _ROLE_COLUMNS},
    }
    development_fingerprint = fingerprint_frame(sealed.development)
    holdout_fingerprint = fingerprint_frame(sealed.holdout)
    ds_id = new_id("ds")
    row = {
        "id": ds_id,
        "team": actor.team,
        "name": declaration.name.strip(),
        "task": declaration.task,
        "target": declaration.target,
        **{role: getattr(declaration, role) for role in _ROLE_COLUMNS},
        # Missing values per column, counted on the development rows (the holdout's stay sealed).
        "columns": [{**c, "missing": int(sealed.development[c["name"]].isna().sum())} for c in kinds],
        "classes": _classes(frame[declaration.target]) if declaration.task == "classification" else None,
        "rows_total": len(frame),
        "rows_development": len(sealed.development),
        "rows_holdout": len(sealed.holdout),
        "holdout_scheme": sealed.scheme,
        "holdout_fraction": sealed.fraction,
        "sealing_seed": str(sealed.seed),
        "fold_plan": sealed.plan.to_document(),
        "fingerprint": published_fingerprint(development_fingerprint, holdout_fingerprint,
                                             store.fingerprint_key(settings)),
        "development_fingerprint": development_fingerprint,
        "holdout_fingerprint": holdout_fingerprint,
        "balance": sealed.balance,
        # Structure the declaration did not name (a column that looks like groups, rows in time order).
        "warnings": structure.undeclared_structure(
            sealed.development.drop(columns=[store.ROW_ID]), target=declaration.target, task=declaration.task,
            declared={role: getattr(declaration, role) for role in _ROLE_COLUMNS}),
        "created_by": actor.id,
        "created_at": utcnow(),
    }
    try:
        store.write_dataset(settings, ds_id, sealed.development, sealed.holdout, manifest)
        # The plan's folds, cached for the fold jobs (each would otherwise compute them again).
        store.save_fold_assignment(settings, ds_id, sealed.plan, 0, fold_assignment(sealed.plan, sealed.keys, 0))
        # Open the seal once now, as the holdout job will: a file that does not read back to its
        # fingerprint must fail here, not after the first submission has been scored.
        store.open_sealed_holdout(settings, ds_id, holdout_fingerprint)
        datasets.insert(engine, row)
    except BaseException:
        store.remove_dataset(settings, ds_id)
        raise
    record = datasets.get(engine, ds_id, role=actor.role)
    if record is None:  # pragma: no cover - the row was inserted just above
        raise SealfoldError(f"dataset {ds_id!r} vanished after registration")
    return record


def _check_declaration(declaration: DatasetDeclaration) -> str:
    """Raise on every problem of the declaration at once; return the holdout scheme to use."""
    problems: list[FieldProblem] = []
    name = declaration.name.strip() if isinstance(declaration.name, str) else ""
    if not 1 <= len(name) <= 200:
        problems.append(FieldProblem("/name", f"name must be 1 to 200 characters, got {declaration.name!r}"))
    if declaration.task not in TASKS:
        problems.append(FieldProblem("/task", f"task must be one of {', '.join(TASKS)}, got {declaration.task!r}"))
    if not isinstance(declaration.target, str) or not declaration.target:
        problems.append(FieldProblem("/target", f"target must name a column, got {declaration.target!r}"))
    for role in _ROLE_COLUMNS:
        value = getattr(declaration, role)
        if value is not None and (not isinstance(value, str) or not value):
            problems.append(FieldProblem(f"/{role}", f"{role} must name a column or be left out, got {value!r}"))
        elif value is not None and value == declaration.target:
            problems.append(FieldProblem(f"/{role}", f"{role} must differ from the target, got {value!r}"))
    problems += plan_problems(declaration.folds)
    problems += _fold_scheme_problems(declaration)
    scheme = declaration.holdout_scheme
    if scheme is None:
        scheme = sealing.default_scheme(declaration.task, declaration.group_column, declaration.time_column)
    problems += sealing.holdout_problems(
        scheme, declaration.holdout_fraction,
        group_column=declaration.group_column, time_column=declaration.time_column,
    )
    if problems:
        raise DatasetRejected("; ".join(p.detail for p in problems), problems)
    return scheme


def _checked_source(settings: Settings, source: bytes | Path) -> bytes | Path:
    # The API layer refuses oversized uploads while receiving them, and decides which paths may be
    # imported; the size of a file named by path is only known here.
    limit = settings.max_upload_bytes
    if isinstance(source, bytes):
        size = len(source)
    else:
        if not source.is_file():
            raise _problem(DatasetRejected, "/file", f"no file at {source.name!r}")
        size = source.stat().st_size
    if size > limit:
        raise _problem(PayloadTooLarge, "/file", f"the file is {size} bytes; the limit is {limit} bytes")
    return source


def _check_frame(
    settings: Settings, frame: pd.DataFrame, declaration: DatasetDeclaration, scheme: str, fraction: float
) -> None:
    columns = [str(c) for c in frame.columns]
    if store.ROW_ID in columns:
        raise _rejected("/file", f"column name {store.ROW_ID!r} is reserved for sealfold's row ids; rename it")
    for role in ("target", *_ROLE_COLUMNS):
        wanted = getattr(declaration, role)
        if wanted is not None and wanted not in columns:
            raise _rejected(
                f"/{role}", f"{role} {wanted!r} is not a column of the file; columns are: {describe_columns(columns)}"
            )
    if len(frame) < settings.min_rows:
        raise _rejected("/file", f"the file has {len(frame)} data rows; at least {settings.min_rows} are needed")
    target = frame[declaration.target]
    _check_target(target, declaration.task)
    if declaration.task == "classification":
        # Every class needs `folds` development rows. A stratified holdout takes a number of rows
        # from each class that the class sizes alone decide (no seed), so this is exact before
        # sealing; for other schemes it checks the whole table now and the development rows later.
        _, sizes, labels = sealing.class_codes(target)
        kept = None
        if scheme == "stratified":
            kept = sizes - sealing.stratified_counts(sizes, sealing.holdout_count(len(target), fraction))
        _check_class_sizes(labels, sizes, kept, declaration.folds)
    if declaration.id_column:
        _check_ids(frame[declaration.id_column])
    if declaration.group_column:
        # A group holdout seals away at least one group, and each fold needs one of the others.
        needed = declaration.folds + (1 if scheme == "group" else 0)
        _check_groups(frame[declaration.group_column], needed)
    if declaration.time_column:
        time_order_key(frame[declaration.time_column], "/time_column")  # raises when not times


def _reject_missing(column: pd.Series, role: str, each: str) -> None:
    """Refuse a declared column with missing values, naming how many and the first data row."""
    missing = column.isna().to_numpy()
    if missing.any():
        raise _rejected(
            f"/{role}",
            f"{role} {column.name!r} has {int(missing.sum())} missing values (first in data row "
            f"{int(np.flatnonzero(missing)[0]) + 1}); every row needs {each}",
        )


def _check_target(target: pd.Series, task: str) -> None:
    name = target.name
    _reject_missing(target, "target", "a target")
    if pd.api.types.is_datetime64_any_dtype(target.dtype):
        raise _rejected(
            "/target", f"target {name!r} holds datetimes ({target.dtype}); a target needs numbers or labels"
        )
    if task == "regression":
        if pd.api.types.is_bool_dtype(target.dtype) or not pd.api.types.is_numeric_dtype(target.dtype):
            example = target.iloc[0]
            raise _rejected(
                "/target",
                f"task 'regression' needs a numeric target; {name!r} is {target.dtype} "
                f"(e.g. {describe_value(example)}); convert it to numbers, or declare task 'classification'",
            )
        if not np.isfinite(target.to_numpy(dtype=np.float64)).all():
            raise _rejected("/target", f"target {name!r} has infinite values; every target must be finite")
    if target.nunique() < 2:
        raise _rejected(
            "/target",
            f"target {name!r} has the single value {describe_value(target.iloc[0])}; a model needs at least 2 values",
        )


def _check_class_sizes(labels: list[Any], sizes: np.ndarray, kept: np.ndarray | None, folds: int) -> None:
    """Raise unless every class keeps ``folds`` development rows (``kept`` None: before any holdout)."""
    remaining = sizes if kept is None else kept
    short = [(label, int(n), int(k)) for label, n, k in zip(labels, sizes, remaining, strict=True) if k < folds]
    if not short:
        return
    if kept is None:
        listed = ", ".join(f"{describe_value(label)} has {n}" for label, n, _ in short[:5])
    else:
        listed = ", ".join(
            f"{describe_value(label)} has {n} rows, {k} left after the holdout" for label, n, k in short[:5]
        )
    more = f" and {len(short) - 5} more" if len(short) > 5 else ""
    raise _rejected(
        "/target",
        f"every class needs at least {folds} development rows for {folds} folds: {listed}{more}; "
        "use fewer folds, merge rare classes, or drop their rows",
    )


def _check_ids(ids: pd.Series) -> None:
    name = ids.name
    _reject_missing(ids, "id_column", "an id")
    as_text = ids.astype(str)  # row ids are the text of the ids: 7 and "7" must not both occur
    repeated = as_text.duplicated(keep=False).to_numpy()
    if repeated.any():
        first = as_text[repeated].iloc[0]
        raise _rejected(
            "/id_column",
            f"id_column {name!r} has {int(as_text.duplicated().sum())} duplicate ids (e.g. {first!r} appears "
            f"{int((as_text == first).sum())} times); every id must be unique",
        )


def _check_groups(groups: pd.Series, needed: int) -> None:
    name = groups.name
    _reject_missing(groups, "group_column", "a group")
    n_groups = groups.nunique()
    if n_groups < needed:
        raise _rejected(
            "/group_column",
            f"group_column {name!r} has {n_groups} groups; the folds and the holdout need at least {needed}",
        )


def _seal(frame: pd.DataFrame, declaration: DatasetDeclaration, scheme: str, fraction: float) -> _Sealed:
    task, target = declaration.task, declaration.target
    mask, seed, balance_document = _draw_balanced(frame, declaration, scheme, fraction)
    development = frame[~mask].reset_index(drop=True)
    holdout = frame[mask].reset_index(drop=True)
    plan = FoldPlan(
        declaration.fold_scheme or default_plan_scheme(task, declaration.group_column, declaration.time_column),
        declaration.folds,
        secrets.randbelow(2**31),
    )
    # The development rows alone must carry the plan. A rejection here counts development rows
    # only, and the dataset is not registered, so the discarded seal is never used.
    dev_target = development[target]
    if dev_target.nunique() < 2:
        raise _rejected("/target", f"target {target!r} has a single value in the development rows")
    if task == "classification":
        # Against the classes of the whole table: a class sealed away entirely counts as 0 rows.
        _, sizes, labels = sealing.class_codes(frame[target])
        kept = dev_target.value_counts().reindex(labels, fill_value=0).to_numpy()
        _check_class_sizes(labels, sizes, kept, declaration.folds)
    keys = split_keys_from_frame(development, plan, target, declaration.group_column, declaration.time_column)
    check_plan_feasible(plan, keys)
    development.insert(0, store.ROW_ID, _row_ids(development, declaration.id_column))
    return _Sealed(development, holdout, scheme, float(fraction), seed, plan, balance_document, keys)


def _draw_balanced(
    frame: pd.DataFrame, declaration: DatasetDeclaration, scheme: str, fraction: float,
    limits: balance.BalanceLimits = balance.DEFAULT_LIMITS,
) -> tuple[np.ndarray, int, dict[str, Any]]:
    """Draw the holdout mask, redraw while it is out of balance; return the best mask, its seed, the record."""
    excluded = (declaration.id_column, declaration.group_column, declaration.time_column)
    check = balance.BalanceCheck.prepare(frame, target=declaration.target, task=declaration.task,
                                         exclude=excluded, limits=limits)
    redrawable = scheme != "time"
    draws: list[balance.Measurement] = []
    best: tuple[np.ndarray, int, int] | None = None  # mask, seed, index into draws
    for _ in range(1 + (limits.redraws if redrawable else 0)):
        seed = secrets.randbits(63)
        mask = sealing.holdout_mask(
            frame, scheme, fraction, seed, target=declaration.target,
            group_column=declaration.group_column, time_column=declaration.time_column, task=declaration.task,
            version=sealing.SEAL_VERSION,
        )
        measured = check.measure(mask)
        draws.append(measured)
        if best is None or measured.rank() < draws[best[2]].rank():
            best = (mask, seed, len(draws) - 1)
        if measured.balanced:
            break
    assert best is not None  # at least one draw
    document = balance.balance_document(draws, best[2], redrawable=redrawable, limits=limits, excluded=excluded)
    document["seal"] = {"scheme": scheme, "version": sealing.SEAL_VERSION}
    return best[0], best[1], document


def _row_ids(development: pd.DataFrame, id_column: str | None) -> pd.Series:
    # Numbered in development order, never by original position: gaps would show where the
    # holdout rows were.
    if id_column:
        return development[id_column].astype(str).reset_index(drop=True)
    numbers = pd.Series(np.arange(1, len(development) + 1)).astype(str).str.zfill(6)
    return "d" + numbers


def _classes(target: pd.Series) -> list[str]:
    return [str(label) for label in np.unique(target.to_numpy())]


def _rejected(pointer: str, detail: str) -> DatasetRejected:
    return DatasetRejected(detail, [FieldProblem(pointer, detail)])


def _problem(cls: type[SealfoldError], pointer: str, detail: str) -> SealfoldError:
    return cls(detail, [FieldProblem(pointer, detail)])


def _fold_scheme_problems(declaration: DatasetDeclaration) -> list[FieldProblem]:
    """Check an explicitly chosen fold scheme against the declared columns and task."""
    scheme = declaration.fold_scheme
    if scheme is None:
        return []
    if scheme not in FOLD_SCHEMES:
        return [FieldProblem("/fold_scheme", f"fold_scheme must be one of {', '.join(FOLD_SCHEMES)}, got {scheme!r}")]
    needs = {"group": "group_column", "time": "time_column"}.get(scheme)
    if needs is not None and getattr(declaration, needs) is None:
        return [FieldProblem("/fold_scheme", f"fold_scheme {scheme!r} needs a {needs}")]
    if scheme == "stratified" and declaration.task != "classification":
        return [FieldProblem("/fold_scheme", "fold_scheme 'stratified' needs a classification task, "
                             f"got {declaration.task!r}")]
    return []
