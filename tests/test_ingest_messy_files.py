"""Lab files as common spreadsheet programs save them (tests/data/lab_files_messy/), each read
to the values written in it, checked by hand; text files also against pandas.read_csv told the
dialect by hand.

Conventions and their sources:
- quoting: RFC 4180 section 2 (fields holding the delimiter, quotes or line breaks are quoted;
  a quote inside is doubled; lines end in CRLF);
- decimal comma with semicolons: how spreadsheet programs set to a continental European locale
  save CSV (common practice, no single source);
- byte order mark: the Unicode Standard, section 23.8 (U+FEFF at the start of UTF-8 text
  written by spreadsheet programs' "CSV UTF-8"), from memory of the section number;
- cp1252: the Windows Western European code page, where µ is 0xB5 and ° is 0xB0 (as in
  Latin-1);
- workbooks: ECMA-376 Part 1 (Office Open XML): dates as serial day numbers from 1899-12-30
  (18.17.4.1), merged cells (18.3.1.55), several sheets (18.2.19).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from curate.errors import InputError
from curate.ingest.tables import read_table

MESSY = Path(__file__).parent / "data" / "lab_files_messy"
LAB = {"source": {"lab": "Lab Quill"}}


def _add(catalog, name, **options):
    result = catalog.add(MESSY / name, options={**LAB, **options})
    return catalog.points(result.id), catalog.show(result.id).record


def test_decimal_commas_with_semicolons_and_a_thousands_point(catalog):
    points, record = _add(catalog, "decimal_comma_semicolon.csv", observable={"id": "perk"},
                          columns={"time": "Zeit", "value": "pERK"})
    # by hand: 1,25 -> 1.25; 12,5 -> 12.5; 1.012,75 -> 1012.75 nM; times 0, 5, 10 min
    assert points["value"].tolist() == [1.25, 12.5, 1012.75]
    assert points["sd"].tolist() == [0.1, 1.05, 8.5]
    assert points["time"].tolist() == [0.0, 300.0, 600.0]
    dialect = record.annotations["file_dialect"]
    assert (dialect["delimiter"], dialect["decimal"], dialect["thousands"]) == (";", ",", ".")
    reference = pd.read_csv(MESSY / "decimal_comma_semicolon.csv", sep=";", decimal=",",
                            thousands=".")  # fmt: skip
    assert reference["pERK [nM]"].tolist() == points["value"].tolist()


def test_utf8_with_a_byte_order_mark(catalog):
    points, record = _add(catalog, "utf8_bom.csv", observable={"id": "od", "unit": "1"},
                          time={"unit": "s"})  # fmt: skip
    assert points["value"].tolist() == [0.5, 0.75, 0.001]  # the BOM is not part of 'time'
    assert record.annotations["file_dialect"]["encoding"] == "utf-8"
    reference = pd.read_csv(MESSY / "utf8_bom.csv", encoding="utf-8-sig")
    assert list(reference.columns) == ["time", "value"]


def test_cp1252_with_micro_and_degree_signs(catalog):
    points, record = _add(catalog, "cp1252_micro_degree.csv", observable={"id": "signal"},
                          columns={"value": "Signal"})  # fmt: skip
    assert record.observable.unit_original == "µM"  # read from 0xB5, not a replacement
    assert points["value"].tolist() == [500.0, 750.0]  # nM: 0,5 and 0,75 µM
    assert record.annotations["file_dialect"]["encoding"] == "cp1252"
    assert record.annotations["extra_columns"]["Temp (°C)"] == ["37,0", "36,5"]
    reference = pd.read_csv(MESSY / "cp1252_micro_degree.csv", sep=";", decimal=",",
                            encoding="cp1252")  # fmt: skip
    assert reference["Signal [µM]"].tolist() == [0.5, 0.75]


def test_title_rows_above_the_header(catalog):
    with pytest.raises(InputError, match=r"title above the header, pass --header-row 4 "):
        _add(catalog, "title_rows.csv", observable={"id": "x", "unit": "nM"}, time={"unit": "s"})
    points, _ = _add(catalog, "title_rows.csv", observable={"id": "x", "unit": "nM"},
                     time={"unit": "s"}, header_row=4)  # fmt: skip
    assert points["value"].tolist() == [3.0, 4.5] and points["time"].tolist() == [0.0, 10.0]


def test_rfc4180_quoting_with_embedded_delimiters_doubled_quotes_and_line_breaks(catalog):
    table = read_table(MESSY / "quoted_rfc4180.csv")
    assert table.cells["note"].tolist() == ["stim, then wash", 'the "late" sample', "two\r\nlines"]
    assert table.lines.tolist() == [2, 3, 5]  # the last record ends on line 5
    points, record = _add(catalog, "quoted_rfc4180.csv", observable={"id": "x", "unit": "nM"},
                          time={"unit": "s"})  # fmt: skip
    assert points["value"].tolist() == [1.5, 2.5, 3.0]
    assert record.annotations["extra_columns"]["note"][1] == 'the "late" sample'
    reference = pd.read_csv(MESSY / "quoted_rfc4180.csv")
    assert reference["note"].tolist()[:2] == table.cells["note"].tolist()[:2]


def test_crlf_tab_separated_with_an_exponent(catalog):
    points, _ = _add(catalog, "crlf_tab.tsv", observable={"id": "x", "unit": "nM"},
                     time={"unit": "s"})  # fmt: skip
    assert points["value"].tolist() == [-1.5, 225.0]


def test_a_workbook_with_a_title_and_a_merged_header_over_replicates(catalog):
    points, record = _add(catalog, "merged_headers.xlsx", observable={"id": "perk"})
    assert record.replicate_labels == ("pERK rep 1 [nM]", "pERK rep 2 [nM]", "pERK rep 3 [nM]")
    assert record.annotations["file_sheet"] == "Plate 7"
    assert sorted(points["value"].tolist()) == [1.0, 1.5, 2.0, 3.0, 3.5, 4.25]
    assert sorted(set(points["time"].tolist())) == [0.0, 600.0]


def test_inspect_names_the_replicate_columns_of_a_wide_workbook():
    from curate.ingest.inspection import inspect_file

    found = inspect_file(MESSY / "merged_headers.xlsx", options={**LAB, "observable": {"id": "p"}})
    assert [c["role"] for c in found.columns] == ["time", *["replicate column"] * 3]
    assert found.would_add is not None and found.would_add["points"] == 6


def test_a_workbook_of_several_sheets_with_clock_times(catalog):
    with pytest.raises(InputError, match=r"2 sheets with data \('notes', 'series'\)"):
        _add(catalog, "several_sheets.xlsx", observable={"id": "gfp"}, time={"unit": "min"})
    points, record = _add(catalog, "several_sheets.xlsx", observable={"id": "gfp"},
                          time={"unit": "min"}, sheet="series")  # fmt: skip
    # by hand: 09:30, 09:50, 10:35 on 2026-05-04 -> 0, 20, 65 min -> 0, 1200, 3900 s
    assert points["time"].tolist() == [0.0, 1200.0, 3900.0]
    assert points["value"].tolist() == [10.0, 12.5, 20.0]
    assert "2026-05-04 09:30:00" in record.annotations["time_cells"]
