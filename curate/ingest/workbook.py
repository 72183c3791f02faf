"""Reading an XLSX workbook into rows of text cells, as the spreadsheet program shows them.

python-calamine (Rust) reads the cells where it can: several times faster than openpyxl, cached
values of formulas; openpyxl, pandas' own engine for the format, reads what calamine refuses.
Either gives the same text cells (a whole number is written without '.0'; both round date and
time cells to the millisecond). What neither reader gives alike, merged cells and formulas
without a stored value, is read from the sheet's own XML (ECMA-376 Part 1, 18.3.1.55
``mergeCell`` and 18.3.1.40 ``f``/``v`` of a cell ``c``), so both paths see the same.

Cells of dates and times become text in ISO 8601 forms that `clock.py` reads back: a date
with a time ``2026-05-04T10:15:00``, a time of day ``T10:15:00``, a duration ``h:mm:ss``.
"""

from __future__ import annotations

import datetime as dt
import io
import re
import zipfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any
from xml.etree import ElementTree

from curate.errors import InputError
from curate.ingest.headers import header_unit

__all__ = [
    "Sheet",
    "SheetExtras",
    "Workbook",
    "arrange_header",
    "cell_text",
    "column_letters",
    "read_sheet",
    "workbook_sheets",
]

_UNREADABLE = (
    "not a readable XLSX workbook (damaged, or another format with an .xlsx name); save it "
    "again as .xlsx, or as .csv"
)
_MAIN = "{http://schemas.openxmlformats.org/spreadsheetml/2006/main}"
_RELS = "{http://schemas.openxmlformats.org/package/2006/relationships}"
_DOC_RELS = "{http://schemas.openxmlformats.org/officeDocument/2006/relationships}"
_FORMULA = re.compile(rb"<(?:\w+:)?f[\s>/]")
_MERGE = re.compile(rb"<(?:\w+:)?mergeCell\s[^>]*ref=\"([A-Z]+)(\d+)(?::([A-Z]+)(\d+))?\"")
_REFERENCE = re.compile(r"^([A-Z]+)(\d+)$")


def column_letters(position: int) -> str:
    """Give a column's letters from its position counted from 1 (28 -> 'AB')."""
    letters = ""
    while position:
        position, rest = divmod(position - 1, 26)
        letters = chr(ord("A") + rest) + letters
    return letters


def _column_number(letters: str) -> int:
    number = 0
    for letter in letters:
        number = number * 26 + ord(letter) - ord("A") + 1
    return number


def cell_text(value: object) -> str:
    """Give a cell value as text: numbers as Python writes them, dates and times in ISO 8601
    (a time of day with its 'T' designator, so that it is not taken for a duration)."""
    kind = type(value)
    if kind is str:
        return value  # type: ignore[return-value]
    if kind is float:  # the commonest cell: a number (calamine gives every number as a float)
        number: float = value  # type: ignore[assignment]
        if number.is_integer() and abs(number) < 2**53:
            return str(int(number))
        return repr(number)
    value = _whole(value)
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, dt.datetime):
        return value.isoformat()
    if isinstance(value, dt.time):
        return "T" + value.isoformat()
    if isinstance(value, dt.timedelta):
        micro = round(value.total_seconds() * 1_000_000)
        sign, micro = ("-" if micro < 0 else ""), abs(micro)
        seconds, fraction = divmod(micro, 1_000_000)
        hours, rest = divmod(seconds, 3600)
        text = f"{sign}{hours}:{rest // 60:02d}:{rest % 60:02d}"
        return text + (f".{fraction:06d}".rstrip("0") if fraction else "")
    return str(value)


def _whole(value: object) -> object:
    """Give a cell value as openpyxl gives it: a whole float as an int (calamine reads every
    number as a float; openpyxl gives 1 for a cell holding 1), a date as midnight of that day."""
    if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
        return int(value)
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return dt.datetime(value.year, value.month, value.day)  # as openpyxl gives a date cell
    return value


@dataclass(frozen=True)
class SheetExtras:
    """What a sheet's XML says beyond its cell values: merged ranges (first row, first
    column, last row, last column, all from 1) and cells whose formula has no stored value."""

    merges: tuple[tuple[int, int, int, int], ...] = ()
    uncomputed: tuple[tuple[int, str], ...] = ()  # (row, cell reference such as 'D6')


