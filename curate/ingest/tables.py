"""Reading CSV, TSV and XLSX files into cells of text, with exact line numbers for errors.

Every cell is read as text first; numbers are converted column-wise with numpy/pandas, so a
bad cell is found without a Python loop over points and reported by its line and column.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from curate.errors import InputError, where

__all__ = [
    "DATA_SUFFIXES",
    "MAX_FILE_BYTES",
    "Table",
    "read_table",
    "table_from_bytes",
]

DATA_SUFFIXES = {".csv": ",", ".tsv": "\t", ".tab": "\t", ".xlsx": None}
MAX_FILE_BYTES = 512 * 1024 * 1024  # a single measured series is never this large
_ZIP_MAGIC = b"PK\x03\x04"


@dataclass(frozen=True)
class Table:
    """A data file's header and cells, all text, with the file line of every row."""

    path: Path
    columns: tuple[str, ...]
    cells: dict[str, np.ndarray]  # column -> object array of str
    lines: np.ndarray  # file line (CSV/TSV) or sheet row (XLSX) of each data row
    row_word: str = "line"

    def __len__(self) -> int:
        return len(self.lines)

    def locate(self, index: int, column: str) -> str:
        """Give the location prefix for data row ``index`` and ``column``."""
        if self.row_word == "line":
            return where(self.path, line=int(self.lines[index]), column=column)
        return f"{self.path}, row {int(self.lines[index])}, column '{column}': "

    def numbers(
        self, column: str, *, allow_empty: bool = False, what: str = "a number"
    ) -> np.ndarray:
        """Give a column as float64; empty cells become NaN only when ``allow_empty``.

        Raises InputError naming the first cell that is not a finite number.
        """
        text = pd.Series(self.cells[column], dtype=object).str.strip()
        values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=np.float64, copy=True)
        empty = (text == "").to_numpy()
        bad = ~np.isfinite(values) & ~(empty & allow_empty)
        if bad.any():
            index = int(np.argmax(bad))
            cell = str(text.iloc[index])
            if cell == "":
                problem = f"empty cell; expected {what}"
            elif cell.lower().lstrip("+-") in {"nan", "inf", "infinity"} or np.isinf(values[index]):
                problem = f"'{cell}' is not a finite number; expected {what}"
            else:
                problem = f"'{cell}' is not a number; expected {what}"
            raise InputError(self.locate(index, column) + problem)
        values[empty] = np.nan
        return np.asarray(values, dtype=np.float64)


def _check_file(path: Path, max_bytes: int) -> str:
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if not path.is_file():
        raise InputError(f"{path}: not a regular file")
    suffix = path.suffix.lower()
    if suffix not in DATA_SUFFIXES:
        raise InputError(
            f"{path}: unsupported file type '{path.suffix}'; expected "
            + ", ".join(sorted(DATA_SUFFIXES))
        )
    size = path.stat().st_size
    if size == 0:
        raise InputError(f"{path}: the file is empty; expected a header row and data rows")
    if size > max_bytes:
        raise InputError(
            f"{path}: the file has {size} bytes, more than the limit of "
            f"{max_bytes} bytes for one data file"
        )
    return suffix


def read_table(
    path: str | Path, *, sheet: str | None = None, max_bytes: int = MAX_FILE_BYTES
) -> Table:
    """Give the header and text cells of a CSV, TSV or XLSX file."""
    path = Path(path)
    _check_file(path, max_bytes)
    return table_from_bytes(path, path.read_bytes(), sheet=sheet)


def table_from_bytes(
    path: Path, raw: bytes, *, sheet: str | None = None, require_rows: bool = True
) -> Table:
    """Give the header and text cells of a file's bytes already read (``path`` names it).

    With ``require_rows=False`` a header without data rows is a table of no rows (a PEtab
    parameter table of a problem that estimates nothing).
    """
    suffix = path.suffix.lower()
    if suffix not in DATA_SUFFIXES:
        raise InputError(
            f"{path}: unsupported file type '{path.suffix}'; expected "
            + ", ".join(sorted(DATA_SUFFIXES))
        )
    if suffix == ".xlsx":
        if not raw.startswith(_ZIP_MAGIC):
            raise InputError(
                f"{path}: not an XLSX workbook (the file does not start like one); "
                "save it from the spreadsheet program as .xlsx, or rename a text "
                "file to .csv"
            )
        rows, lines = _xlsx_rows(path, raw, sheet)
        row_word = "row"
    else:
        if sheet is not None:
            raise InputError(f"{path}: a sheet name applies to .xlsx files only")
        rows, lines = _text_rows(path, raw, DATA_SUFFIXES[suffix] or ",")
        row_word = "line"
    return _to_table(path, rows, lines, row_word, require_rows=require_rows)


