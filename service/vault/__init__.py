"""The dataset vault: reading tables, fingerprinting, sealing the holdout, fold plans and files.

Pure numpy, pandas and pyarrow; nothing here imports Flask or scikit-learn. Modules:
``tables`` (read a file, describe its columns), ``fingerprint`` (canonical SHA-256 of a frame, and the
published fingerprint), ``sealing`` (which rows are held out), ``balance`` and ``adversarial`` (how well
a holdout draw matches the development rows), ``structure`` (warnings of undeclared groups or time
order), ``folds`` (fold plans and their splits), ``store`` (files under the data dir, the fingerprint
key, and the checked opening of the sealed holdout), ``spool`` (uploads received to disk, and the
start-up sweep of what a killed upload left).

``store.open_sealed_holdout`` is deliberately not re-exported: only the worker's holdout job opens
the seal, and it imports it by its full name.
"""

from service.vault.fingerprint import fingerprint_frame
from service.vault.folds import FoldPlan, Split, SplitKeys, check_plan_feasible, fold_splits, split_keys_from_frame
from service.vault.sealing import default_fraction, default_scheme, holdout_mask
from service.vault.store import (
    DatasetPaths,
    dataset_paths,
    iter_development_csv,
    load_development_frame,
    load_numeric,
)
from service.vault.tables import column_kinds, read_table

__all__ = [
    "DatasetPaths",
    "FoldPlan",
    "Split",
    "SplitKeys",
    "check_plan_feasible",
    "column_kinds",
    "dataset_paths",
    "default_fraction",
    "default_scheme",
    "fingerprint_frame",
    "fold_splits",
    "holdout_mask",
    "iter_development_csv",
    "load_development_frame",
    "load_numeric",
    "read_table",
    "split_keys_from_frame",
]
