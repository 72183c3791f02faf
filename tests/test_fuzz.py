"""Fuzzing intake with hypothesis: every malformed input ends in one clean line or a valid dataset.

Three generators, 700 cases each in CI (2,100 in all): delimited text (CSV/TSV, including
binary junk, unicode, huge numbers, ragged rows), XLSX workbooks, and TOML sidecars. After
every error the catalog is exactly as before. Three more, 400 cases each (1,200): generated
dialects (delimiter, decimal mark, thousands separator, encoding, byte order mark, title rows,
line ends), workbooks (sheets, title rows merged or not, numbers, durations, clock times), and
layouts (titles, footers, blank lines, header rows, encodings); what was written is read back.
"""

from __future__ import annotations

import datetime as dt
import io
import sqlite3
import string
import tempfile
from dataclasses import astuple
from pathlib import Path

import numpy as np
import openpyxl
from conftest import run_main
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st

from curate.errors import InputError
from curate.ingest.tables import Layout, read_table
from curate.ingest.workbook import read_sheet

EXAMPLES = 700
OPTIONS = ["--observable", "fuzz", "--unit", "nM", "--time-unit", "s", "--lab", "Fuzz Lab"]
SETTINGS = settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                                  HealthCheck.too_slow])  # fmt: skip

numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-(10**30), 10**30).map(str),
    st.sampled_from(
        ["1e400", "-1e400", "nan", "inf", "1,5", "0x1F", "1e-400", "", " ", "NaN", "--1", "1.2.3"]
    ),
)
cells = st.one_of(
    numbers, st.text(max_size=12), st.text(alphabet="éß漢字💥\u200b\t\"'", max_size=6)
)
headers = st.lists(st.sampled_from(["time", "value", "sd", "replicate", "n", "TIME", "Value", "r1", "r2", "", "x", "time"]),
                   min_size=1, max_size=5)  # fmt: skip


def snapshot(catalog: Path) -> list[str]:
    if not catalog.exists():
        return []
    conn = sqlite3.connect(catalog)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()


def check(capsys, folder: Path, data: Path, extra: list[str] | None = None) -> None:
    catalog = folder / "fuzz.db"
    before = snapshot(catalog)
    code, out, err = astuple(
        run_main(capsys, ["--catalog", str(catalog), "add", str(data), *OPTIONS, *(extra or [])])
    )
    assert "Traceback" not in err
    assert code in (0, 2), (code, err)  # 3 would be an internal error: a defect of ours
    if code == 2:
        assert len(err.strip().splitlines()) == 1, err
        assert err.startswith("curate: error: ")
        assert snapshot(catalog) == before  # nothing half-written
    else:
        assert out.strip()  # the new (or existing) dataset id


@SETTINGS
@given(header=headers, rows=st.lists(st.lists(cells, max_size=6), max_size=8), delimiter=st.sampled_from([",", "\t"]),
       junk=st.one_of(st.none(), st.binary(max_size=64)), suffix=st.sampled_from([".csv", ".tsv"]))  # fmt: skip
def test_fuzz_delimited_text(capsys, header, rows, delimiter, junk, suffix):
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        data = folder / f"data{suffix}"
        if junk is not None:
            data.write_bytes(junk)
        else:
            lines = [delimiter.join(header)] + [delimiter.join(row) for row in rows]
            data.write_text("\n".join(lines) + "\n", encoding="utf-8")
        check(capsys, folder, data)


xlsx_cells = st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True), st.integers(-(10**20), 10**20),
                       st.text(alphabet=string.ascii_letters + string.digits + string.punctuation + " é漢", max_size=10),
                       st.booleans())  # fmt: skip


@SETTINGS
@given(header=headers, rows=st.lists(st.lists(xlsx_cells, max_size=6), max_size=6), corrupt=st.booleans(),
       sheet=st.sampled_from([None, "Sheet", "missing"]))  # fmt: skip
