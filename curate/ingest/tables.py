"""Reading CSV, TSV and XLSX files into cells of text, with exact line numbers for errors.

Every cell is read as text first; numbers are converted column-wise with numpy/pandas, so a
bad cell is found without a Python loop over points and reported by its line and column.
"""

from __future__ import annotations

import csv
import dataclasses
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from curate.errors import InputError, where
from curate.ingest.clock import times_in_unit
from curate.ingest.dialect import (
    AmbiguousNumbers,
    Dialect,
    decode,
    detect_delimiter,
    detect_number_format,
    numbers_as_written,
)
from curate.ingest.workbook import arrange_header, read_sheet, workbook_sheets

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
# read when named (add, inspect, a sidecar's data_file) but not taken from a folder by intake,
# where .txt files are as often notes as data; the delimiter is detected (tab if in doubt)
NAMED_SUFFIXES = {**DATA_SUFFIXES, ".txt": "\t"}
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
    notes: tuple[str, ...] = ()  # what was made of the layout (title rows, merged headers, footer)
    after_blank: int | None = None  # the first data row below a blank line (row), if any

    def __len__(self) -> int:
        return len(self.lines)

    def locate(self, index: int, column: str) -> str:
        """Give the location prefix for data row ``index`` and ``column``."""
        if self.row_word == "line":
            return where(self.path, line=int(self.lines[index]), column=column)
        return f"{self.path}, row {int(self.lines[index])}, column '{column}': "

    def footer_hint(self, index: int) -> str:
        """Give the hint for a bad row near the end or below a blank one: notes below the data."""
        return footer_hint(len(self), index, self.after_blank, self.row_word,
                           int(self.lines[index]))  # fmt: skip

    def header_hint(self, wanted: str) -> str:
        """Give the hint when a column is missing but a row below the header holds its name:
        the header is lower than the first row (a title above it)."""
        from curate.ingest.headers import match_column

        for index in range(min(len(self), 10)):
            texts = tuple(str(self.cells[c][index]).strip() for c in self.columns)
            if match_column(wanted, texts) is not None:
                line = int(self.lines[index])
                return (f"; {self.row_word} {line} holds '{wanted}': if the rows above it are "
                        f"a title, pass --header-row {line} (header_row = {line} in the sidecar)")  # fmt: skip
        return ""

    def times(self, column: str, unit: str) -> tuple[np.ndarray, str | None]:
        """Give the time column in ``unit``: numbers as they are, or clock times and durations
        (cells of a workbook, text such as ``0:15:00``) converted; and a note of what was
        converted, for the dataset's provenance (None for plain numbers)."""
        text = pd.Series(self.cells[column], dtype=object).str.strip()
        converted = times_in_unit(text.to_numpy(dtype=object), unit,
                                  lambda k: self.locate(k, column))  # fmt: skip
        if converted is None:
            return self.numbers(column, what="a time"), None
        return converted

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
            raise InputError(self.locate(index, column) + problem + self.footer_hint(index))
        values[empty] = np.nan
        return np.asarray(values, dtype=np.float64)


