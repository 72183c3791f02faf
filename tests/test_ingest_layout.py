"""Lab files as they arrive: units in headers, column mapping, title rows, sheets, dialects.

Outside references: pandas.read_csv with the dialect stated by hand (sep, decimal, thousands,
encoding) reads the same numbers from each file; openpyxl writes the workbooks.
"""

from __future__ import annotations

import io
import json
import re

import numpy as np
import openpyxl
import pandas as pd
import pytest

from curate.errors import InputError
from curate.ingest.dialect import detect_number_format
from curate.ingest.headers import header_unit, match_column

LAB = {"source": {"lab": "Lab Quill"}, "observable": {"id": "perk"}}


def _points(catalog, result):
    return catalog.points(result.id)


@pytest.mark.parametrize(
    ("header", "expected"),
    [
        ("Time (min)", ("Time", "min")),
        ("pERK [nM]", ("pERK", "nM")),
        ("GFP [a.u.]", ("GFP", "a.u.")),
        ("Value (replicate 1)", ("Value (replicate 1)", None)),  # brackets, but not a unit
        ("time", ("time", None)),
        ("(min)", ("(min)", None)),
    ],
)
def test_header_units(header, expected):
    assert header_unit(header) == expected


def test_a_mapping_names_a_header_by_its_text_or_its_bare_name():
    headers = ("Time (min)", "pERK [nM]", "SD")
    assert match_column("time", headers) == "Time (min)"
    assert match_column("perk [nM]", headers) == "pERK [nM]"
    assert match_column("sd", headers) == "SD"
    assert match_column("value", headers) is None


def test_units_come_from_the_headers(catalog, tmp_path):
    path = tmp_path / "blot.csv"
    path.write_text("Time (min),pERK [nM],SD\n0,1.0,0.1\n5,2.0,0.1\n10,2.5,0.2\n")
    result = catalog.add(path, options={**LAB, "columns": {"value": "pERK"}})
    record = catalog.show(result.id).record
    assert record.observable.unit_original == "nM" and record.time_unit_original == "min"
    frame = _points(catalog, result)
    assert frame["time"].tolist() == [0.0, 300.0, 600.0]  # minutes in seconds
    np.testing.assert_allclose(frame["value"], [1.0, 2.0, 2.5])
    assert record.annotations["header_units"] == {"time": "min", "value": "nM"}


