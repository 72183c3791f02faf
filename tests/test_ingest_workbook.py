"""Workbooks read as the spreadsheet program shows them: date and time cells, merged cells,
formulas without a stored value; calamine and openpyxl read every test workbook alike.

Outside references: openpyxl writes the workbooks (its cells hold what a spreadsheet program
would store: ECMA-376 Part 1 stores dates and times as serial day numbers from 1899-12-30,
18.17.4.1, read back by openpyxl as datetime, time and timedelta); the expected numbers are
worked out by hand beside each test.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import openpyxl
import pytest

from curate.errors import InputError
from curate.ingest.tables import read_table
from curate.ingest.workbook import read_sheet

LAB = {"source": {"lab": "Lab Quill"}, "observable": {"id": "perk", "unit": "nM"}}


def _book(path, rows, *, merges=(), formulas=()):
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "data"
    for row in rows:
        sheet.append(row)
    for merge in merges:
        sheet.merge_cells(merge)
    for reference, formula in formulas:
        sheet[reference] = formula  # openpyxl stores the formula and no value
    book.save(path)
    return path


def _engines_agree(path):
    raw = path.read_bytes()
    calamine = read_sheet(path, raw, None, engine="calamine")
    reference = read_sheet(path, raw, None, engine="openpyxl")
    assert calamine == reference  # rows, row numbers, merges, uncomputed formulas
    return calamine


def test_clock_times_become_elapsed_time_from_the_first_row(catalog, tmp_path):
    start = dt.datetime(2026, 5, 4, 10, 0, 0)
    rows = [["Time", "value"]] + [[start + dt.timedelta(minutes=m), v]
                                  for m, v in ((0, 1.0), (15, 2.0), (90, 3.5))]  # fmt: skip
    path = _book(tmp_path / "clock.xlsx", rows)
    sheet = _engines_agree(path)
    assert sheet.rows[1][0] == "2026-05-04T10:00:00"
    result = catalog.add(path, options={**LAB, "time": {"unit": "min"}})
    points = catalog.points(result.id)
    assert points["time"].tolist() == [0.0, 900.0, 5400.0]  # seconds: 0, 15 and 90 min
    record = catalog.show(result.id).record
    assert record.time_unit_original == "min"
    assert record.annotations["time_cells"] == (
        "the times were clock times (dates with times), converted to elapsed time from the "
        "first row's 2026-05-04 10:00:00"
    )


def test_times_of_day_and_durations(catalog, tmp_path):
    days = [["Time", "value"], [dt.time(9, 45), 1.0], [dt.time(10, 0, 30), 2.0],
            [dt.time(11, 15), 3.0]]  # fmt: skip
    path = _book(tmp_path / "day.xlsx", days)
    assert _engines_agree(path).rows[1][0] == "T09:45:00"
    day = catalog.add(path, options={**LAB, "time": {"unit": "s"}})
    assert catalog.points(day.id)["time"].tolist() == [0.0, 930.0, 5400.0]  # 15.5 min, 1.5 h
    assert "time of day" in catalog.show(day.id).record.annotations["time_cells"]
    spans = [["Time", "value"], [dt.timedelta(minutes=5), 1.0], [dt.timedelta(hours=26), 2.0],
             [dt.timedelta(seconds=1.25), 3.0]]  # fmt: skip
    path = _book(tmp_path / "spans.xlsx", spans)
    assert [r[0] for r in _engines_agree(path).rows[1:]] == ["0:05:00", "26:00:00", "0:00:01.25"]
    span = catalog.add(path, options={**LAB, "time": {"unit": "h"}})
    assert catalog.points(span.id)["time"].tolist() == [1.25, 300.0, 93600.0]  # taken as they are
    assert catalog.show(span.id).record.annotations["time_cells"] == (
        "the times were durations (h:mm:ss), taken as written"
    )


def test_a_clock_past_midnight_or_a_mixed_time_column_is_refused(catalog, tmp_path):
    late = _book(tmp_path / "late.xlsx", [["time", "value"], [dt.time(23, 50), 1], [dt.time(0, 10), 2]])
    with pytest.raises(InputError, match=r"row 3, column 'time': the clock time '00:10:00' is "
                                         r"before the one above it \(past midnight\?\)"):  # fmt: skip
        catalog.add(late, options={**LAB, "time": {"unit": "min"}})
    mixed = _book(tmp_path / "mixed.xlsx", [["time", "value"], [dt.timedelta(minutes=1), 1], [5, 2]])
    with pytest.raises(InputError, match=r"row 3, column 'time': '5', but the first time is a "
                                         r"duration \(h:mm:ss\)"):  # fmt: skip
        catalog.add(mixed, options={**LAB, "time": {"unit": "min"}})
    assert catalog.list() == []


def test_a_merged_header_over_replicates_with_sub_headers_is_one_header(catalog, tmp_path):
    rows = [["Run 7, plate 2"], ["Time (min)", "pERK [nM]", None, None],
            [None, "rep 1", "rep 2", "rep 3"], [0, 1.0, 1.5, 2.0], [10, 3.0, 3.5, 4.0]]  # fmt: skip
    path = _book(tmp_path / "reps.xlsx", rows, merges=("A1:D1", "B2:D2", "A2:A3"))
    sheet = _engines_agree(path)
    assert sheet.extras.merges == ((1, 1, 1, 4), (2, 1, 3, 1), (2, 2, 2, 4))
    table = read_table(path)
    assert table.columns == ("Time (min)", "pERK rep 1 [nM]", "pERK rep 2 [nM]", "pERK rep 3 [nM]")
    assert table.header_line == 2 and table.lines.tolist() == [4, 5]
    assert table.notes[0] == "row 1 is a title (a merged cell) and was left out"
    result = catalog.add(path, options={"source": {"lab": "Lab Quill"}, "observable": {"id": "perk"}})
    record = catalog.show(result.id).record
    assert record.observable.unit_original == "nM" and record.time_unit_original == "min"
    assert record.replicate_labels == ("pERK rep 1 [nM]", "pERK rep 2 [nM]", "pERK rep 3 [nM]")
    points = catalog.points(result.id)
    assert points["time"].tolist() == [0.0, 0.0, 0.0, 600.0, 600.0, 600.0]
    assert sorted(points["value"].tolist()) == [1.0, 1.5, 2.0, 3.0, 3.5, 4.0]
    assert "rows 2-3 are one header" in record.annotations["file_layout"][1]


def test_a_merged_header_without_sub_headers_numbers_its_columns(tmp_path):
    rows = [["time", "pERK [nM]", None], [0, 1.0, 2.0], [5, 3.0, 4.0]]
    path = _book(tmp_path / "two.xlsx", rows, merges=("B1:C1",))
    _engines_agree(path)
    table = read_table(path)
    assert table.columns == ("time", "pERK 1 [nM]", "pERK 2 [nM]")
    assert table.cells["pERK 2 [nM]"].tolist() == ["2", "4"]


def test_a_label_merged_down_a_column_labels_each_row(tmp_path):
    rows = [["time", "value", "replicate"], [0, 1.0, "A"], [5, 2.0, None], [0, 3.0, "B"]]
    path = _book(tmp_path / "labels.xlsx", rows, merges=("C2:C3",))
    assert read_table(path).cells["replicate"].tolist() == ["A", "A", "B"]


def test_a_formula_without_a_stored_value_is_one_line_with_the_fix(catalog, tmp_path):
    rows = [["time", "value"], [0, 1.0], [5, None]]
    path = _book(tmp_path / "calc.xlsx", rows, formulas=(("B3", "=B2*2"),))
    sheet = _engines_agree(path)
    assert sheet.extras.uncomputed == ((3, "B3"),)
    with pytest.raises(InputError) as refused:
        catalog.add(path, options={**LAB, "time": {"unit": "s"}})
    assert str(refused.value) == (
        f"{path}, sheet 'data', cell B3: a formula with no stored value (the file was written by "
        "a program that does not compute formulas); open it in a spreadsheet program and save "
        "it, or export the sheet as CSV"
    )
    # a formula above the header (in a title row left out) does not matter
    titled = _book(tmp_path / "titled.xlsx", [[None], ["time", "value"], [0, 1.0], [1, 2.0]],
                   formulas=(("A1", "=1+1"),))  # fmt: skip
    assert catalog.add(titled, options={**LAB, "time": {"unit": "s"}, "header_row": 2}).added


def test_a_dialect_for_a_workbook_is_refused(catalog, tmp_path):
    path = _book(tmp_path / "book.xlsx", [["time", "value"], [0, 1.0], [1, 2.0]])
    (tmp_path / "book.toml").write_text('[dialect]\ndecimal = ","\n')
    with pytest.raises(InputError, match=r"book.toml: \[dialect\] applies to text files, not to "
                                         r"the workbook book.xlsx"):  # fmt: skip
        catalog.add(path, options={**LAB, "time": {"unit": "s"}})


@pytest.mark.parametrize("seconds", [0.0, 0.001, 59.999, 3600.5, 86399.0, 100000.25])
def test_both_readers_give_a_duration_to_the_millisecond(tmp_path, seconds):
    path = _book(tmp_path / "d.xlsx", [["time", "value"], [dt.timedelta(0), 1],
                                       [dt.timedelta(seconds=seconds), 2]])  # fmt: skip
    _engines_agree(path)
    found, _ = read_table(path).times("time", "s")
    assert np.allclose(found, [0.0, seconds], rtol=1e-12, atol=0)


def test_a_sheet_that_starts_below_a1_keeps_its_row_numbers(tmp_path):
    # calamine's range starts at the first cell with a value; the rows must still be counted
    # from row 1, as openpyxl (and the spreadsheet program) count them
    book = openpyxl.Workbook()
    sheet = book.active
    sheet["B3"], sheet["C3"], sheet["B4"], sheet["C4"] = "time", "value", 1, 2
    book.save(tmp_path / "low.xlsx")
    found = _engines_agree(tmp_path / "low.xlsx")
    assert found.lines == [3, 4] and found.rows == [["", "time", "value"], ["", "1", "2"]]
    table = read_table(tmp_path / "low.xlsx")  # the table starts in column B
    assert table.columns == ("time", "value") and table.cells["value"].tolist() == ["2"]
    assert table.header_line == 3 and table.notes == ("the table starts in column B",)
