"""A declared dataset record for the configuration tests: the fields resolution reads, no files.

The rows behind it are the invented delivery-fleet scenario's column names; no figure is checked
against them.
"""

from __future__ import annotations

from typing import Any

ROUTES: dict[str, Any] = {
    "id": "ds_1", "task": "regression", "target": "fuel_litres", "id_column": "route_id",
    "group_column": None, "time_column": None, "classes": None,
    "columns": [
        {"name": "route_id", "kind": "categorical", "dtype": "object"},
        {"name": "distance_km", "kind": "numeric", "dtype": "float64"},
        {"name": "stops", "kind": "numeric", "dtype": "int64"},
        {"name": "depot", "kind": "categorical", "dtype": "object"},
        {"name": "fuel_litres", "kind": "numeric", "dtype": "float64"},
    ],
    "fold_plan": {"scheme": "kfold", "folds": 5, "seed": 42},
}
