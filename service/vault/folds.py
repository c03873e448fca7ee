"""Fold plans: which development rows each cross-validation fold trains and tests on.

A plan (scheme, folds, seed) is fixed per dataset, so every submission on it is scored on the same
folds and two submissions can be compared fold by fold. ``fold_splits`` is a pure function of the
plan and the split keys: the same plan on the same rows always gives the same folds.

Schemes, and what each promises:
    kfold       shuffled k-fold; index-for-index what scikit-learn's
                ``KFold(n_splits, shuffle=True, random_state=seed)`` gives
    stratified  every class spread evenly over the folds; index-for-index
                ``StratifiedKFold(n_splits, shuffle=True, random_state=seed)``
    group       no group in both the train and the test rows of a fold; fold sizes balanced
    time        forward chaining: rows sorted by time, cut into folds + 1 contiguous chunks; fold i
                tests chunk i + 1 and trains on every earlier chunk, never on the future. The cuts
                are scikit-learn's ``TimeSeriesSplit(n_splits)`` cuts on the time-sorted rows, each
                moved to the nearest position where the time changes, so no timestamp lies on both
                sides of any fold's split (as the time holdout cuts); without tied times the folds
                are exactly ``TimeSeriesSplit``'s
The scikit-learn algorithms are reproduced with numpy here because the service core must not import
scikit-learn; tests check the equality against scikit-learn itself.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from service.errors import DatasetRejected, FieldProblem, InputError
from service.vault.tables import describe_value, time_order_key

FOLD_SCHEMES: tuple[str, ...] = ("kfold", "stratified", "group", "time", "contiguous")
# Schemes whose folds do not depend on the seed, so a repeat would only rerun the same folds.
SEEDLESS_SCHEMES: frozenset[str] = frozenset({"time", "contiguous"})
MIN_FOLDS, MAX_FOLDS = 2, 20
MAX_SEED = 2**32 - 1  # numpy's RandomState, and so scikit-learn's random_state, take seeds up to here
# The version of each scheme's fold algorithm, part of its cached assignment's file name: raise it when a
# scheme's folds change, so assignments cached by the old algorithm are never read again.
# time 2: cuts moved off tied times.
ASSIGNMENT_VERSIONS: dict[str, int] = {"kfold": 1, "stratified": 1, "group": 1, "time": 2, "contiguous": 1}


@dataclass(frozen=True)
class FoldPlan:
    """The folds every submission on a dataset is scored on; validated on construction."""

    scheme: str
    folds: int
    seed: int

    def __post_init__(self) -> None:
        problems = plan_problems(self.folds)
        if self.scheme not in FOLD_SCHEMES:
            problems.append(FieldProblem(
                "/fold_plan/scheme", f"fold scheme must be one of {', '.join(FOLD_SCHEMES)}, got {self.scheme!r}"
            ))
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or not 0 <= self.seed <= MAX_SEED:
            problems.append(FieldProblem(
                "/fold_plan/seed", f"fold seed must be an integer from 0 to {MAX_SEED}, got {self.seed!r}"
            ))
        if problems:
            raise InputError(problems[0].detail, problems)

    def to_document(self) -> dict[str, Any]:
        """Return the plan as the JSON document stored with the dataset."""
        return {"scheme": self.scheme, "folds": self.folds, "seed": self.seed}

    @classmethod
    def from_document(cls, document: dict[str, Any]) -> FoldPlan:
        """Rebuild a plan from its stored document."""
        return cls(scheme=document["scheme"], folds=document["folds"], seed=document["seed"])


@dataclass(frozen=True)
class SplitKeys:
    """What the schemes split on: the row count and, when declared, target, groups and time order."""

    n_rows: int
    y: np.ndarray | None = None
    groups: np.ndarray | None = None
    time: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class Split:
    """One fold of one repeat: sorted indices into the development rows."""

    repeat: int
    fold: int
    train: np.ndarray
    test: np.ndarray


def plan_problems(folds: Any) -> list[FieldProblem]:
    """Return what is wrong with a requested number of folds (empty when it is allowed)."""
    if isinstance(folds, bool) or not isinstance(folds, int) or not MIN_FOLDS <= folds <= MAX_FOLDS:
        return [FieldProblem("/folds", f"folds must be between {MIN_FOLDS} and {MAX_FOLDS}, got {folds!r}")]
    return []


def default_plan_scheme(task: str, group_column: str | None, time_column: str | None) -> str:
    """Return the fold scheme that follows the declared columns (time over group, as for the holdout)."""
    if time_column:
        return "time"
    if group_column:
        return "group"
    return "stratified" if task == "classification" else "kfold"


def split_keys_from_frame(
    dev_df: pd.DataFrame,
    plan: FoldPlan,
    target: str | None,
    group_column: str | None,
    time_column: str | None,
) -> SplitKeys:
    """Collect the split keys of the development rows for ``plan``."""
    y = dev_df[target].to_numpy() if target else None
    groups = dev_df[group_column].to_numpy() if group_column else None
    time = time_order_key(dev_df[time_column], "/time_column") if time_column else None
    if plan.scheme == "group" and groups is None:
        raise _rejected("/group_column", "fold scheme 'group' needs a group_column")
    if plan.scheme == "time" and time is None:
        raise _rejected("/time_column", "fold scheme 'time' needs a time_column")
    return SplitKeys(n_rows=len(dev_df), y=y, groups=groups, time=time)


def check_plan_feasible(plan: FoldPlan, keys: SplitKeys) -> None:
    """Raise DatasetRejected when the rows cannot be cut into the plan's folds."""
    folds = plan.folds
    if keys.n_rows < folds:
        raise _rejected("/folds", f"{folds} folds need at least {folds} development rows, got {keys.n_rows}")
    if plan.scheme == "stratified":
        if keys.y is None:
            raise _rejected("/target", "fold scheme 'stratified' needs the target values")
        labels, counts = _class_counts(keys.y)
        short = [(label, int(count)) for label, count in zip(labels, counts, strict=True) if count < folds]
        if short:
            listed = ", ".join(f"{describe_value(label)} has {count}" for label, count in short[:5])
            more = f" and {len(short) - 5} more" if len(short) > 5 else ""
            raise _rejected(
                "/target",
                f"every class needs at least {folds} development rows for {folds} folds: {listed}{more}; "
                "use fewer folds, merge rare classes, or drop their rows",
            )
    elif plan.scheme == "group":
        if keys.groups is None:
            raise _rejected("/group_column", "fold scheme 'group' needs the group values")
        n_groups = len(pd.unique(keys.groups))
        if n_groups < folds:
            raise _rejected(
                "/group_column",
                f"{folds} group folds need at least {folds} groups in the development rows, got {n_groups}",
            )
    elif plan.scheme == "time":
        if keys.time is None:
            raise _rejected("/time_column", "fold scheme 'time' needs the time values")
        if keys.n_rows // (folds + 1) < 1:
            raise _rejected(
                "/folds", f"{folds} time folds need at least {folds + 1} development rows, got {keys.n_rows}"
            )
        n_times = len(np.unique(keys.time))
        if n_times < folds + 1:
            raise _rejected(
                "/folds",
                f"{folds} time folds need at least {folds + 1} distinct times in the development rows, got "
                f"{n_times}: rows with the same time stay on one side of every cut; use fewer folds",
            )


