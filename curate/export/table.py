"""The weighted long table: CSV (pyarrow's writer) and Parquet, one row per point."""

from __future__ import annotations

import io
from pathlib import Path

import pandas as pd

from curate.export.files import write_bytes

__all__ = ["table_bytes", "write_table"]


def table_bytes(frame: pd.DataFrame, kind: str) -> bytes:
    """Give the table serialised as 'csv' or 'parquet' bytes."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False)
    sink = io.BytesIO()
    if kind == "csv":
        pacsv.write_csv(table, sink, write_options=pacsv.WriteOptions(quoting_style="needed"))
    elif kind == "parquet":
        pq.write_table(table, sink, compression="zstd")
    else:
        raise ValueError(kind)
    return sink.getvalue()


def write_table(frame: pd.DataFrame, outdir: Path, stem: str = "points") -> dict[str, str]:
    """Write ``stem``.csv and ``stem``.parquet into ``outdir``; give file name -> sha256."""
    return {
        f"{stem}.csv": write_bytes(outdir / f"{stem}.csv", table_bytes(frame, "csv")),
        f"{stem}.parquet": write_bytes(outdir / f"{stem}.parquet", table_bytes(frame, "parquet")),
    }
