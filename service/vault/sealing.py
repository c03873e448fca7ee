"""Choose the holdout rows of a dataset: the partition that is sealed away at registration.

The mask is a pure function of the table, the scheme, the fraction and the sealing seed. The seed
is drawn by the server (``secrets``) and never leaves it, so nobody outside can recompute which
rows were sealed; keeping the function deterministic lets the service itself re-derive and check
a seal if it ever has to.

Schemes:
    random      a uniformly random subset of rows
    stratified  within each stratum of the target, the same fraction: the classes of a classification
                target; for regression, quantile bins of the target (deciles, fewer on small tables)
                and, from seal version 2, each tail of the target in bins of its own (see
                ``tail_aware_bins``), so the extremes are split between the partitions like the rest
    group       whole groups: every group lies entirely on one side
    time        the latest rows by the time column (no seed involved)

Stratified is the default for regression too when no group or time column is declared: it costs
nothing in randomness (rows are still drawn at random within each bin) and it rules out the
unluckiest draws, those that put a narrow or shifted range of the target in the holdout, which
would bias every holdout score. Group and time holdouts cannot be stratified this way without
breaking their own promise, so they keep their schemes.

Seal versions: a dataset's holdout is fixed at registration and never re-derived, but the function
must keep giving the same mask for the same inputs, so a change to a scheme's algorithm is a new
version (``SEAL_VERSION``, recorded in the balance document) and the older ones stay callable.
Version 1: regression strata are the decile bins alone. Version 2: plus the tail bins.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from service.errors import DatasetRejected, FieldProblem
from service.vault.tables import time_order_key

HOLDOUT_SCHEMES: tuple[str, ...] = ("random", "stratified", "group", "time")
MAX_FRACTION = 0.5
MAX_TARGET_BINS = 10  # deciles
SEAL_VERSIONS: tuple[int, ...] = (1, 2)
SEAL_VERSION = 2  # what registration uses now
TAIL_BLOCKS = 3  # bins of its own per tail of a regression target (seal version 2)


def default_fraction(n_rows: int) -> float:
    """Return the holdout fraction for a table of ``n_rows`` rows.

    20 % under 100k rows, 10 % under 1M, 1 % from 1M: common practice, no published source. Large
    tables need a smaller share for the same precision of a holdout score.
    """
    if n_rows < 100_000:
        return 0.2
    if n_rows < 1_000_000:
        return 0.1
    return 0.01


def default_scheme(task: str, group_column: str | None, time_column: str | None) -> str:
    """Return the holdout scheme that follows the declared columns.

    A time column wins over a group column: when both are declared, holding out the future is the
    promise that matters for a forecast, and it is the one a random or grouped cut would break.
    Otherwise stratified, on the classes or (regression) on quantile bins of the target.
    """
    if time_column:
        return "time"
    if group_column:
        return "group"
    return "stratified"


def holdout_problems(
    scheme: str, fraction: float | None, *, group_column: str | None, time_column: str | None
) -> list[FieldProblem]:
    """Return what is wrong with a holdout request (empty when it can be honoured).

    ``fraction`` None skips its check (a default fraction is only known once the rows are counted).
    Every scheme serves both tasks.
    """
    problems = []
    if scheme not in HOLDOUT_SCHEMES:
        problems.append(FieldProblem(
            "/holdout_scheme", f"holdout_scheme must be one of {', '.join(HOLDOUT_SCHEMES)}, got {scheme!r}"
        ))
    elif scheme == "group" and not group_column:
        problems.append(FieldProblem(
            "/holdout_scheme", "holdout_scheme 'group' needs a group_column; declare which column holds the groups"
        ))
    elif scheme == "time" and not time_column:
        problems.append(FieldProblem(
            "/holdout_scheme", "holdout_scheme 'time' needs a time_column; declare which column holds the times"
        ))
    if fraction is not None and (
        isinstance(fraction, bool) or not isinstance(fraction, int | float) or not 0 < fraction <= MAX_FRACTION
    ):
        problems.append(FieldProblem(
            "/holdout_fraction", f"holdout_fraction must be greater than 0 and at most {MAX_FRACTION}, got {fraction!r}"
        ))
    return problems


def holdout_count(n_rows: int, fraction: float) -> int:
    """Return how many rows a fraction holds out: rounded up, as scikit-learn's train_test_split does.

    At least one row is held out and at least one is kept.
    """
    return min(max(math.ceil(fraction * n_rows), 1), n_rows - 1)


def holdout_mask(
    df: pd.DataFrame,
    scheme: str,
    fraction: float,
    seed: int,
    *,
    target: str | None,
    group_column: str | None,
    time_column: str | None,
    task: str | None = None,
    version: int = 1,
) -> np.ndarray:
    """Return a boolean array over the rows of ``df``: True for the rows to seal away.

    ``task`` matters to the stratified scheme only: "regression" stratifies on quantile bins of the
    target, anything else on its classes. ``version``: the seal version (module docstring); the
    default stays 1 so that a caller re-deriving an old seal gets it back.
    """
    if version not in SEAL_VERSIONS:
        raise ValueError(f"seal version must be one of {SEAL_VERSIONS}, got {version!r}")
    problems = holdout_problems(scheme, fraction, group_column=group_column, time_column=time_column)
    if problems:
        raise DatasetRejected(problems[0].detail, problems)
    n_rows = len(df)
    if n_rows < 2:
        raise _rejected("/file", f"a holdout needs at least 2 rows, got {n_rows}")
    n_holdout = holdout_count(n_rows, fraction)
    rng = np.random.default_rng(seed)
    if scheme == "random":
        chosen = rng.permutation(n_rows)[:n_holdout]
    elif scheme == "stratified":
        if target is None:
            raise _rejected("/target", "holdout_scheme 'stratified' needs a target")
        strata = df[target].to_numpy()
        if task == "regression":
            strata = target_bins(df[target], n_holdout)
            if version >= 2:
                strata = tail_aware_bins(df[target], strata, fraction)
        chosen = _stratified(strata, n_holdout, rng)
    elif scheme == "group":
        assert group_column is not None  # holdout_problems checked it
        chosen = _grouped(df[group_column], n_holdout, rng)
    else:
        assert time_column is not None
        chosen = _latest(df[time_column], n_holdout)
    mask = np.zeros(n_rows, dtype=bool)
    mask[chosen] = True
    return mask


def stratified_counts(class_sizes: np.ndarray, n_holdout: int) -> np.ndarray:
    """Return how many rows of each class the stratified scheme holds out.

    Each class gets its exact share rounded down, and the rows still missing go to the classes
    with the largest remainders (largest-remainder apportionment, ties to the earlier class). The
    counts depend on the class sizes alone, not on the seed, so a caller can check before sealing
    what each class keeps.
    """
    n_rows = int(class_sizes.sum())
    shares = n_holdout * class_sizes / n_rows
    counts = np.floor(shares).astype(np.int64)
    left = n_holdout - int(counts.sum())
    if left:
        order = np.argsort(-(shares - counts), kind="stable")
        counts[order[:left]] += 1
    return counts


def target_bins(target: pd.Series, n_holdout: int) -> np.ndarray:
    """Number each row by its quantile bin of a numeric target: deciles, or fewer bins on small tables.

    No more bins than holdout rows, so each bin can give up at least one row. Bins are cut on the
    ranks (ties get the lowest rank), so equal targets always share a bin and a heavily tied target
    simply has fewer, larger bins.
    """
    bins = max(1, min(MAX_TARGET_BINS, n_holdout))
    ranks = target.rank(method="min").to_numpy(dtype=np.float64) - 1.0
    return np.floor(ranks * bins / len(target)).astype(np.int64)


def tail_aware_bins(target: pd.Series, bins: np.ndarray, fraction: float) -> np.ndarray:
    """Give each tail of a numeric target ``TAIL_BLOCKS`` bins of its own, of ceil(1/fraction) rows each.

    Deciles alone leave the top tenth as one bin, from which rows are drawn at random: on a long-tailed
    target the few largest values can all land in the holdout (at 20 %, the three largest with
    chance 0.8 %), the development rows never show that range and every holdout score is off. A bin
    of ceil(1/fraction) consecutive rows by target gives up about one row (its share is at least 1),
    so of the most extreme values one in ceil(1/fraction) is sealed, as of the rest. Rows are ordered
    by target, ties by position (a tie split between two tail bins changes nothing the seal promises).
    The tails shrink on small tables so that they never take more than half the rows.
    """
    n_rows = len(target)
    block = math.ceil(1.0 / fraction)
    blocks = min(TAIL_BLOCKS, n_rows // (4 * block))
    if blocks == 0:
        return bins
    order = np.argsort(target.to_numpy(dtype=np.float64), kind="stable")
    tail_rows = blocks * block
    strata = bins.astype(np.int64).copy()
    first = int(strata.max()) + 1
    blocks_of_tail = np.arange(tail_rows) // block
    strata[order[:tail_rows]] = first + blocks_of_tail  # the lowest targets
    strata[order[n_rows - tail_rows:]] = first + blocks + blocks_of_tail[::-1]  # the highest
    return strata


def class_codes(y: np.ndarray | pd.Series) -> tuple[np.ndarray, np.ndarray, list[object]]:
    """Number the classes of ``y`` by first appearance; return codes, class sizes and labels."""
    codes, labels = pd.factorize(np.asarray(y))
    if (codes < 0).any():
        raise _rejected("/target", "every row needs a target value; some are missing")
    return codes, np.bincount(codes, minlength=len(labels)), list(labels)


def _stratified(y: np.ndarray, n_holdout: int, rng: np.random.Generator) -> np.ndarray:
    codes, sizes, _ = class_codes(y)
    counts = stratified_counts(sizes, n_holdout)
    chosen = [rng.permutation(np.flatnonzero(codes == k))[:count] for k, count in enumerate(counts)]
    return np.concatenate(chosen) if chosen else np.empty(0, dtype=np.int64)


def _grouped(groups: pd.Series, n_holdout: int, rng: np.random.Generator) -> np.ndarray:
    codes, labels = pd.factorize(groups)
    if (codes < 0).any():
        raise _rejected("/group_column", f"group column {groups.name!r} has missing values; every row needs a group")
    if len(labels) < 2:
        raise _rejected(
            "/group_column",
            f"group column {groups.name!r} has a single group; a group holdout needs at least 2 groups",
        )
    sizes = np.bincount(codes)
    order = rng.permutation(len(labels))
    held_rows = np.cumsum(sizes[order])[:-1]  # holding out the first 1 .. n_groups-1 shuffled groups
    n_groups_held = int(np.argmin(np.abs(held_rows - n_holdout))) + 1
    return np.flatnonzero(np.isin(codes, order[:n_groups_held]))


def _latest(times: pd.Series, n_holdout: int) -> np.ndarray:
    key = time_order_key(times, "/time_column")
    order = np.argsort(key, kind="stable")
    ordered = key[order]
    # Cut only where the time strictly increases, so no timestamp lies on both sides.
    cuts = np.flatnonzero(ordered[1:] > ordered[:-1]) + 1
    if len(cuts) == 0:
        raise _rejected(
            "/time_column",
            f"time column {times.name!r} has a single value; a time holdout needs at least 2 distinct times",
        )
    wanted = len(key) - n_holdout
    cut = int(cuts[np.argmin(np.abs(cuts - wanted))])
    return order[cut:]


def _rejected(pointer: str, detail: str) -> DatasetRejected:
    return DatasetRejected(detail, [FieldProblem(pointer, detail)])
