"""Missing values per column of a dataset's development rows, read from the Parquet footer.

Parquet keeps a null count per column chunk, so the count costs a footer read whatever the size of
the table. Only the development partition is read: the sealed rows are never opened here.
"""

from __future__ import annotations

import pyarrow.parquet as pq

from service.settings import Settings
from service.vault.store import dataset_paths


def development_missing(settings: Settings, ds_id: str) -> dict[str, int] | None:
    """Return {column: missing values} over the development rows, or None when the counts are not recorded."""
    path = dataset_paths(settings, ds_id).development
    try:
        meta = pq.ParquetFile(path).metadata
    except (OSError, ValueError):
        return None
    counts: dict[str, int] = {}
    for g in range(meta.num_row_groups):
        group = meta.row_group(g)
        for c in range(group.num_columns):
            chunk = group.column(c)
            stats = chunk.statistics
            if stats is None or not stats.has_null_count:
                return None
            name = chunk.path_in_schema
            counts[name] = counts.get(name, 0) + int(stats.null_count)
    return counts
