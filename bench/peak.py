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


def report_peak(catalog_path: str, out: str, queue: Any) -> None:
    """Put (seconds, peak resident bytes) of writing the catalog report on the queue.

    The peak is the child's whole resident set (ru_maxrss: Python, numpy, pandas, matplotlib's
    Agg buffers alike), measured in a fresh process so nothing else counts.
    """
    import resource
    import time

    import curate

    with curate.open_catalog(catalog_path) as catalog:
        started = time.perf_counter()
        catalog.report(out)
        seconds = time.perf_counter() - started
    queue.put((seconds, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024))
