"""Runs in a spawned child: the peak memory one weighted-table export allocates."""

from __future__ import annotations

import tracemalloc
from pathlib import Path
from typing import Any


def export_peak(catalog_path: str, out: str, queue: Any) -> None:
    """Put the peak bytes allocated during one export on the queue.

    tracemalloc sees Python and numpy/pandas allocations; pyarrow's own buffers (the Parquet
    encoder) are outside it, so the figure is a lower bound.
    """
    import curate
    from curate.export.table import table_bytes

    with curate.open_catalog(catalog_path) as catalog:
        tracemalloc.start()
        table = catalog.weighted_table()
        Path(out).write_bytes(table_bytes(table, "parquet"))
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        queue.put(peak)
