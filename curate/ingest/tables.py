"""Reading CSV, TSV and XLSX files into cells of text, with exact line numbers for errors.

Every cell is read as text first; numbers are converted column-wise with numpy/pandas, so a
bad cell is found without a Python loop over points and reported by its line and column.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import io
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError, where
from curate.ingest.dialect import (
    AmbiguousNumbers,
    Dialect,
    decode,
    detect_delimiter,
    detect_number_format,
    numbers_as_written,
)

__all__ = [
    "DATA_SUFFIXES",
    "MAX_FILE_BYTES",
    "Layout",
    "Table",
    "read_table",
    "table_from_bytes",
    "workbook_sheets",
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
    dialect: Dialect | None = None  # how a text file is written (None: a workbook)
    sheet: str | None = None  # the workbook sheet read
    sheets: tuple[str, ...] = ()  # every sheet of the workbook
    header_line: int = 1  # file line or sheet row of the header

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
        if self.dialect is not None and (self.dialect.decimal != "." or self.dialect.thousands):
            text = numbers_as_written(text, self.dialect.decimal, self.dialect.thousands)
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
            if self.dialect is not None and "encoding" in self.dialect.detected:
                problem += f" (the file is not UTF-8 and was read as {self.dialect.encoding})"
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


@dataclass(frozen=True)
class Layout:
    """Where the table sits in its file and how it is written (the sidecar's ``sheet``,
    ``header_row``, ``skip_rows`` and ``[dialect]``; None: found from the file)."""

    sheet: str | int | None = None  # a sheet's name, or its position counted from 1
    header_row: int | None = None  # the file line (sheet row) of the header
    skip_rows: int = 0  # lines (rows) above the header to leave out
    delimiter: str | None = None
    decimal: str | None = None
    thousands: str | None = None
    encoding: str | None = None


def read_table(
    path: str | Path, *, sheet: str | int | None = None, max_bytes: int = MAX_FILE_BYTES,
    layout: Layout | None = None,
) -> Table:  # fmt: skip
    """Give the header and text cells of a CSV, TSV or XLSX file."""
    path = Path(path)
    _check_file(path, max_bytes)
    return table_from_bytes(path, path.read_bytes(), sheet=sheet, layout=layout)


def table_from_bytes(
    path: Path, raw: bytes, *, sheet: str | int | None = None, require_rows: bool = True,
    layout: Layout | None = None, strict_text: bool = False,
) -> Table:  # fmt: skip
    """Give the header and text cells of a file's bytes already read (``path`` names it).

    With ``require_rows=False`` a header without data rows is a table of no rows (a PEtab
    parameter table of a problem that estimates nothing). ``strict_text`` reads UTF-8 with
    the suffix's delimiter only (formats that define their own, such as PEtab's TSV).
    """
    layout = layout or Layout()
    if sheet is not None:
        layout = Layout(**{**layout.__dict__, "sheet": sheet})
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
        rows, lines, chosen, sheets = _xlsx_rows(path, raw, layout.sheet)
        rows, lines = _from_header(path, rows, lines, layout, "row")
        table = _to_table(path, rows, lines, "row", require_rows=require_rows)
        return dataclasses.replace(table, sheet=chosen, sheets=sheets)
    if layout.sheet is not None:
        raise InputError(f"{path}: a sheet applies to .xlsx files only")
    default = DATA_SUFFIXES[suffix] or ","
    if strict_text:
        rows, lines = _text_rows(path, raw, default)
        return _to_table(path, rows, lines, "line", require_rows=require_rows)
    dialect, text = _dialect(path, raw, default, layout)
    rows, lines = _rows_of_text(path, text, dialect.delimiter)
    rows, lines = _from_header(path, rows, lines, layout, "line")
    table = _to_table(path, rows, lines, "line", require_rows=require_rows)
    if layout.decimal is None and layout.thousands is None:
        cells = [str(c) for column in table.cells.values() for c in column[:2000]]
        try:
            decimal, thousands = detect_number_format(cells, dialect.delimiter)
        except AmbiguousNumbers as err:
            raise InputError(f"{path}: {err}") from None
        detected = dialect.detected + tuple(
            name for name, value, default_value in
            (("decimal", decimal, "."), ("thousands", thousands, "")) if value != default_value
        )  # fmt: skip
        dialect = dataclasses.replace(dialect, decimal=decimal, thousands=thousands,
                                      detected=detected)  # fmt: skip
    return dataclasses.replace(table, dialect=dialect)


def _dialect(path: Path, raw: bytes, default: str, layout: Layout) -> tuple[Dialect, str]:
    """Give the file's dialect (as given, else detected) and its text."""
    if (
        b"\x00" in raw[:65536] and not raw.startswith((b"\xff\xfe", b"\xfe\xff"))
    ) or raw.startswith(_ZIP_MAGIC):
        raise InputError(
            f"{path}: not a text file (binary content); expected "
            f"{'comma' if default == ',' else 'tab'}-separated text"
        )
    text, encoding, encoding_found = decode(path, raw, layout.encoding)
    detected: list[str] = ["encoding"] if encoding_found else []
    if layout.delimiter is not None:
        delimiter = {"tab": "\t", "\\t": "\t"}.get(layout.delimiter, layout.delimiter)
    else:
        delimiter, found = detect_delimiter(text, default)
        if found:
            detected.append("delimiter")
    if len(delimiter) != 1:
        raise InputError(f"{path}: dialect.delimiter '{layout.delimiter}': expected one character")
    dialect = Dialect(encoding=encoding, delimiter=delimiter, decimal=layout.decimal or ".",
                      thousands=layout.thousands or "", detected=tuple(detected))  # fmt: skip
    if dialect.thousands and dialect.thousands == dialect.decimal:
        raise InputError(
            f"{path}: dialect.decimal and dialect.thousands are both '{dialect.decimal}'"
        )
    if dialect.decimal == dialect.delimiter:
        raise InputError(f"{path}: the decimal mark and the delimiter are both '{delimiter}'")
    return dialect, text