class Workbook:
    """A workbook's sheet names and each sheet's rows as (row number, text cells)."""

    def __init__(self, path: Path, raw: bytes, *, engine: str = "auto") -> None:
        self.path = path
        self.raw = raw
        self._calamine: Any = None
        self._openpyxl: Any = None
        self._loaded: dict[str, list[Any]] = {}
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
            if name not in self._loaded:  # read once: choosing a sheet looks at each
                sheet = self._calamine.get_sheet_by_name(name)
                self._loaded[name] = sheet.to_python(skip_empty_area=False)
            # without skipping the empty area, calamine gives the rows from A1 (whatever its
            # 'start', the first cell holding a value): row k of the list is sheet row k + 1
            values_by_row: Iterable[tuple[int, Any]] = enumerate(self._loaded[name], start=1)
        else:
            values_by_row = enumerate(self._openpyxl[name].iter_rows(values_only=True), start=1)
        for number, values in values_by_row:
            cells = [cell_text(v) for v in values]
            while cells and cells[-1] == "":
                cells.pop()
            if cells:
                yield number, cells

    def extras(self, name: str) -> SheetExtras:
        """Give the merged ranges and uncomputed formulas of a sheet, from its XML."""
        try:
            with zipfile.ZipFile(io.BytesIO(self.raw)) as archive:
                part = self._sheet_part(archive, name)
                if part is None:
                    return SheetExtras()
                xml = archive.read(part)
        except (zipfile.BadZipFile, KeyError, OSError, ElementTree.ParseError):
            return SheetExtras()  # the cell reader read it: what we cannot see is not there
        merges = tuple(sorted(
            (int(m[2]), _column_number(m[1].decode()), int(m[4] or m[2]),
             _column_number((m[3] or m[1]).decode()))
            for m in _MERGE.finditer(xml)
        ))  # fmt: skip
        uncomputed: list[tuple[int, str]] = []
        if _FORMULA.search(xml):
            for _, element in ElementTree.iterparse(io.BytesIO(xml)):
                if element.tag != f"{_MAIN}c":
                    continue
                formula = element.find(f"{_MAIN}f")
                stored = element.find(f"{_MAIN}v")
                inline = element.find(f"{_MAIN}is")
                if formula is not None and inline is None and (stored is None or not stored.text):
                    reference = element.get("r", "")
                    found = _REFERENCE.match(reference)
                    if found:
                        uncomputed.append((int(found[2]), reference))
                element.clear()
        return SheetExtras(merges=merges, uncomputed=tuple(uncomputed))

    def _sheet_part(self, archive: zipfile.ZipFile, name: str) -> str | None:
        """Give the archive member of a sheet named ``name`` (workbook.xml and its rels)."""
        book = ElementTree.fromstring(archive.read("xl/workbook.xml"))
        rels = ElementTree.fromstring(archive.read("xl/_rels/workbook.xml.rels"))
        targets = {r.get("Id"): r.get("Target", "") for r in rels.iter(f"{_RELS}Relationship")}
        for sheet in book.iter(f"{_MAIN}sheet"):
            if sheet.get("name") == name:
                target = targets.get(sheet.get(f"{_DOC_RELS}id"), "")
                if target.startswith("/"):
                    return target.lstrip("/")
                return str(PurePosixPath("xl") / target)
        return None

    def close(self) -> None:
        """Release the file."""
        if self._openpyxl is not None:
            self._openpyxl.close()


@dataclass(frozen=True)
class Sheet:
    """One sheet's rows that hold a cell (text cells, sheet row numbers), and what its XML adds."""

    rows: list[list[str]]
    lines: list[int]
    name: str
    names: tuple[str, ...]  # every sheet of the workbook
    extras: SheetExtras


def read_sheet(path: Path, raw: bytes, sheet: str | int | None, *, engine: str = "auto") -> Sheet:
    """Give the rows of the sheet named (a name, or a position from 1), or of the only one
    with data; InputError when several have data and none is named."""
    book = Workbook(path, raw, engine=engine)
    try:
        names = book.names
        listed = ", ".join(repr(s) for s in names)
        if sheet is None:
            filled = [n for n in names if len(names) == 1 or next(book.rows(n), None) is not None]
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
        extras = book.extras(chosen)
    finally:
        book.close()
    return Sheet(rows=rows, lines=lines, name=chosen, names=names, extras=extras)


def workbook_sheets(path: Path) -> list[tuple[str, int]]:
    """Give each sheet of a workbook with its number of rows that hold a cell."""
    book = Workbook(path, path.read_bytes())
    try:
        return [(name, sum(1 for _ in book.rows(name))) for name in book.names]
    finally:
        book.close()


