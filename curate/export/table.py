"""The weighted long table: CSV (pyarrow's writer) and Parquet, one row per point.

The ``unit`` column carries each unit's symbol (``nM``, ``µm/s``), ``unit_ucum`` its UCUM
code; ``units.json`` beside the table names the unit of every other column (time, conditions).
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import pandas as pd

from curate.export.files import write_bytes, write_json
from curate.units import short_unit

__all__ = ["UNITS_FILE", "table_bytes", "unit_symbols", "write_table", "write_units"]

UNITS_FILE = "units.json"


def unit_symbols(frame: pd.DataFrame) -> pd.DataFrame:
    """Give the frame with its ``unit`` column as symbols ('nanomolar' -> 'nM')."""
    if "unit" not in frame.columns:
        return frame
    column = frame["unit"]
    if isinstance(column.dtype, pd.CategoricalDtype):
        renamed = [short_unit(str(c)) for c in column.cat.categories]
        if len(set(renamed)) == len(renamed):
            return frame.assign(unit=column.cat.rename_categories(renamed))
    symbols = column.map(lambda u: None if u is None else short_unit(str(u)))
    return frame.assign(unit=symbols)


def write_units(outdir: Path, description: dict[str, Any]) -> dict[str, str]:
    """Write ``units.json`` (the unit of every column, see :data:`UNITS_FILE`); give its sha256."""
    return {UNITS_FILE: write_json(outdir / UNITS_FILE, description)}


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
    frame = unit_symbols(frame)
    return {
        f"{stem}.csv": write_bytes(outdir / f"{stem}.csv", table_bytes(frame, "csv")),
        f"{stem}.parquet": write_bytes(outdir / f"{stem}.parquet", table_bytes(frame, "parquet")),
    }
