"""Learning-curve points of one fold: fit on n shuffled training rows, score train and validation.

This is what ``sklearn.model_selection.learning_curve`` does with ``shuffle=True``: the fold's training
indices are permuted once (``curve_order``), and for a size given as a fraction, n = int(fraction *
training rows) clipped to [1, training rows], the model is fitted on the first n indices of that
permutation, then scored on those n rows (above ``TRAIN_SCORE_ROWS``, on the seeded sample
``training_sample`` draws, as the fold itself does) and on the fold's validation rows. Shuffled, no
size depends on the order of the rows in the file: on a table sorted by the target, the first 10 %
of the stored rows would hold one part of it. The permutation is seeded by the fold plan's seed,
the repeat and the fold, so every submission on the dataset trains on the same rows at each size and
their curves stay comparable. Like scikit-learn, the sizes count from the training rows of the first
split of the repeat (``reference_rows``), the same n for every fold; without it, each fold's own count.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, clone

from service.vault.folds import Split
from worker.learning.development import DevelopmentData
from worker.learning.scoring import rows_to_score, score_model, training_sample
from worker.learning.search import for_rows

SHUFFLE_NOTE = ("each size trains on the first n rows of a seeded shuffle of the fold's training rows (the "
                "fold plan's seed, repeat and fold: the same rows for every submission on the dataset), as "
                "scikit-learn's learning_curve(shuffle=True) does; the order of rows in the file plays no part")


def curve_sizes(fractions: Sequence[float], n_train: int) -> list[int]:
    """Return the training-row count of each fraction, as scikit-learn translates float sizes."""
    return [int(np.clip(int(f * n_train), 1, n_train)) for f in fractions]


def curve_order(train: np.ndarray, seed: int, repeat: int, fold: int) -> np.ndarray:
    """Return the fold's training indices in the seeded order whose prefixes the curve trains on."""
    return np.random.default_rng([seed, repeat, fold]).permutation(train)


def curve_points(
    model: BaseEstimator, data: DevelopmentData, split: Split, metrics: Sequence[str], fractions: Sequence[float],
    full: dict[str, Any] | None = None, reference_rows: int | None = None, classes: np.ndarray | None = None,
    seed: int = 0,
) -> list[dict[str, Any]]:
    """Score ``model`` refitted on growing prefixes of the fold's shuffled training rows (``curve_order``).

    ``full`` is the fold's own outcome (train and validation scores of the model fitted on every
    training row); the point at n = all training rows reuses it rather than fitting again.
    ``classes`` is the dataset's class set, which every point is scored against.
    """
    points = []
    order = curve_order(split.train, seed, split.repeat, split.fold)
    y_test = data.target_of(split.test)
    X_test = data.features_of(split.test)
    counted = len(split.train) if reference_rows is None else min(reference_rows, len(split.train))
    for fraction, n in zip(fractions, curve_sizes(fractions, counted), strict=True):
        point: dict[str, Any] = {"fraction": float(fraction), "train_rows": n}
        if full is not None and n == len(split.train):
            point.update(train_scores=full["train_scores"], train_scored_rows=full["train_scored_rows"],
                         scores=full["scores"])
            points.append(point)
            continue
        rows = order[:n]  # in the shuffled order too: an estimator that reads rows in turn never sees the file's
        X_part, y_part = data.features_of(rows), data.target_of(rows)
        scored = training_sample(n, split.repeat, split.fold)
        point["train_scored_rows"] = n if scored is None else len(scored)
        try:
            fitted = for_rows(clone(model), rows).fit(X_part, y_part)
            point["train_scores"], _ = score_model(fitted, *rows_to_score(X_part, y_part, scored), metrics, classes)
            point["scores"], undefined = score_model(fitted, X_test, y_test, metrics, classes)
            if undefined:
                point["undefined"] = undefined
        except MemoryError:
            raise
        except Exception as exc:  # e.g. too few rows of a class at 10 %: this point fails, not the fold
            point.update(train_scores=None, scores=None, error=f"{type(exc).__name__}: {exc}")
        points.append(point)
    return points
