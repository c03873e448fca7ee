"""XGBoost's classifier as the service fits it: the dataset's own labels, not only 0..K-1.

``xgboost.XGBClassifier`` accepts only the labels 0, 1, ..., K-1 (it says "Invalid classes inferred
from unique values of y" otherwise), while a dataset's classes are whatever its target column holds.
This subclass encodes the labels the way ``sklearn.preprocessing.LabelEncoder`` does (sorted), fits the
library's model on the codes, and decodes its predictions; ``predict_proba`` is the library's own, its
columns in the order of ``classes_``. Nothing else changes: the fitted booster is the one
``xgboost.XGBClassifier`` fits on the encoded labels (``tests/worker/learning/test_boosting.py``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import xgboost


class XGBClassifier(xgboost.XGBClassifier):
    """``xgboost.XGBClassifier`` over the dataset's own labels."""

    def fit(self, X: Any, y: Any, **fit_params: Any) -> XGBClassifier:
        """Fit on the labels' codes in sorted order (LabelEncoder's)."""
        labels, codes = np.unique(np.asarray(y), return_inverse=True)
        self.labels_ = np.arange(len(labels))  # the library's fit checks its codes against classes_
        super().fit(X, codes, **fit_params)
        self.labels_ = labels
        return self

    def predict(self, X: Any, **kwargs: Any) -> np.ndarray:
        """Predict the labels (the library predicts their codes)."""
        codes = np.asarray(super().predict(X, **kwargs), dtype=np.intp)
        return np.asarray(self.labels_[codes])

    @property
    def classes_(self) -> np.ndarray:
        """The labels seen in fit, sorted; ``predict_proba``'s columns follow them."""
        return np.asarray(self.labels_)