def test_fuzz_xlsx(capsys, header, rows, corrupt, sheet):
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        data = folder / "book.xlsx"
        book = openpyxl.Workbook()
        worksheet = book.active
        worksheet.append(header)
        for row in rows:
            worksheet.append([c if not (isinstance(c, float) and c != c) else None for c in row])
        buffer = io.BytesIO()
        book.save(buffer)
        content = buffer.getvalue()
        data.write_bytes(content[: len(content) // 2] if corrupt else content)
        check(capsys, folder, data, ["--sheet", sheet] if sheet else None)


toml_values = st.one_of(st.integers(-5, 5).map(str), st.floats(allow_nan=False, allow_infinity=False).map(repr),
                        st.text(alphabet=string.ascii_letters + " .'é", max_size=8).map(lambda t: '"' + t + '"'),
                        st.sampled_from(['"nM"', '"um/min"', '"a.u."', '"wibble"', '"min"', '"25 degC"', "true",
                                         "[1, 2]", "{ value = 3, unit = \"uM\" }", '"2026-13-45"', "2026-05-04"]))  # fmt: skip
keys = st.sampled_from(["observable.id", "observable.unit", "observable.label", "time.unit", "source.lab", "source.acquired",
                        "uncertainty.type", "uncertainty.level", "uncertainty.n", "conditions.temperature", "conditions.2bad",
                        "layout", "sheet", "id", "data_file", "colour", "trust.grade", "trust.rationale",
                        "protocol.calibration_group", "columns.value"])  # fmt: skip


@SETTINGS
@given(entries=st.lists(st.tuples(keys, toml_values), max_size=8), broken=st.booleans())
def test_fuzz_sidecars(capsys, entries, broken):
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        data = folder / "series.csv"
        data.write_text("time,value,sd\n0,1,0.1\n1,2,0.1\n2,2.5,0.2\n", encoding="utf-8")
        seen: set[str] = set()
        lines = []
        for key, value in entries:
            if key not in seen and not any(
                key.startswith(k + ".") or k.startswith(key + ".") for k in seen
            ):
                seen.add(key)
                lines.append(f"{key} = {value}")
        text = "\n".join(lines) + ("\n[[[ broken" if broken else "") + "\n"
        (folder / "series.toml").write_text(text, encoding="utf-8")
        check(capsys, folder, data)


# -- dialects, layouts and workbooks: what was written is what is read back ----------------------
# Read at the table level (no catalog), so that 1,200 cases take seconds; the property: the
# numbers read equal those written (1e-12 relative) and the header is the one written, or the
# reader refuses in one InputError line; never another exception, never other numbers.


ROUND_TRIPS = 400
ROUND_TRIP = settings(max_examples=ROUND_TRIPS, deadline=None,
                      suppress_health_check=[HealthCheck.too_slow])  # fmt: skip
finite = st.floats(min_value=-1e9, max_value=1e9, allow_nan=False, allow_infinity=False)
ENCODINGS = ["utf-8", "utf-8-sig", "cp1252", "latin-1", "utf-16", "utf-16-le"]


def _written(value: float, decimal: str, thousands: str) -> str:
    """Give a number as a lab's spreadsheet writes it in that dialect."""
    text = repr(value)
    if "e" in text or "inf" in text or "nan" in text:
        return text.replace(".", decimal)
    sign, digits = ("-", text[1:]) if text.startswith("-") else ("", text)
    whole, _, fraction = digits.partition(".")
    if thousands:
        groups = []
        while len(whole) > 3:
            whole, groups = whole[:-3], [whole[-3:], *groups]
        whole = thousands.join([whole, *groups])
    return sign + whole + (decimal + fraction if fraction and fraction != "0" else "")


def _one_line(err: InputError) -> None:
    assert "\n" not in str(err) and str(err).strip()


@ROUND_TRIP
@given(values=st.lists(finite, min_size=1, max_size=12), delimiter=st.sampled_from([",", ";", "\t", "|"]),
       decimal=st.sampled_from([".", ","]), thousands=st.sampled_from(["", ".", ",", " ", "'"]),
       encoding=st.sampled_from(ENCODINGS), titles=st.integers(0, 2), stated=st.booleans(),
       crlf=st.booleans(), suffix=st.sampled_from([".csv", ".txt", ".tsv"]))  # fmt: skip
def test_fuzz_dialects_read_back_what_was_written(values, delimiter, decimal, thousands, encoding,
                                                  titles, stated, crlf, suffix):  # fmt: skip
    assume(len({delimiter, decimal, thousands} - {""}) == 2 + bool(thousands))  # one mark, one use
    header = ["time", "Wert µ°"]
    quote = lambda cell: f'"{cell}"' if delimiter in cell else cell  # RFC 4180 section 2  # noqa: E731
    lines = [f"Run {k} of the plate" for k in range(titles)] + [delimiter.join(header)]
    lines += [delimiter.join([str(i), quote(_written(v, decimal, thousands))]) for i, v in enumerate(values)]
    text = ("\r\n" if crlf else "\n").join(lines) + "\n"
    with tempfile.TemporaryDirectory() as name:
        path = Path(name) / f"lab{suffix}"
        path.write_bytes(text.encode(encoding))
        dialect = {"delimiter": delimiter, "decimal": decimal, "thousands": thousands,
                   "encoding": "utf-16-le" if encoding == "utf-16-le" else None} if stated else {}  # fmt: skip
        layout = Layout(header_row=titles + 1 if titles else None, **dialect)
        try:
            table = read_table(path, layout=layout)
            read = table.numbers("Wert µ°")
        except InputError as err:
            _one_line(err)
            assert not stated, str(err)  # a dialect stated is read as stated
            event("refused (dialect detected)")
            return
        event("read back" + (" (dialect stated)" if stated else " (dialect detected)"))
        assert table.columns == tuple(header)
        assert np.allclose(read, values, rtol=1e-12, atol=0), (read, values, text)


sheet_names = st.text(alphabet=string.ascii_letters + string.digits + " _", min_size=1, max_size=12)
time_kinds = st.sampled_from(["number", "duration", "clock"])


@ROUND_TRIP
@given(values=st.lists(finite, min_size=1, max_size=10), others=st.lists(sheet_names, max_size=2, unique=True),
       position=st.integers(0, 2), titles=st.integers(0, 2), merged_title=st.booleans(),
       time_kind=time_kinds, steps=st.lists(st.integers(0, 10**7), min_size=10, max_size=10))  # fmt: skip
def test_fuzz_workbooks_read_back_what_was_written(values, others, position, titles, merged_title,
                                                   time_kind, steps):  # fmt: skip
    name = "series"
    assume(name not in others)
    book = openpyxl.Workbook()
    book.remove(book.active)
    names = list(others)
    names.insert(min(position, len(names)), name)
    start = dt.datetime(2026, 5, 4, 8, 0)
    milliseconds = np.cumsum(steps[: len(values)])  # times in ms, increasing
    for sheet_name in names:
        sheet = book.create_sheet(sheet_name)
        if sheet_name != name:
            sheet.append(["notes of another sheet", 1])
            continue
        for k in range(titles):
            sheet.append([f"Title {k}"])
            if merged_title:
                sheet.merge_cells(f"A{k + 1}:C{k + 1}")
        sheet.append(["time", "value", "note"])
        for ms, value in zip(milliseconds, values, strict=True):
            offset = dt.timedelta(milliseconds=int(ms))
            cell = {"number": float(ms), "duration": offset, "clock": start + offset}[time_kind]
            sheet.append([cell, value, "x"])
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "book.xlsx"
        book.save(path)
        raw = path.read_bytes()
        assert read_sheet(path, raw, name, engine="calamine") == read_sheet(path, raw, name, engine="openpyxl")
        placed = titles and not merged_title
        layout = Layout(sheet=name if others else None, header_row=titles + 1 if placed else None)
        table = read_table(path, layout=layout)
        assert table.columns == ("time", "value", "note") and table.sheet == name
        assert np.allclose(table.numbers("value"), values, rtol=1e-12, atol=0)
        times, _ = table.times("time", "s")
        expected = (milliseconds - (milliseconds[0] if time_kind == "clock" else 0)) / 1000.0
        if time_kind == "number":
            expected = milliseconds.astype(float)
        assert np.allclose(times, expected, rtol=1e-12, atol=1e-9)


@ROUND_TRIP
@given(rows=st.lists(st.lists(cells, min_size=1, max_size=4), max_size=6), titles=st.lists(st.text(max_size=20), max_size=2),
       footer=st.lists(st.text(max_size=30), max_size=2), blank=st.booleans(), footer_rows=st.integers(0, 3),
       end_at_blank=st.booleans(), header_row=st.one_of(st.none(), st.integers(1, 5)),
       encoding=st.sampled_from([None, "utf-8", "latin-1", "utf-16", "nonsense"]))  # fmt: skip
def test_fuzz_layouts_end_in_a_table_or_one_line(rows, titles, footer, blank, footer_rows, end_at_blank,
                                                 header_row, encoding):  # fmt: skip
    lines = [*titles, "time;value", *(";".join(r) for r in rows), *([""] if blank else []), *footer]
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "lab.csv"
        path.write_bytes(("\n".join(lines) + "\n").encode("utf-8", "surrogatepass"))
        layout = Layout(header_row=header_row, footer_rows=footer_rows, end_at_blank=end_at_blank,
                        encoding=encoding)  # fmt: skip
        try:
            table = read_table(path, layout=layout)
            for column in table.columns:
                table.numbers(column, allow_empty=True)
            table.times(table.columns[0], "s")
        except InputError as err:
            _one_line(err)


# censored cells: comparisons (with and without spaces, unicode marks, nothing after them,
# doubled), the lab's tokens in any case, with or without a stated limit, in value, replicate
# and sd columns
limits = st.one_of(st.floats(-1e6, 1e6, allow_nan=False).map(repr), st.sampled_from(["", "abc", "1e999", "0"]))
censored_cells = st.one_of(
    numbers,
    st.tuples(st.sampled_from(["<", "<=", ">", ">=", "\u2264", "\u2265", "< ", "<<", "> ="]), limits).map("".join),
    st.sampled_from(["n.d.", "N.D.", "LOD", "lod", "BLQ", " BLQ ", "n.d", "<LOD"]),
)  # fmt: skip
CENSORED_EXAMPLES = 300


@settings(SETTINGS, max_examples=CENSORED_EXAMPLES)
@given(header=st.sampled_from([["time", "value"], ["time", "value", "sd"], ["time", "r1", "r2"]]),
       rows=st.lists(st.lists(censored_cells, min_size=1, max_size=3), min_size=1, max_size=6),
       tokens=st.lists(st.sampled_from(["n.d.", "LOD", "BLQ", ""]), max_size=2),
       limit=st.one_of(st.none(), st.floats(-10, 10, allow_nan=False)))  # fmt: skip
def test_fuzz_censored_cells(capsys, header, rows, tokens, limit):
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        data = folder / "data.csv"
        lines = [",".join(header)] + [",".join(["0", *row]) for row in rows]
        data.write_text("\n".join(lines) + "\n", encoding="utf-8")
        extra = [part for token in tokens for part in ("--censored-token", token)]
        if limit is not None:
            extra += ["--detection-limit", repr(limit)]
        check(capsys, folder, data, extra)


@settings(SETTINGS, max_examples=CENSORED_EXAMPLES)
@given(points=st.lists(st.tuples(st.sampled_from(["", "<", "<=", ">", ">=", "\u2264", "\u2265", "< ", "token"]),
                                 st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)),
                       min_size=1, max_size=12),
       limit=st.floats(0.001, 100.0))  # fmt: skip
def test_censored_cells_round_trip(capsys, points, limit):
    # every censored cell comes back as its kind and limit, every other cell as its number
    import numpy as np

    from curate import Catalog

    marks = {"": 0, "token": 1, "<": 1, "<=": 1, "\u2264": 1, "< ": 1, ">": 2, ">=": 2, "\u2265": 2}
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        data = folder / "data.csv"
        cells = ["BLQ" if mark == "token" else f"{mark}{value!r}" for mark, value in points]
        rows = [f"{t},{cell}" for t, cell in enumerate(cells)]
        data.write_text("time,value\n" + "\n".join(rows) + "\n", encoding="utf-8")
        catalog = folder / "fuzz.db"
        run = run_main(capsys, ["--catalog", str(catalog), "add", str(data), *OPTIONS,
                                "--censored-token", "BLQ", "--detection-limit", repr(limit)])  # fmt: skip
        assert run.code == 0, run.err
        opened = Catalog(catalog)
        arrays = opened.arrays(opened.list()[0].id)
        expected_codes = [marks[mark] for mark, _ in points]
        expected_values = [limit if mark == "token" else value for mark, value in points]
        codes = [0] * len(points) if arrays.censored is None else arrays.censored.tolist()
        assert codes == expected_codes
        assert np.array_equal(arrays.value, np.array(expected_values))
        assert opened.verify().ok
        opened.close()
