"""Runs in a spawned child: the peak memory of one weighted-table export, or of the report."""

from __future__ import annotations

import tracemalloc
from pathlib import Path
from typing import Any


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


def _resident_bytes() -> int:
    """Give the process's resident set now (Linux /proc; 0 elsewhere)."""
    import os

    try:
        with open("/proc/self/statm") as stream:
            return int(stream.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except OSError:
        return 0


def streamed_export_peak(catalog_path: str, out: str, whole: bool, queue: Any) -> None:
    """Put what one Parquet export of the weighted table costs on the queue: seconds, the
    growth of the resident set (peak minus the resident set before it started, after a
    warm-up export of one dataset), the peak of pyarrow's memory pool and tracemalloc's peak
    (Python and numpy allocations).

    ``whole``: today's way (the whole weighted frame, then one write); else the stream.
    """
    import resource
    import time

    import pyarrow as pa
    import pyarrow.parquet as pq

    import curate
    from curate.export.table import table_bytes
    from curate.weighting import Selection, resolve_policy
    from curate.weighting.stream import weighted_stream

    with curate.open_catalog(catalog_path) as catalog:
        policy = resolve_policy(None)
        # warm up on one dataset first: the code pages of the libraries (pyarrow's Parquet
        # writer and codecs, pandas) count in the resident set once touched, whatever the size
        first = Selection(ids=(catalog.list()[0].id,))
        if whole:
            table_bytes(catalog.weighted_table(policy=policy, selection=first), "parquet")
        else:
            warm = weighted_stream(catalog, policy, first)
            with pq.ParquetWriter(out, warm.schema, compression="zstd") as writer:
                for batch in warm.batches():
                    writer.write_batch(batch)
        before = _resident_bytes()
        tracemalloc.start()
        started = time.perf_counter()
        if whole:
            Path(out).write_bytes(table_bytes(catalog.weighted_table(policy=policy), "parquet"))
        else:
            stream = weighted_stream(catalog, policy, Selection())
            with pq.ParquetWriter(out, stream.schema, compression="zstd") as writer:
                for batch in stream.batches():
                    writer.write_batch(batch)
        seconds = time.perf_counter() - started
        _, traced = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    queue.put({"seconds": seconds, "resident_growth": max(peak - before, 0),
               "arrow_pool_peak": pa.default_memory_pool().max_memory(), "traced_peak": traced})  # fmt: skip
