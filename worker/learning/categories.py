"""Declared categorical columns handed to an estimator that splits on categories itself.

``model.categorical_features`` names the columns; the pipeline passes them through
``CategoryCodes`` and tells the estimator which they are (``native_categorical_params``): nothing is
inferred from column order or guessed from values. Each column becomes a pandas categorical whose
categories are the codes 0..n-1 of the training fold's values in sorted order (``OrdinalEncoder``'s);
a value the fold never saw, and a missing one, become a missing value, which LightGBM, XGBoost and
HistGradientBoosting send down the branch they learned for missing values.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.preprocessing import OrdinalEncoder
from sklearn.utils._missing import is_scalar_nan

STEP_NAME = "native_categorical"


class CategoryCodes(TransformerMixin, BaseEstimator):
    """Encode columns as pandas categoricals with fixed codes; unseen or missing values become missing."""

    def fit(self, X: Any, y: Any = None) -> CategoryCodes:
        """Learn each column's categories, sorted (missing values are no category)."""
        self.encoder_ = OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=np.nan,
                                       encoded_missing_value=np.nan).fit(X)
        self.n_categories_ = [sum(1 for c in cats if not is_scalar_nan(c) and c is not None)
                              for cats in self.encoder_.categories_]
        return self

    def transform(self, X: Any) -> pd.DataFrame:
        """Return a frame of categoricals (codes as categories), indexed as ``X``."""
        codes = self.encoder_.transform(X)
        index = X.index if isinstance(X, pd.DataFrame) else None
        columns = {
            str(name): pd.Categorical.from_codes(np.where(np.isnan(col), -1, col).astype(np.int64),
                                                 categories=pd.Index(range(n)))
            for name, col, n in zip(self.get_feature_names_out(), codes.T, self.n_categories_, strict=True)
        }
        return pd.DataFrame(columns, index=index)

    def get_feature_names_out(self, input_features: Sequence[str] | None = None) -> np.ndarray:
        """The input names: one output column per input column."""
        return np.asarray(self.encoder_.get_feature_names_out(input_features), dtype=object)


def native_categorical_params(estimator: str, columns: Sequence[str]) -> dict[str, Any]:
    """The parameters that tell ``estimator`` which of its input columns are categorical.

    HistGradientBoosting takes their names; XGBoost reads categorical dtypes once
    ``enable_categorical`` is on; LightGBM's fit takes pandas categorical columns as categorical
    (its ``categorical_feature='auto'``), and only the declared columns are categoricals.
    """
    if estimator.startswith("HistGradientBoosting"):
        return {"categorical_features": list(columns)}
    if estimator.startswith("XGB"):
        return {"enable_categorical": True}
    return {}