def fold_splits(plan: FoldPlan, keys: SplitKeys, repeats: int = 1) -> list[Split]:
    """Return the train/test indices of every fold of every repeat; repeat r uses seed + r."""
    check_split_request(plan, keys, repeats)
    splits: list[Split] = []
    for repeat in range(repeats):
        assignment = fold_assignment(plan, keys, repeat)
        splits.extend(split_of(plan, assignment, repeat, fold) for fold in range(plan.folds))
    return splits


def fold_split(plan: FoldPlan, keys: SplitKeys, repeat: int, fold: int, repeats: int = 1) -> Split:
    """Return one (repeat, fold) split, equal to its entry in ``fold_splits``, without building the others.

    A fold job needs only its own rows; at a million rows the other folds' index arrays cost more
    than the fold's model fit.
    """
    check_split_request(plan, keys, repeats)
    check_cell(plan, repeats, repeat, fold)
    return split_of(plan, fold_assignment(plan, keys, repeat), repeat, fold)


def check_split_request(plan: FoldPlan, keys: SplitKeys, repeats: int) -> None:
    """Raise InputError/DatasetRejected unless ``repeats`` of ``plan`` can be cut from these rows."""
    check_repeats(plan, repeats)
    check_plan_feasible(plan, keys)


def check_repeats(plan: FoldPlan, repeats: int) -> None:
    """Raise InputError unless ``plan`` can be repeated ``repeats`` times (the rows aside)."""
    if isinstance(repeats, bool) or not isinstance(repeats, int) or repeats < 1:
        raise _invalid("/validation/repeats", f"repeats must be a positive integer, got {repeats!r}")
    if plan.scheme in SEEDLESS_SCHEMES and repeats != 1:
        raise _invalid(
            "/validation/repeats",
            f"{plan.scheme} folds are the same on every repeat, so repeats must be 1, got {repeats}",
        )
    if plan.seed + repeats - 1 > MAX_SEED:
        raise _invalid("/validation/repeats", f"seed {plan.seed} + {repeats} repeats exceeds {MAX_SEED}")