def _from_header(path: Path, rows: list[list[str]], lines: list[int], layout: Layout,
                 row_word: str) -> tuple[list[list[str]], list[int]]:  # fmt: skip
    """Give the rows from the header on: below ``skip_rows``, from ``header_row``."""
    if layout.skip_rows < 0 or (layout.header_row is not None and layout.header_row < 1):
        raise InputError(f"{path}: header_row counts from 1 and skip_rows from 0")
    first = layout.header_row if layout.header_row is not None else layout.skip_rows + 1
    if first <= 1:
        return rows, lines
    keep = [k for k, line in enumerate(lines) if line >= first]
    if layout.header_row is not None and (not keep or lines[keep[0]] != layout.header_row):
        raise InputError(
            f"{path}, {row_word} {layout.header_row}: header_row names an empty {row_word}"
        )
    return [rows[k] for k in keep], [lines[k] for k in keep]


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
    return _rows_of_text(path, text, delimiter)


def _rows_of_text(path: Path, text: str, delimiter: str) -> tuple[list[list[str]], list[int]]:
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


_UNREADABLE = (
    "not a readable XLSX workbook (damaged, or another format with an .xlsx name); save it "
    "again as .xlsx, or as .csv"
)


class _Workbook:
    """A workbook's sheet names and each sheet's rows as (row number, cell values).

    python-calamine (Rust) reads it where it can: several times faster than openpyxl, cached
    values of formulas; openpyxl, pandas' own engine for the format, reads what calamine
    refuses. Either gives the same text cells (a whole number is written without '.0').
    """

    def __init__(self, path: Path, raw: bytes, *, engine: str = "auto") -> None:
        self.path = path
        self._calamine: Any = None
        self._openpyxl: Any = None
        if engine in ("auto", "calamine"):
            try:
                from python_calamine import CalamineWorkbook

                self._calamine = CalamineWorkbook.from_filelike(io.BytesIO(raw))
                self.names = tuple(str(n) for n in self._calamine.sheet_names)
                self.engine = "calamine"
                return
            except Exception:  # calamine refuses it (or is not installed): openpyxl tries
                if engine == "calamine":
                    raise InputError(f"{path}: {_UNREADABLE}") from None
        import zipfile

        import openpyxl
        from openpyxl.utils.exceptions import InvalidFileException

        try:
            self._openpyxl = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=True)
        except (zipfile.BadZipFile, InvalidFileException, KeyError, OSError, ValueError):
            raise InputError(f"{path}: {_UNREADABLE}") from None
        self.names = tuple(str(n) for n in self._openpyxl.sheetnames)
        self.engine = "openpyxl"

    def rows(self, name: str) -> Iterator[tuple[int, list[str]]]:
        """Give each row of a sheet that holds a cell: its number (from 1) and its text cells."""
        if self._calamine is not None:
            sheet = self._calamine.get_sheet_by_name(name)
            first = sheet.start[0] if sheet.start else 0
            values_by_row: Iterable[tuple[int, Any]] = (
                (first + k + 1, values)
                for k, values in enumerate(sheet.to_python(skip_empty_area=False))
            )
        else:
            values_by_row = enumerate(self._openpyxl[name].iter_rows(values_only=True), start=1)
        for number, values in values_by_row:
            cells = [_cell_text(_whole(v)) for v in values]
            while cells and cells[-1] == "":
                cells.pop()
            if cells:
                yield number, cells

    def close(self) -> None:
        """Release the file."""
        if self._openpyxl is not None:
            self._openpyxl.close()