def arrange_header(path: Path, sheet: Sheet, *, placed: bool
                   ) -> tuple[list[list[str]], list[int], list[str]]:  # fmt: skip
    """Give a sheet's rows with its merged cells read as the sheet shows them, and what was done.

    - a formula without a stored value in a row that is read is refused (InputError naming
      the cell and the fix);
    - unless the header's place is given (``placed``), rows at the top whose only cell is a
      merged one over several columns are titles and are left out;
    - a merged cell gives its text to every cell it covers (a header over three replicate
      columns names each of them; a label merged down a column labels each row);
    - a header row with a cell merged over several columns, above a row of text under that
      cell, is a header of two rows: each column is named by both, the upper's unit kept at
      the end (``pERK [nM]`` over ``rep 1`` gives ``pERK rep 1 [nM]``).
    """
    rows = [list(r) for r in sheet.rows]
    lines = list(sheet.lines)
    notes: list[str] = []
    merges = sheet.extras.merges
    if not placed:
        while len(rows) > 1:
            filled = [k for k, c in enumerate(rows[0]) if c.strip()]
            title = len(filled) == 1 and any(
                r1 == lines[0] and c1 == filled[0] + 1 and c2 > c1 for r1, c1, _, c2 in merges
            )
            if not title:
                break
            notes.append(f"row {lines[0]} is a title (a merged cell) and was left out")
            rows, lines = rows[1:], lines[1:]
    if rows:
        for row, reference in sheet.extras.uncomputed:
            if row >= lines[0]:
                raise InputError(
                    f"{path}, sheet '{sheet.name}', cell {reference}: a formula with no stored "
                    "value (the file was written by a program that does not compute formulas); "
                    "open it in a spreadsheet program and save it, or export the sheet as CSV"
                )
    index = {line: k for k, line in enumerate(lines)}
    for r1, c1, r2, c2 in merges:
        if r1 not in index or (r1 == r2 and c1 == c2):
            continue
        top = rows[index[r1]]
        text = top[c1 - 1] if c1 - 1 < len(top) else ""
        for line in range(r1, r2 + 1):
            if line not in index:
                continue  # an empty row under a merged cell stays out of the table
            cells = rows[index[line]]
            cells.extend([""] * (c2 - len(cells)))
            for column in range(c1, c2 + 1):
                if not cells[column - 1].strip():
                    cells[column - 1] = text
    if len(rows) > 1:
        spans = [(c1, c2, r2) for r1, c1, r2, c2 in merges if r1 == lines[0] and c2 > c1]
        below = rows[1] + [""] * len(rows[0])
        vertical = {c - 1 for r1, c1, r2, c2 in merges if r1 == lines[0] and r2 > r1
                    for c in range(c1, c2 + 1)}  # fmt: skip
        if spans and lines[1] == lines[0] + 1 and all(
            below[c - 1].strip() and not _number_like(below[c - 1])
            for c1, c2, _ in spans for c in range(c1, c2 + 1)
        ):  # fmt: skip
            header = []
            for k, upper in enumerate(rows[0]):
                lower = "" if k in vertical else below[k].strip()
                header.append(_joined(upper.strip(), lower))
            notes.append(
                f"rows {lines[0]}-{lines[1]} are one header (a merged cell over several "
                "columns above a row of sub-headers); each column is named by both"
            )
            rows, lines = [header, *rows[2:]], [lines[0], *lines[2:]]
        elif spans:
            header = list(rows[0])
            for c1, c2, _ in spans:
                for k, column in enumerate(range(c1, c2 + 1), start=1):
                    header[column - 1] = _joined(header[column - 1].strip(), str(k))
            notes.append(
                f"row {lines[0]}: a merged header cell over several columns names each of them, "
                "numbered from 1"
            )
            rows = [header, *rows[1:]]
    filled = [next((k for k, c in enumerate(r) if c.strip()), len(r)) for r in rows]
    if rows and (lead := min(filled)) > 0:  # a table that starts right of column A
        rows = [r[lead:] for r in rows]
        notes.append(f"the table starts in column {column_letters(lead + 1)}")
    return rows, lines, notes


def _number_like(text: str) -> bool:
    try:
        float(text.replace(",", "."))
    except ValueError:
        return False
    return True


def _joined(upper: str, lower: str) -> str:
    """Give a two-row header's name: the upper's name, the lower's, the upper's unit last."""
    if not lower or lower == upper:
        return upper
    if not upper:
        return lower
    name, unit = header_unit(upper)
    if unit is None:
        return f"{upper} {lower}"
    return f"{name} {lower} {upper[len(name) :].strip()}"
