"""The weighted long table: CSV (pyarrow's writer) and Parquet, one row per point.

Written whole from a DataFrame (:func:`write_table`, the folds), or streamed record batch by
record batch into both writers at once (:func:`write_table_batches`, the table export): the
CSV bytes are the same either way; the Parquet file holds the same schema and values, in one
row group per batch.

The ``unit`` column carries each unit's symbol (``nM``, ``µm/s``), ``unit_ucum`` its UCUM
code; ``units.json`` beside the table names the unit of every other column (time, conditions).
"""

from __future__ import annotations

import io
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from curate.export.files import atomic_file, sha256_file, write_bytes, write_json
from curate.weighting.table import unit_symbols

if TYPE_CHECKING:
    import pyarrow as pa

__all__ = [
    "UNITS_FILE",
    "table_bytes",
    "unit_symbols",
    "write_table",
    "write_table_batches",
    "write_units",
]

UNITS_FILE = "units.json"


def write_units(outdir: Path, description: dict[str, Any]) -> dict[str, str]:
    """Write ``units.json`` (the unit of every column, see :data:`UNITS_FILE`); give its sha256."""
    return {UNITS_FILE: write_json(outdir / UNITS_FILE, description)}


_PARQUET_COMPRESSION = "zstd"


def _csv_options() -> Any:
    import pyarrow.csv as pacsv

    return pacsv.WriteOptions(quoting_style="needed")


def table_bytes(frame: pd.DataFrame, kind: str) -> bytes:
    """Give the table serialised as 'csv' or 'parquet' bytes."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False)
    sink = io.BytesIO()
    if kind == "csv":
        pacsv.write_csv(table, sink, write_options=_csv_options())
    elif kind == "parquet":
        pq.write_table(table, sink, compression=_PARQUET_COMPRESSION)
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


def write_table_batches(
    schema: pa.Schema, batches: Iterable[pa.RecordBatch], outdir: Path, stem: str = "points"
) -> dict[str, str]:
    """Write ``stem``.csv and ``stem``.parquet from record batches (unit column as symbols),
    each batch into both writers as it comes; give file name -> sha256.

    Each file appears whole or not at all (written to a temporary file, renamed when complete).
    """
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    csv_path, parquet_path = outdir / f"{stem}.csv", outdir / f"{stem}.parquet"
    with atomic_file(csv_path) as csv_part, atomic_file(parquet_path) as parquet_part:
        with (
            pacsv.CSVWriter(str(csv_part), schema, write_options=_csv_options()) as csv_writer,
            pq.ParquetWriter(str(parquet_part), schema, compression=_PARQUET_COMPRESSION) as parquet_writer,
        ):  # fmt: skip
            for batch in batches:
                csv_writer.write_batch(batch)
                parquet_writer.write_batch(batch)
        digests = {
            csv_path.name: sha256_file(csv_part),
            parquet_path.name: sha256_file(parquet_part),
        }
    return digests