def _whole(value: object) -> object:
    """Give a cell value as openpyxl gives it: a whole float as an int (calamine reads every
    number as a float; openpyxl gives 1 for a cell holding 1), a date as midnight of that day."""
    if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
        return int(value)
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return dt.datetime(value.year, value.month, value.day)  # as openpyxl gives a date cell
    return value


def _xlsx_rows(path: Path, raw: bytes, sheet: str | int | None, *, engine: str = "auto"
               ) -> tuple[list[list[str]], list[int], str, tuple[str, ...]]:  # fmt: skip
    book = _Workbook(path, raw, engine=engine)
    try:
        names = book.names
        listed = ", ".join(repr(s) for s in names)
        if sheet is None:
            filled = [n for n in names if next(book.rows(n), None) is not None]
            if len(filled) > 1:
                raise InputError(
                    f"{path}: the workbook has {len(filled)} sheets with data ("
                    + ", ".join(repr(s) for s in filled)
                    + "); name one with --sheet or sheet = ... in the sidecar (a name, or its "
                    "position from 1)"
                )
            chosen = filled[0] if filled else names[0]
        elif isinstance(sheet, int) or (str(sheet).isdigit() and str(sheet) not in names):
            position = int(sheet)
            if not 1 <= position <= len(names):
                raise InputError(
                    f"{path}: no sheet {position}; the workbook has {len(names)} ({listed})"
                )
            chosen = names[position - 1]
        elif sheet in names:
            chosen = str(sheet)
        else:
            raise InputError(f"{path}: no sheet named '{sheet}'; the workbook has {listed}")
        rows: list[list[str]] = []
        lines: list[int] = []
        for number, cells in book.rows(chosen):
            rows.append(cells)
            lines.append(number)
    finally:
        book.close()
    return rows, lines, chosen, names


def workbook_sheets(path: Path) -> list[tuple[str, int]]:
    """Give each sheet of a workbook with its number of rows that hold a cell."""
    book = _Workbook(path, path.read_bytes())
    try:
        return [(name, sum(1 for _ in book.rows(name))) for name in book.names]
    finally:
        book.close()


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
    if body and len([c for c in body[0] if c.strip()]) > width and width == 1:
        raise InputError(
            f"{path}, {row_word} {lines[1]}: {len(body[0])} cells, but the header ({row_word} "
            f"{lines[0]}: '{header[0][:40]}') has 1 column; if that is a title above the header, "
            f"pass --header-row {lines[1]} (header_row = {lines[1]} in the sidecar)"
        )
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
        header_line=int(lines[0]),
    )