def check_cell(plan: FoldPlan, repeats: int, repeat: int, fold: int) -> None:
    """Raise InputError unless (repeat, fold) is one of the plan's cells."""
    if not (0 <= repeat < repeats and 0 <= fold < plan.folds):
        raise _invalid("/validation", f"no fold (repeat {repeat}, fold {fold}) in a plan of {repeats} repeat(s) "
                                      f"x {plan.folds} folds")


def fold_assignment(plan: FoldPlan, keys: SplitKeys, repeat: int = 0) -> np.ndarray:
    """Return, per development row, its fold in repeat ``repeat`` (seed + repeat).

    For time folds the number is the row's chunk of the time order: chunk 0 (the oldest rows) is
    only ever trained on, and fold k tests chunk k + 1 and trains on chunks 0..k.
    """
    if plan.scheme == "time":
        assert keys.time is not None
        return _time_chunks(keys.time, plan.folds)
    return _test_fold_of_rows(plan.scheme, plan.folds, plan.seed + repeat, keys)


def split_of(plan: FoldPlan, assignment: np.ndarray, repeat: int, fold: int) -> Split:
    """Cut one fold's sorted train and test indices from a ``fold_assignment``."""
    if plan.scheme == "time":
        train, test = np.flatnonzero(assignment <= fold), np.flatnonzero(assignment == fold + 1)
    else:
        train, test = np.flatnonzero(assignment != fold), np.flatnonzero(assignment == fold)
    return Split(repeat, fold, train.astype(np.int64, copy=False), test.astype(np.int64, copy=False))


def classes_missing_from_training(
    plan: FoldPlan, y: np.ndarray, assignment: np.ndarray, repeat: int
) -> list[dict[str, Any]]:
    """Return the folds of one repeat whose training rows lack a class of ``y``, with the classes they lack.

    A model fitted on such a fold has never seen the class; its scores still count every class (the
    worker scores against the development rows' classes), but they judge a model that could not
    predict it. Group, time, contiguous and shuffled k-fold plans can leave a class out of a fold's
    training rows (a class with fewer groups, chunks or rows than folds); a stratified plan cannot:
    every class has at least as many rows as folds, and it deals them out so each fold tests at most
    all but one of them.
    """
    codes, labels = pd.factorize(y)
    out = []
    for fold in range(plan.folds):
        train = assignment <= fold if plan.scheme == "time" else assignment != fold
        present = np.bincount(codes[train & (codes >= 0)], minlength=len(labels)) > 0
        if not present.all():
            missing = sorted(str(label) for label, seen in zip(labels, present, strict=True) if not seen)
            out.append({"repeat": repeat, "fold": fold, "missing_classes": missing})
    return out


def _test_fold_of_rows(scheme: str, folds: int, seed: int, keys: SplitKeys) -> np.ndarray:
    if scheme == "kfold":
        return _kfold(keys.n_rows, folds, seed)
    if scheme == "contiguous":
        return _contiguous(keys.n_rows, folds)
    if scheme == "stratified":
        assert keys.y is not None
        return _stratified(keys.y, folds, seed)
    assert keys.groups is not None
    return _grouped(keys.groups, folds, seed)