def test_a_unit_given_that_contradicts_the_header_is_refused(catalog, tmp_path):
    path = tmp_path / "blot.csv"
    path.write_text("Time (min),value\n0,1\n5,2\n10,3\n")
    options = {**LAB, "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "s"}}
    with pytest.raises(
        InputError,
        match=r"line 1, column 'Time \(min\)': the header states 'min', but the time unit given .* is 's'",
    ):
        catalog.add(path, options=options)
    same = {**options, "time": {"unit": "minute"}}  # the same unit, written otherwise
    assert catalog.add(path, options=same).added


def test_a_title_row_is_named_and_skipped_with_header_row(catalog, tmp_path):
    path = tmp_path / "titled.csv"
    path.write_text("Experiment 12 - pERK by blot\n\ntime,value\n0,1\n5,2\n10,3\n")
    options = {**LAB, "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "min"}}
    with pytest.raises(
        InputError,
        match=r"line 3: 2 cells, but the header \(line 1: 'Experiment 12 - pERK by blot'\) has 1 column; if that is a title above the header, pass --header-row 3",
    ):
        catalog.add(path, options=options)
    assert len(_points(catalog, catalog.add(path, options={**options, "header_row": 3}))) == 3
    again = catalog.add(path, options={**options, "skip_rows": 2})
    assert again.duplicate_of is not None  # the same data, found the other way


def test_header_row_on_an_empty_line_is_refused(catalog, tmp_path):
    path = tmp_path / "titled.csv"
    path.write_text("title\n\ntime,value\n0,1\n5,2\n")
    with pytest.raises(InputError, match="line 2: header_row names an empty line"):
        catalog.add(path, options={**LAB, "observable": {"id": "perk", "unit": "nM"},
                                   "time": {"unit": "min"}, "header_row": 2})  # fmt: skip


GERMAN = "Zeit (min);pERK [nM];SD [nM]\n0;1,25;0,1\n5;2,5;0,2\n10;1.003,75;0,3\n"


def test_semicolons_decimal_commas_and_thousands_read_as_pandas_reads_them(catalog, tmp_path):
    path = tmp_path / "export.csv"
    path.write_bytes(GERMAN.encode("cp1252"))
    result = catalog.add(path, options={**LAB, "columns": {"time": "Zeit", "value": "pERK",
                                                           "sd": "SD"}})  # fmt: skip
    # the reference: pandas told the dialect by hand
    reference = pd.read_csv(io.BytesIO(GERMAN.encode("cp1252")), sep=";", decimal=",",
                            thousands=".", encoding="cp1252")  # fmt: skip
    frame = _points(catalog, result)
    np.testing.assert_allclose(frame["value"], reference["pERK [nM]"], rtol=1e-15)
    np.testing.assert_allclose(frame["sd"], reference["SD [nM]"], rtol=1e-15)
    np.testing.assert_allclose(frame["time"], reference["Zeit (min)"] * 60, rtol=1e-15)
    dialect = catalog.show(result.id).record.annotations["file_dialect"]
    assert dialect["delimiter"] == ";" and dialect["decimal"] == "," and dialect["thousands"] == "."
    assert set(dialect["detected"]) == {"delimiter", "decimal", "thousands"}


def test_a_non_utf8_file_is_read_in_its_encoding_and_says_which(catalog, tmp_path):
    text = "time;Konzentration (µM)\n0;1,5\n1;2,5\n2;3,5\n"
    path = tmp_path / "latin.csv"
    path.write_bytes(text.encode("latin-1"))
    options = {**LAB, "columns": {"value": "Konzentration"}, "time": {"unit": "s"}}
    result = catalog.add(path, options=options)
    reference = pd.read_csv(path, sep=";", decimal=",", encoding="latin-1")
    # stored in the canonical nM
    np.testing.assert_allclose(
        _points(catalog, result)["value"], reference.iloc[:, 1] * 1000, rtol=1e-15
    )
    record = catalog.show(result.id).record
    assert record.observable.unit_original == "µM"
    assert "encoding" in record.annotations["file_dialect"]["detected"]


def test_utf16_with_a_byte_order_mark(catalog, tmp_path):
    path = tmp_path / "wide.csv"
    path.write_bytes("time\tvalue\n0\t1\n1\t2\n".encode("utf-16"))
    options = {**LAB, "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "s"}}
    result = catalog.add(path, options=options)
    assert _points(catalog, result)["value"].tolist() == [1.0, 2.0]
    dialect = catalog.show(result.id).record.annotations["file_dialect"]
    assert dialect["encoding"] == "utf-16" and dialect["delimiter"] == "\t"


def test_a_dialect_given_in_the_sidecar_wins(catalog, tmp_path):
    # "1,5" with a comma delimiter would be two cells: stated as semicolons it is one number
    path = tmp_path / "stated.csv"
    path.write_text("time;value\n0;1,5\n1;2,5\n")
    options = {**LAB, "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "s"},
               "dialect": {"delimiter": ";", "decimal": ","}}  # fmt: skip
    result = catalog.add(path, options=options)
    assert _points(catalog, result)["value"].tolist() == [1.5, 2.5]
    assert catalog.show(result.id).record.annotations["file_dialect"]["detected"] == []


def test_number_format_needs_every_grouped_cell_to_agree():
    assert detect_number_format(["1,5", "2,25", "10"], ";") == (",", "")
    assert detect_number_format(["1.234,5", "2,25"], ";") == (",", ".")
    assert detect_number_format(["1,234.5", "2.25"], ";") == (".", ",")
    with pytest.raises(
        InputError, match=r"written two ways \('2,25' with a decimal comma, '1.500' with a point"
    ):
        detect_number_format(["1.500", "2,25"], ";")  # 1500 or 1.5: the lab must say
    assert detect_number_format(["1,5"], ",") == (".", "")  # a comma delimiter: never


def _workbook(path, sheets):
    book = openpyxl.Workbook()
    book.remove(book.active)
    for name, rows in sheets.items():
        sheet = book.create_sheet(name)
        for row in rows:
            sheet.append(row)
    book.save(path)
    return path


SERIES = [["Time (h)", "GFP [a.u.]"], [0, 1.0], [1, 2.0], [2, 4.0]]


def test_a_workbook_of_several_filled_sheets_needs_one_named(catalog, tmp_path):
    path = _workbook(
        tmp_path / "plate.xlsx", {"notes": [["read on the plate reader"]], "series": SERIES}
    )
    options = {**LAB, "observable": {"id": "gfp"}}
    with pytest.raises(
        InputError, match=r"the workbook has 2 sheets with data \('notes', 'series'\); name one"
    ):
        catalog.add(path, options=options)
    by_name = catalog.add(path, options={**options, "sheet": "series"})
    by_position = catalog.add(path, options={**options, "sheet": 2})
    assert by_position.duplicate_of is not None
    record = catalog.show(by_name.id).record
    assert record.observable.unit_original == "a.u." and record.observable.relative
    assert record.annotations["file_sheet"] == "series"
    with pytest.raises(InputError, match=r"no sheet 3; the workbook has 2 \('notes', 'series'\)"):
        catalog.add(path, options={**options, "sheet": 3})


def test_an_empty_sheet_beside_one_filled_is_no_question(catalog, tmp_path):
    path = _workbook(tmp_path / "plate.xlsx", {"empty": [], "series": SERIES})
    assert catalog.add(path, options={**LAB, "observable": {"id": "gfp"}}).added


def test_cli_column_mapping_and_header_row(cli, tmp_path):
    path = tmp_path / "titled.csv"
    path.write_text("Run 4\nZeit (min);pERK [nM]\n0;1,25\n5;2,5\n")
    run = cli("add", path, "--observable", "perk", "--lab", "Lab Quill", "--header-row", "2",
              "--column", "time=Zeit", "--column", "value=pERK [nM]", "--json")  # fmt: skip
    assert run.code == 0, run.err
    assert json.loads(run.out)["added"] is True
    bad = cli("add", path, "--observable", "perk", "--lab", "L", "--column", "colour=x")
    assert bad.code == 2 and "unknown role 'colour'" in bad.err and bad.err.count("\n") == 1


def test_inspect_says_what_add_would_do_and_writes_nothing(cli, tmp_path):
    path = _workbook(
        tmp_path / "plate.xlsx", {"notes": [["read on the plate reader"]], "series": SERIES}
    )
    catalog = tmp_path / "cli.db"
    refused = cli("inspect", path, "--json")
    assert refused.code == 0, refused.err
    found = json.loads(refused.out)
    assert found["sheets"] == [{"name": "notes", "rows": 1}, {"name": "series", "rows": 4}]
    assert "2 sheets with data" in found["would_refuse"]
    run = cli("inspect", path, "--sheet", "series", "--column", "value=GFP", "--observable", "gfp",
              "--lab", "Lab Quill", "--json")  # fmt: skip
    found = json.loads(run.out)
    assert [c["role"] for c in found["columns"]] == ["time", "value"]
    assert [c["unit"] for c in found["columns"]] == ["h", "a.u."]
    assert found["would_add"]["points"] == 3 and found["would_add"]["time_unit"] == "h"
    shown = cli("inspect", path, "--sheet", "2", "--observable", "gfp", "--lab", "Lab Quill")
    assert "add would log: gfp in a.u. (relative), time in h, 3 points" in shown.out
    assert not catalog.exists()


def test_calamine_and_openpyxl_read_a_workbook_to_the_same_cells(tmp_path):
    # openpyxl, pandas' reference engine for .xlsx, as the outside reference for calamine
    import datetime as dt

    from curate.ingest.workbook import read_sheet

    rows = [["Run 3"], [], ["time", "value", "note", "when"], [0, 1.5, "first", dt.date(2026, 3, 1)],
            [5, 2, None, dt.datetime(2026, 3, 1, 10, 30)], [10, -3.25e-7, "x", None]]  # fmt: skip
    path = _workbook(tmp_path / "book.xlsx", {"empty": [], "data": rows})
    raw = path.read_bytes()
    calamine = read_sheet(path, raw, "data", engine="calamine")
    reference = read_sheet(path, raw, "data", engine="openpyxl")
    assert calamine == reference
    cells, lines, chosen, names = calamine.rows, calamine.lines, calamine.name, calamine.names
    assert lines == [1, 3, 4, 5, 6] and chosen == "data" and names == ("empty", "data")
    assert cells[2][:2] == ["0", "1.5"] and cells[4][1] == "-3.25e-07"


def test_the_example_lab_files_log_as_their_sidecars_say(catalog):
    from conftest import ROOT

    folder = ROOT / "example_datasets" / "lab_files"
    export = catalog.add(folder / "marrowby_velarin_export.csv")
    reference = pd.read_csv(folder / "marrowby_velarin_export.csv", sep=";", decimal=",",
                            encoding="cp1252", skiprows=2)  # fmt: skip
    frame = _points(catalog, export)
    np.testing.assert_allclose(frame["value"], reference["velarin [nM]"], rtol=1e-15)
    np.testing.assert_allclose(frame["time"], reference["Zeit (min)"] * 60, rtol=1e-15)
    record = catalog.show(export.id).record
    assert record.annotations["file_dialect"]["encoding"] == "cp1252"
    peak = catalog.show(catalog.add(folder / "quillfen_glint_percent_of_peak.csv").id).record
    assert peak.observable.relative and peak.protocol.normalisation.kind == "peak"


# misreads a new user found: each is now one line, nothing stored
MISREADS = [
    ("an sd column beside an unmapped value column",
     "Time (min),pERK (nM),SD\n0,0.12,0.02\n2,1.85,0.11\n", {},
     "no value column among Time (min), pERK (nM), SD, but an 'SD' column"),
    ("an sd header in another unit",
     "Time (min),pAKT (nM),SD (uM)\n0,10,0.001\n10,50,0.005\n", {"columns": {"value": "pAKT"}},
     "column 'SD (uM)': the header states 'uM', but the values are in 'nM'"),
    ("replicates in different units",
     "time (min),rep1 (nM),rep2 (uM)\n0,1,0.001\n10,2,0.002\n", {"observable": {"id": "perk", "unit": "nM"}},
     "the replicate columns state different units (nM, uM)"),
    ("a mapping to a missing sd column",
     "Time (min),pERK (nM),SD\n0,0.12,0.02\n2,1.85,0.11\n", {"columns": {"value": "pERK", "sd": "Bogus"}},
     "--column sd=Bogus (columns.sd) names no column"),
    ("the same mark for decimals and thousands",
     "time;value\n0;1,5\n1;2,5\n", {"observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "s"},
                                    "dialect": {"decimal": ",", "thousands": ","}},
     "dialect.decimal and dialect.thousands are both ','"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("name", "content", "options", "expected"), MISREADS, ids=[m[0] for m in MISREADS]
)
def test_what_would_be_misread_is_refused(catalog, tmp_path, name, content, options, expected):
    path = tmp_path / "lab.csv"
    path.write_text(content)
    merged = {
        **LAB,
        **options,
        "observable": {**LAB["observable"], **options.get("observable", {})},
    }
    with pytest.raises(InputError, match=re.escape(expected)):
        catalog.add(path, options=merged)
    assert catalog.list() == []


# -- what a new user met with lab files ---------------------------------------------------------

ABSOLUTE = {**LAB, "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "s"}}


def test_a_number_that_reads_two_ways_with_nothing_to_tell_is_refused(catalog, tmp_path):
    path = tmp_path / "lone.csv"
    path.write_text("time;value\n0;1.500\n1;2\n")
    with pytest.raises(InputError, match=re.escape(
        "'1.500' may be 1.5 ('.' a decimal mark) or 1500 (a thousands separator), and no other "
        "number in the file tells which; state it: --decimal '.' or --thousands '.'"
    )):  # fmt: skip
        catalog.add(path, options=ABSOLUTE)
    as_decimal = catalog.add(path, options={**ABSOLUTE, "dialect": {"decimal": "."}})
    assert catalog.points(as_decimal.id)["value"].tolist() == [1.5, 2.0]
    path.write_text("time;value\n0;1.500\n1;2\n2;3\n")  # another file: not a duplicate
    as_thousands = catalog.add(path, options={**ABSOLUTE, "dialect": {"thousands": "."}})
    assert catalog.points(as_thousands.id)["value"].tolist() == [1500.0, 2.0, 3.0]
    path.write_text("time;value\n0;1,234\n1;2,5\n")  # '2,5' tells: the comma is decimal
    told = catalog.add(path, options=ABSOLUTE)
    assert catalog.points(told.id)["value"].tolist() == [1.234, 2.5]


def test_notes_below_the_data_are_refused_with_the_way_to_leave_them_out(catalog, tmp_path):
    path = tmp_path / "stamped.csv"
    path.write_text("time,value\n0,1\n1,2\n2,4\nExported by instrument software v2\n")
    with pytest.raises(InputError, match=re.escape(
        "stamped.csv, line 5: 1 cells, but the header has 2 columns; if line 5 and below are "
        "notes under the data, pass --footer-rows 1 (footer_rows = 1 in the sidecar)"
    )):  # fmt: skip
        catalog.add(path, options=ABSOLUTE)
    result = catalog.add(path, options={**ABSOLUTE, "footer_rows": 1})
    assert catalog.points(result.id)["value"].tolist() == [1.0, 2.0, 4.0]
    assert catalog.show(result.id).record.annotations["file_layout"] == [
        "the last 1 line(s), from line 5, are a footer and were left out"
    ]
    blank = tmp_path / "blank.csv"
    blank.write_text("time,value\n0,1\n1,2\n2,5\n\nOperator,A. N. Other\nPlate,7\n")
    with pytest.raises(InputError, match=r"line 6, column 'time': 'Operator' is not a number; "
                                         r"expected a time; if the lines below the blank one are "
                                         r"notes, pass --end-at-blank"):  # fmt: skip
        catalog.add(blank, options=ABSOLUTE)
    ended = catalog.add(blank, options={**ABSOLUTE, "end_at_blank": True})
    assert catalog.points(ended.id)["value"].tolist() == [1.0, 2.0, 5.0]


@pytest.mark.parametrize("written", ["Min", "MIN", "min", "Mins"])
def test_a_time_header_in_minutes_in_any_case(catalog, tmp_path, written):
    path = tmp_path / "minutes.csv"
    path.write_text(f"Time ({written}),value\n0,1\n1,2\n")
    result = catalog.add(path, options={**LAB, "observable": {"id": "perk", "unit": "nM"}})
    assert catalog.points(result.id)["time"].tolist() == [0.0, 60.0]  # seconds
    assert catalog.show(result.id).record.time_unit_original == written.lower()


def test_a_title_of_several_cells_above_the_header_hints_at_header_row(catalog, tmp_path):
    path = tmp_path / "titled.csv"
    path.write_text("Run 7;plate 2;reader 1\ntime;value;sd\n0;1;0,1\n1;2;0,1\n")
    with pytest.raises(InputError, match=re.escape(
        "line 2 holds 'time': if the rows above it are a title, pass --header-row 2 "
        "(header_row = 2 in the sidecar)"
    )):  # fmt: skip
        catalog.add(path, options=ABSOLUTE)
    assert catalog.add(path, options={**ABSOLUTE, "header_row": 2}).added


def test_utf16_without_a_byte_order_mark_is_read_in_the_encoding_stated(catalog, tmp_path):
    path = tmp_path / "wide.csv"
    path.write_bytes("time;value µM\n0;1,5\n1;2,5\n".encode("utf-16-le"))
    with pytest.raises(InputError, match="not a text file"):
        catalog.add(path, options=ABSOLUTE)
    result = catalog.add(path, options={**ABSOLUTE, "dialect": {"encoding": "utf-16-le"},
                                        "columns": {"value": "value µM"}})  # fmt: skip
    assert catalog.points(result.id)["value"].tolist() == [1.5, 2.5]


def test_a_txt_file_is_read_with_its_delimiter_detected(catalog, tmp_path):
    tabbed, semicolons = tmp_path / "reader.txt", tmp_path / "other.txt"
    tabbed.write_text("time\tvalue\n0\t1.25\n1\t2.5\n")
    semicolons.write_text("time;value\n0;1,25\n1;2,5\n2;3\n")
    for path, delimiter in ((tabbed, "\t"), (semicolons, ";")):
        result = catalog.add(path, options=ABSOLUTE)
        assert catalog.points(result.id)["value"].tolist()[:2] == [1.25, 2.5]
        assert catalog.show(result.id).record.annotations["file_dialect"]["delimiter"] == delimiter


def test_a_sidecar_naming_a_data_file_in_a_subfolder_or_outside(cli, tmp_path):
    (tmp_path / "raw").mkdir()
    (tmp_path / "raw" / "run.csv").write_text("time,value\n0,1\n1,2\n")
    sidecar = tmp_path / "run.toml"
    body = ('observable = {id = "perk", unit = "nM"}\ntime = {unit = "s"}\n'
            'source = {lab = "Lab Quill"}\n')  # fmt: skip
    sidecar.write_text('data_file = "raw/run.csv"\n' + body)
    run = cli("add", sidecar, "--json")
    assert run.code == 0, run.err and json.loads(run.out)["added"] is True
    sidecar.write_text('data_file = "../run.csv"\n' + body)
    run = cli("add", sidecar)
    assert run.code == 2 and run.err.count("\n") == 1
    assert "field 'data_file': '../run.csv' is outside the sidecar's folder" in run.err


def test_inspect_shows_the_columns_before_the_refusal_of_one(cli, tmp_path):
    path = tmp_path / "lab.csv"
    path.write_text("Time (min),pERK [nM]\n0,1\n1,2\n")
    run = cli("inspect", path, "--column", "value=GFP", "--json")
    found = json.loads(run.out)
    assert [c["header"] for c in found["columns"]] == ["Time (min)", "pERK [nM]"]
    assert "--column value=GFP (columns.value) names no column" in found["would_refuse"]
    assert found["table_error"] is None
    shown = cli("inspect", path, "--column", "value=GFP")
    assert shown.out.index("pERK [nM]") < shown.out.index("add would refuse")


def test_the_dialect_options_on_the_command_line_and_in_the_api(cli, catalog, tmp_path):
    path = tmp_path / "odd.csv"
    path.write_text("time|value\n0|1.234,5\n1|2.000,25\n", encoding="cp1252")
    run = cli("add", path, "--observable", "perk", "--unit", "nM", "--time-unit", "s", "--lab",
              "Lab Quill", "--delimiter", "|", "--decimal", ",", "--thousands", ".",
              "--encoding", "cp1252", "--json")  # fmt: skip
    assert run.code == 0, run.err
    shown = cli("inspect", path, "--delimiter", "|", "--decimal", ",", "--thousands", ".",
                "--json")  # fmt: skip
    assert json.loads(shown.out)["dialect"]["thousands"] == "."
    result = catalog.add(path, options={**ABSOLUTE, "dialect": {
        "delimiter": "|", "decimal": ",", "thousands": ".", "encoding": "cp1252"}})  # fmt: skip
    assert catalog.points(result.id)["value"].tolist() == [1234.5, 2000.25]
    stamped = tmp_path / "stamped.csv"
    stamped.write_text("time,value\n0,1\n1,2\nend of export\n")
    run = cli("add", stamped, "--observable", "perk", "--unit", "nM", "--time-unit", "s",
              "--lab", "Lab Quill", "--footer-rows", "1", "--json")  # fmt: skip
    assert run.code == 0, run.err