def _check_file(path: Path, max_bytes: int) -> str:
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if not path.is_file():
        raise InputError(f"{path}: not a regular file")
    suffix = path.suffix.lower()
    if suffix not in NAMED_SUFFIXES:
        raise InputError(
            f"{path}: unsupported file type '{path.suffix}'; expected "
            + ", ".join(sorted(NAMED_SUFFIXES))
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
    footer_rows: int = 0  # lines (rows) below the data to leave out: notes, export stamps
    end_at_blank: bool = False  # the table ends at its first blank line (row)
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
    if suffix not in NAMED_SUFFIXES:
        raise InputError(
            f"{path}: unsupported file type '{path.suffix}'; expected "
            + ", ".join(sorted(NAMED_SUFFIXES))
        )
    if suffix == ".xlsx":
        if not raw.startswith(_ZIP_MAGIC):
            raise InputError(
                f"{path}: not an XLSX workbook (the file does not start like one); "
                "save it from the spreadsheet program as .xlsx, or rename a text "
                "file to .csv"
            )
        if layout.delimiter or layout.decimal or layout.thousands or layout.encoding:
            raise InputError(
                f"{path}: a dialect (delimiter, decimal, thousands, encoding) applies to text "
                "files only; a workbook's cells hold numbers, not text: leave [dialect] out "
                "of the sidecar"
            )
        book = read_sheet(path, raw, layout.sheet)
        rows, lines = _from_header(path, book.rows, book.lines, layout, "row")
        placed = layout.header_row is not None or layout.skip_rows > 0
        sheet_of = dataclasses.replace(book, rows=rows, lines=lines)
        rows, lines, notes = arrange_header(path, sheet_of, placed=placed)
        rows, lines, more, after_blank = _to_footer(path, rows, lines, lines, layout, "row")
        table = _to_table(path, rows, lines, "row", require_rows=require_rows,
                          after_blank=after_blank)  # fmt: skip
        return dataclasses.replace(table, sheet=book.name, sheets=book.names,
                                   notes=tuple(notes + more))  # fmt: skip
    if layout.sheet is not None:
        raise InputError(f"{path}: a sheet applies to .xlsx files only")
    default = NAMED_SUFFIXES[suffix] or ","
    if strict_text:
        rows, lines, _ = _text_rows(path, raw, default)
        return _to_table(path, rows, lines, "line", require_rows=require_rows)
    dialect, text = _dialect(path, raw, default, layout)
    rows, lines, starts = _rows_of_text(path, text, dialect.delimiter)
    rows, lines = _from_header(path, rows, lines, layout, "line")
    starts = starts[len(starts) - len(lines) :]
    rows, lines, notes, after_blank = _to_footer(path, rows, lines, starts, layout, "line")
    table = _to_table(path, rows, lines, "line", require_rows=require_rows,
                      after_blank=after_blank)  # fmt: skip
    table = dataclasses.replace(table, notes=tuple(notes))
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
    wide = (layout.encoding or "").lower().replace("_", "-").startswith(("utf-16", "utf-32"))
    if (
        b"\x00" in raw[:65536] and not raw.startswith((b"\xff\xfe", b"\xfe\xff")) and not wide
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
    decimal = layout.decimal or ("," if layout.thousands == "." else ".")  # '1.234,5'
    dialect = Dialect(encoding=encoding, delimiter=delimiter, decimal=decimal,
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


def _text_rows(path: Path, raw: bytes, delimiter: str
               ) -> tuple[list[list[str]], list[int], list[int]]:  # fmt: skip
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


def _rows_of_text(path: Path, text: str, delimiter: str
                  ) -> tuple[list[list[str]], list[int], list[int]]:  # fmt: skip
    """Give the rows that hold a cell, the line each ends on and the line each starts on
    (quoted fields may span lines; RFC 4180 section 2)."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    rows: list[list[str]] = []
    lines: list[int] = []
    starts: list[int] = []
    previous = 0
    try:
        for row in reader:
            start, previous = previous + 1, reader.line_num
            if not row or all(not cell.strip() for cell in row):
                continue
            rows.append(row)
            lines.append(reader.line_num)
            starts.append(start)
    except csv.Error as err:
        raise InputError(where(path, line=reader.line_num) + f"unreadable row ({err})") from None
    return rows, lines, starts


def footer_hint(count: int, index: int, after_blank: int | None, row_word: str, line: int) -> str:
    """Give the hint for a bad data row ``index`` of ``count`` that may be a note below the data."""
    if after_blank is not None and index >= after_blank:
        return (f"; if the {row_word}s below the blank one are notes, pass --end-at-blank "
                "(end_at_blank = true in the sidecar)")  # fmt: skip
    if index >= count - 3:
        rest = count - index
        return (f"; if {row_word} {line} and below are notes under the data, pass "
                f"--footer-rows {rest} (footer_rows = {rest} in the sidecar)")  # fmt: skip
    return ""


def _to_footer(path: Path, rows: list[list[str]], lines: list[int], starts: list[int],
               layout: Layout, row_word: str
               ) -> tuple[list[list[str]], list[int], list[str], int | None]:  # fmt: skip
    """Give the rows without the footer the layout names, what was left out, and the first
    data row below a blank line (None if none is)."""
    notes: list[str] = []
    if layout.footer_rows < 0:
        raise InputError(f"{path}: footer_rows counts from 0")
    blank = next((k for k in range(2, len(rows)) if starts[k] > lines[k - 1] + 1), None)
    if layout.end_at_blank and blank is not None:
        notes.append(f"the table ends at the blank {row_word} above {row_word} {lines[blank]}; "
                     f"{len(rows) - blank} {row_word}(s) below it were left out")  # fmt: skip
        rows, lines, blank = rows[:blank], lines[:blank], None
    if layout.footer_rows:
        if layout.footer_rows >= len(rows) - 1:
            raise InputError(
                f"{path}: footer_rows = {layout.footer_rows} leaves no data rows (the table has "
                f"{len(rows) - 1})"
            )
        notes.append(f"the last {layout.footer_rows} {row_word}(s), from {row_word} "
                     f"{lines[-layout.footer_rows]}, are a footer and were left out")  # fmt: skip
        rows, lines = rows[: -layout.footer_rows], lines[: -layout.footer_rows]
        if blank is not None and blank >= len(rows):
            blank = None
    return rows, lines, notes, (blank - 1 if blank is not None else None)


def _likely_header(rows: list[list[str]], lines: list[int]) -> int:
    """Give the line of the first row of names (no numbers) above a row as wide holding a
    number: where the header likely is below title rows (for the hint only)."""
    for k in range(1, min(len(rows) - 1, 12)):
        names = [c.strip() for c in rows[k]]
        below = [c.strip() for c in rows[k + 1]]
        wide = len([c for c in below if c]) == len(names) and any(_numeric(c) for c in below)
        if all(names) and len(names) > 1 and wide and not any(_numeric(c) for c in names):
            return lines[k]
    return lines[1]


def _numeric(text: str) -> bool:
    try:
        float(text.replace(",", "."))
    except ValueError:
        return False
    return True


def _to_table(
    path: Path, rows: list[list[str]], lines: list[int], row_word: str, *, require_rows: bool,
    after_blank: int | None = None,
) -> Table:  # fmt: skip
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
        line = _likely_header(rows, lines)
        raise InputError(
            f"{path}, {row_word} {lines[1]}: {len(body[0])} cells, but the header ({row_word} "
            f"{lines[0]}: '{header[0][:40]}') has 1 column; if that is a title above the header, "
            f"pass --header-row {line} (header_row = {line} in the sidecar)"
        )
    for index, (row, line) in enumerate(zip(body, lines[1:], strict=True)):
        if (len(row) > width and any(cell.strip() for cell in row[width:])) or (
            len(row) < width and row_word == "line"
        ):
            raise InputError(
                f"{path}, {row_word} {line}: {len(row)} cells, but the header has {width} columns"
                + footer_hint(len(body), index, after_blank, row_word, line)
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
        after_blank=after_blank,
    )