def _text_rows(path: Path, raw: bytes, delimiter: str) -> tuple[list[list[str]], list[int]]:
    if b"\x00" in raw[:65536] or raw.startswith(_ZIP_MAGIC):
        raise InputError(
            f"{path}: not a text file (binary content); expected "
            f"{'comma' if delimiter == ',' else 'tab'}-separated text"
        )
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise InputError(
            f"{path}: byte {err.start} is not UTF-8 text; save the file as UTF-8"
        ) from None
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    rows: list[list[str]] = []
    lines: list[int] = []
    try:
        for row in reader:
            if not row or all(not cell.strip() for cell in row):
                continue
            rows.append(row)
            lines.append(reader.line_num)
    except csv.Error as err:
        raise InputError(where(path, line=reader.line_num) + f"unreadable row ({err})") from None
    return rows, lines


def _cell_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, dt.datetime | dt.date | dt.time):
        return value.isoformat()
    return str(value)


def _xlsx_rows(path: Path, raw: bytes, sheet: str | None) -> tuple[list[list[str]], list[int]]:
    import zipfile

    import openpyxl
    from openpyxl.utils.exceptions import InvalidFileException

    try:
        book = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=True)
    except (zipfile.BadZipFile, InvalidFileException, KeyError, OSError, ValueError):
        raise InputError(
            f"{path}: not a readable XLSX workbook (damaged, or another format with an .xlsx "
            "name); save it again as .xlsx, or as .csv"
        ) from None
    try:
        if sheet is None:
            worksheet = book.worksheets[0]
        elif sheet in book.sheetnames:
            worksheet = book[sheet]
        else:
            raise InputError(
                f"{path}: no sheet named '{sheet}'; the workbook has "
                + ", ".join(repr(s) for s in book.sheetnames)
            )
        rows: list[list[str]] = []
        lines: list[int] = []
        for number, values in enumerate(worksheet.iter_rows(values_only=True), start=1):
            cells = [_cell_text(v) for v in values]
            while cells and cells[-1] == "":
                cells.pop()
            if not cells:
                continue
            rows.append(cells)
            lines.append(number)
    finally:
        book.close()
    return rows, lines


def _to_table(
    path: Path, rows: list[list[str]], lines: list[int], row_word: str, *, require_rows: bool
) -> Table:
    if not rows:
        raise InputError(f"{path}: the file holds no rows; expected a header row and data rows")
    header = [cell.strip() for cell in rows[0]]
    while header and header[-1] == "" and row_word == "row":
        header.pop()
    for position, name in enumerate(header, start=1):
        if name == "":
            raise InputError(
                f"{path}, {row_word} {lines[0]}: header cell {position} is empty; "
                "every column needs a name"
            )
    seen: set[str] = set()
    for name in header:
        if name.lower() in seen:
            raise InputError(f"{path}, {row_word} {lines[0]}: column '{name}' appears twice")
        seen.add(name.lower())
    body = rows[1:]
    if not body and require_rows:
        raise InputError(f"{path}: the file has a header but no data rows")
    width = len(header)
    for row, line in zip(body, lines[1:], strict=True):
        if len(row) > width and any(cell.strip() for cell in row[width:]):
            raise InputError(
                f"{path}, {row_word} {line}: {len(row)} cells, but the header has {width} columns"
            )
        if len(row) < width and row_word == "line":
            raise InputError(
                f"{path}, {row_word} {line}: {len(row)} cells, but the header has {width} columns"
            )
    padded = [(row + [""] * width)[:width] for row in body]
    matrix = np.array(padded, dtype=object).reshape(len(body), width)
    cells = {name: matrix[:, i] for i, name in enumerate(header)}
    return Table(
        path=path,
        columns=tuple(header),
        cells=cells,
        lines=np.asarray(lines[1:], dtype=np.int64),
        row_word=row_word,
    )
