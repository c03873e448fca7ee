"""scikit-learn's bundled datasets as frames, and split invariants in the style of its own split tests.

scikit-learn's ``sklearn/model_selection/tests/test_split.py`` checks every splitter for the same
few promises (train and test disjoint, the tests of all folds covering the rows exactly once, the
same random_state giving the same folds); these helpers state them once for sealfold's fold plans.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sklearn import datasets as skd

from service.vault.folds import Split


def assert_disjoint_and_covering(splits: list[Split], n_rows: int, repeats: int = 1) -> None:
    """Each fold's train and test are disjoint and together all rows; each repeat tests every row once."""
    everything = np.arange(n_rows)
    for split in splits:
        assert len(np.intersect1d(split.train, split.test)) == 0, f"fold {split.fold} trains on its test rows"
        assert np.array_equal(np.union1d(split.train, split.test), everything)
        assert np.all(np.diff(split.test) > 0) and np.all(np.diff(split.train) > 0), "indices sorted, unique"
    for repeat in range(repeats):
        tested = np.concatenate([s.test for s in splits if s.repeat == repeat])
        assert np.array_equal(np.sort(tested), everything), f"repeat {repeat} does not test every row once"


def assert_same_splits(left: list[Split], right: list[Split]) -> None:
    """Both lists hold the very same folds, index for index."""
    assert len(left) == len(right)
    for a, b in zip(left, right, strict=True):
        assert (a.repeat, a.fold) == (b.repeat, b.fold)
        assert np.array_equal(a.train, b.train) and np.array_equal(a.test, b.test)


def iris_frame() -> pd.DataFrame:
    """Iris (Fisher 1936, bundled with scikit-learn): 150 rows, 4 features, 3 classes of 50."""
    return skd.load_iris(as_frame=True).frame


def diabetes_frame() -> pd.DataFrame:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn): 442 rows, 10 features, target 'target'."""
    return skd.load_diabetes(as_frame=True).frame


def breast_cancer_frame() -> pd.DataFrame:
    """Breast cancer Wisconsin (bundled with scikit-learn): 569 rows, 30 features, binary 'target'."""
    return skd.load_breast_cancer(as_frame=True).frame


def wine_frame() -> pd.DataFrame:
    """Wine (bundled with scikit-learn): 178 rows, 13 features, 3 classes."""
    return skd.load_wine(as_frame=True).frame