def _contiguous(n_rows: int, folds: int) -> np.ndarray:
    # scikit-learn KFold(shuffle=False), what cv=<int> means for a regressor: rows in their stored order
    # cut into contiguous chunks, the first n % k one row larger. For data whose order carries no signal.
    sizes = np.full(folds, n_rows // folds, dtype=np.int64)
    sizes[: n_rows % folds] += 1
    return np.repeat(np.arange(folds), sizes)


def _kfold(n_rows: int, folds: int, seed: int) -> np.ndarray:
    # scikit-learn KFold(shuffle=True): shuffle the positions with RandomState(seed), then cut them
    # into contiguous chunks, the first n % k one row larger.
    indices = np.arange(n_rows)
    np.random.RandomState(seed).shuffle(indices)
    sizes = np.full(folds, n_rows // folds, dtype=np.int64)
    sizes[: n_rows % folds] += 1
    fold_of_row = np.empty(n_rows, dtype=np.int64)
    fold_of_row[indices] = np.repeat(np.arange(folds), sizes)
    return fold_of_row


def _stratified(y: np.ndarray, folds: int, seed: int) -> np.ndarray:
    # scikit-learn StratifiedKFold(shuffle=True): classes numbered by first appearance, per-class fold
    # sizes dealt round-robin over the class-sorted rows, then each class's fold labels shuffled.
    rng = np.random.RandomState(seed)
    codes, _ = pd.factorize(y)  # first-appearance order, as StratifiedKFold's class_perm
    n_classes = int(codes.max()) + 1
    ordered = np.sort(codes)
    allocation = np.asarray([np.bincount(ordered[i::folds], minlength=n_classes) for i in range(folds)])
    fold_of_row = np.empty(len(codes), dtype=np.int64)
    for k in range(n_classes):
        labels = np.arange(folds).repeat(allocation[:, k])
        rng.shuffle(labels)
        fold_of_row[codes == k] = labels
    return fold_of_row


def _grouped(groups: np.ndarray, folds: int, seed: int) -> np.ndarray:
    # Largest group first onto the fold with the fewest rows so far (as scikit-learn's unshuffled
    # GroupKFold does); the groups are shuffled by the seed first, so equal-sized groups land on
    # different folds for different seeds and repeats. Greedy filling keeps the largest and the
    # smallest fold within one group's size of each other.
    codes, labels = pd.factorize(groups)
    sizes = np.bincount(codes, minlength=len(labels))
    shuffled = np.random.RandomState(seed).permutation(len(labels))
    order = shuffled[np.argsort(-sizes[shuffled], kind="stable")]
    load = np.zeros(folds, dtype=np.int64)
    fold_of_group = np.empty(len(labels), dtype=np.int64)
    for group in order:
        lightest = int(np.argmin(load))
        fold_of_group[group] = lightest
        load[lightest] += sizes[group]
    return fold_of_group[codes]


def _time_chunks(time: np.ndarray, folds: int) -> np.ndarray:
    # Forward chaining: rows sorted by time (equal times keep their row order) and cut where
    # TimeSeriesSplit(folds) cuts them (a first chunk of n - folds * (n // (folds + 1)) rows, then
    # ``folds`` chunks of n // (folds + 1) rows each), each cut moved to where the time changes.
    order = np.argsort(time, kind="stable")
    ordered = time[order]
    n_rows = len(order)
    chunk = n_rows // (folds + 1)
    wanted = n_rows - folds * chunk + chunk * np.arange(folds)  # the first row of chunks 1..folds
    changes = np.flatnonzero(ordered[1:] > ordered[:-1]) + 1  # positions whose time is later than the previous
    cuts = _nearest_cuts(changes, wanted)
    chunk_of_row = np.empty(n_rows, dtype=np.int64)
    chunk_of_row[order] = np.searchsorted(cuts, np.arange(n_rows), side="right")
    return chunk_of_row


def _nearest_cuts(changes: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    """Move each wanted cut to the nearest allowed position, keeping the cuts strictly increasing.

    Cut k is chosen after cut k - 1 and early enough to leave a position for every later cut, so no
    chunk is empty; at equal distance the earlier position wins, as in the time holdout. When every
    position is allowed (no tied times) each cut stays where it was wanted.
    """
    cuts = np.empty(len(wanted), dtype=np.int64)
    low = 0
    for k, target in enumerate(wanted):
        high = len(changes) - (len(wanted) - k)  # the last index that leaves room for the later cuts
        window = changes[low:high + 1]
        chosen = low + int(np.argmin(np.abs(window - target)))
        cuts[k] = changes[chosen]
        low = chosen + 1
    return cuts


def _class_counts(y: np.ndarray) -> tuple[list[Any], np.ndarray]:
    codes, labels = pd.factorize(y)
    return list(labels), np.bincount(codes[codes >= 0], minlength=len(labels))


def _rejected(pointer: str, detail: str) -> DatasetRejected:
    return DatasetRejected(detail, [FieldProblem(pointer, detail)])


def _invalid(pointer: str, detail: str) -> InputError:
    return InputError(detail, [FieldProblem(pointer, detail)])
