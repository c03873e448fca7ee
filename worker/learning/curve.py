"""Learning-curve points of one fold: fit on the first n training rows, score train and validation.

This is what ``sklearn.model_selection.learning_curve`` does with ``shuffle=False``: for a size given
as a fraction, n = int(fraction * training rows) clipped to [1, training rows], and the model is fitted
on the first n indices of the fold's training part, then scored on those n rows (above
``TRAIN_SCORE_ROWS``, on the seeded sample ``training_sample`` draws, as the fold itself does) and on
the fold's validation rows. Like scikit-learn, the sizes count from the training rows of the first split of
the repeat (``reference_rows``), the same n for every fold; without it, each fold's own count.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, clone

from service.vault.folds import Split
from worker.learning.development import DevelopmentData
from worker.learning.scoring import rows_to_score, score_model, training_sample


def curve_sizes(fractions: Sequence[float], n_train: int) -> list[int]:
    """Return the training-row count of each fraction, as scikit-learn translates float sizes."""
    return [int(np.clip(int(f * n_train), 1, n_train)) for f in fractions]


def curve_points(
    model: BaseEstimator, data: DevelopmentData, split: Split, metrics: Sequence[str], fractions: Sequence[float],
    full: dict[str, Any] | None = None, reference_rows: int | None = None,
) -> list[dict[str, Any]]:
    """Score ``model`` refitted on growing prefixes of the fold's training rows.

    ``full`` is the fold's own outcome (train and validation scores of the model fitted on every
    training row); the point at n = all training rows reuses it rather than fitting again.
    """
    points = []
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
        rows = split.train[:n]
        X_part, y_part = data.features_of(rows), data.target_of(rows)
        scored = training_sample(n, split.repeat, split.fold)
        point["train_scored_rows"] = n if scored is None else len(scored)
        try:
            fitted = clone(model).fit(X_part, y_part)
            point["train_scores"], _ = score_model(fitted, *rows_to_score(X_part, y_part, scored), metrics)
            point["scores"], _ = score_model(fitted, X_test, y_test, metrics)
        except MemoryError:
            raise
        except Exception as exc:  # e.g. too few rows of a class at 10 %: this point fails, not the fold
            point.update(train_scores=None, scores=None, error=f"{type(exc).__name__}: {exc}")
        points.append(point)
    return points
