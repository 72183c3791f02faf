"""Intake of CSV, TSV and XLSX files in long and wide form, with sidecars and options."""

from __future__ import annotations

import numpy as np
import openpyxl
import pytest
from conftest import LONG_CSV, SIDECAR, write

from curate.errors import InputError

OPTIONS = {
    "observable": {"id": "front_speed", "unit": "um/min"},
    "time": {"unit": "min"},
    "source": {"lab": "Test Lab"},
}


def test_long_csv_with_sidecar(catalog, tmp_path):
    data = write(tmp_path / "run1.csv", LONG_CSV)
    write(tmp_path / "run1.toml", SIDECAR + '\n[conditions]\ntemperature = "30 degC"\n')
    result = catalog.add(data)
    assert result.added and result.id == "test_front_speed_01"
    frame = catalog.points(result.id)
    # minutes -> seconds, um/min -> um/s (canonical units)
    assert frame["time"].tolist() == [0.0, 600.0, 1200.0, 1800.0]
    np.testing.assert_allclose(frame["value"], [1 / 60, 2 / 60, 3.5 / 60, 4 / 60], rtol=1e-12)
    np.testing.assert_allclose(frame["sd"], [0.1 / 60, 0.2 / 60, 0.2 / 60, 0.3 / 60], rtol=1e-12)
    record = catalog.show(result.id).record
    assert record.observable.unit_original == "um/min"
    assert record.time_unit_original == "min"
    assert record.conditions["temperature"].value == 30.0
    assert record.conditions["temperature"].unit == "degree_Celsius"
    assert record.source.raw_file_name == "run1.csv"
    assert len(record.source.raw_file_sha256 or "") == 64


def test_tsv_with_replicates_keeps_every_row_sorted_stably(catalog, tmp_path):
    data = write(
        tmp_path / "r.tsv",
        """
        time\tvalue\treplicate
        10\t2.0\tb
        0\t1.0\ta
        10\t2.5\ta
        0\t1.2\tb
        10\t2.7\tc
    """,
    )
    result = catalog.add(data, options=OPTIONS)
    frame = catalog.points(result.id)
    assert len(frame) == 5
    assert frame["time"].tolist() == [0, 0, 600, 600, 600]
    # stable: rows at one time keep their file order
    assert frame["replicate"].tolist() == ["a", "b", "b", "a", "c"]
    np.testing.assert_allclose(frame["value"] * 60, [1.0, 1.2, 2.0, 2.5, 2.7])


def test_repeated_times_without_replicate_column_are_kept(catalog, tmp_path):
    data = write(tmp_path / "rep.csv", "time,value\n0,1\n0,1.1\n5,2\n5,2.2\n")
    result = catalog.add(data, options=OPTIONS)
    assert catalog.show(result.id).record.n_points == 4


def test_xlsx_wide_form(catalog, tmp_path):
    path = tmp_path / "wide.xlsx"
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.append(["time", "r1", "r2", "r3"])
    sheet.append([0, 1.0, 1.1, 0.9])
    sheet.append([5, 2.0, None, 2.1])  # a missing replicate is a missing point, not an error
    sheet.append([10, 3.0, 3.2, 2.9])
    book.save(path)
    result = catalog.add(path, options=OPTIONS)
    frame = catalog.points(result.id)
    assert len(frame) == 8
    assert sorted(set(frame["replicate"])) == ["r1", "r2", "r3"]
    assert frame["time"].tolist() == [0, 0, 0, 300, 300, 600, 600, 600]
    assert catalog.show(result.id).record.annotations["layout"] == "wide"


def test_xlsx_named_sheet_and_long_form(catalog, tmp_path):
    path = tmp_path / "book.xlsx"
    book = openpyxl.Workbook()
    book.active.title = "notes"
    book.active.append(["nothing here"])
    sheet = book.create_sheet("series")
    sheet.append(["time", "value", "sd"])
    for t in range(4):
        sheet.append([t, 2.0 * t + 1, 0.1])
    book.save(path)
    result = catalog.add(path, options={**OPTIONS, "sheet": "series"})
    assert catalog.points(result.id)["value"].iloc[-1] == pytest.approx(7 / 60)
    with pytest.raises(InputError, match="no sheet named 'missing'"):
        catalog.add(path, options={**OPTIONS, "sheet": "missing"})


def test_sidecar_given_instead_of_data_file(catalog, tmp_path):
    write(tmp_path / "measurements.csv", LONG_CSV)
    sidecar = write(tmp_path / "meta.toml", 'data_file = "measurements.csv"\n' + SIDECAR)
    result = catalog.add(sidecar)
    assert catalog.show(result.id).record.source.raw_file_name == "measurements.csv"


def test_options_override_sidecar(catalog, tmp_path):
    data = write(tmp_path / "run.csv", LONG_CSV)
    write(tmp_path / "run.toml", SIDECAR)
    result = catalog.add(
        data, options={"source": {"lab": "Other Lab"}, "observable": {"label": "x"}}
    )
    record = catalog.show(result.id).record
    assert record.source.lab == "Other Lab"
    assert record.observable.id == "front_speed"  # kept from the sidecar
    assert record.observable.label == "x"


def test_full_sidecar_fields(catalog, tmp_path):
    data = write(tmp_path / "full.csv", "time,value,sd,n\n0,1,0.1,3\n1,2,0.2,3\n2,3,0.1,4\n")
    write(
        tmp_path / "full.toml",
        """
        id = "full_example"
        [observable]
        id = "velarin_conc"
        label = "velarin"
        unit = "uM"
        [time]
        unit = "h"
        [uncertainty]
        type = "sem"
        [conditions]
        temperature = "37 degC"
        dose = { value = 10, unit = "uM" }
        genotype = "wt"
        strain = { text = "3T3" }
        serum = true
        passage = 12
        [source]
        lab = "Test Lab"
        method = "capture assay"
        instrument = "reader"
        acquired = 2026-05-04
        reference = "doi:10.0000/invented"
        contact = "desk"
        [protocol]
        calibration_group = "plate_3"
        normalisation = { kind = "reference_time", reference = "t = 0" }
        [[protocol.pretreatment]]
        step = "serum starvation"
        duration = "4 h"
        [trust]
        grade = "B"
        rationale = "calibrated, two replicates only"
    """,
    )
    result = catalog.add(data)
    assert result.id == "full_example"
    record = catalog.show(result.id).record
    assert record.observable.unit == "nanomolar" and record.observable.ucum == "nmol/L"
    assert catalog.points(result.id)["value"].tolist() == pytest.approx([1000, 2000, 3000])
    assert catalog.points(result.id)["time"].tolist() == [0, 3600, 7200]
    assert record.conditions["dose"].value == pytest.approx(10_000)
    assert record.conditions["strain"].value == "3T3"
    assert record.conditions["serum"].value is True
    assert record.conditions["passage"].value == 12.0
    assert record.uncertainty.type.value == "sem"
    assert record.protocol.pretreatment[0].duration_s == pytest.approx(14400)
    assert record.protocol.normalisation.kind == "reference_time"
    assert record.trust.grade == "B" and record.trust.assigned_by == "tester"
    assert catalog.points(result.id)["n"].tolist() == [3, 3, 4]


def test_relative_units_are_recognised(catalog, tmp_path):
    data = write(tmp_path / "glint.csv", LONG_CSV)
    result = catalog.add(data, options={**OPTIONS, "observable": {"id": "glint", "unit": "a.u."}})
    observable = catalog.show(result.id).record.observable
    assert (
        observable.relative and observable.unit == "arbitrary_unit" and observable.ucum == "[arb'U]"
    )
    assert catalog.points(result.id)["value"].tolist() == [1.0, 2.0, 3.5, 4.0]  # never converted


def test_dimensionless_written_as_1(catalog, tmp_path):
    data = write(tmp_path / "ratio.csv", LONG_CSV)
    result = catalog.add(
        data,
        options={
            **OPTIONS,
            "observable": {"id": "ratio", "unit": "1"},
        },
    )
    assert catalog.show(result.id).record.observable.unit == "dimensionless"


def test_identical_data_logged_twice_is_recognised(catalog, tmp_path):
    data = write(tmp_path / "run.csv", LONG_CSV)
    first = catalog.add(data, options=OPTIONS)
    second = catalog.add(data, options=OPTIONS)
    assert first.added and not second.added
    assert second.duplicate_of == first.id
    assert len(catalog.list()) == 1
    assert len(catalog.events()) == 1


def test_same_values_under_other_conditions_warn_of_copy_paste(catalog, tmp_path):
    data = write(tmp_path / "run.csv", LONG_CSV)
    first = catalog.add(data, options={**OPTIONS, "conditions": {"dose": "1 uM"}})
    second = catalog.add(data, options={**OPTIONS, "conditions": {"dose": "10 uM"}})
    assert second.added
    codes = [w.code for w in catalog.show(second.id).record.warnings]
    assert "identical_to_other" in codes
    assert first.id in catalog.show(second.id).record.warnings[0].message


def test_dry_run_writes_nothing(catalog, tmp_path):
    data = write(tmp_path / "run.csv", LONG_CSV)
    plan = catalog.add(data, options=OPTIONS, dry_run=True)
    assert plan.to_dict()["action"] == "add"
    assert catalog.list() == [] and catalog.events() == []


def test_extra_columns_are_kept(catalog, tmp_path):
    data = write(tmp_path / "x.csv", "time,value,comment\n5,2,late\n0,1,first\n")
    result = catalog.add(data, options=OPTIONS)
    kept = catalog.show(result.id).record.annotations["extra_columns"]
    assert kept == {"comment": ["first", "late"]}  # in time order, like the arrays


def test_api_arrays_draft(memory_catalog):
    draft = memory_catalog.draft(
        [0, 1, 2],
        [1.0, 2.0, 3.0],
        observable="v",
        unit="nM",
        time_unit="s",
        lab="L",
        sd=[0.1, 0.1, 0.2],
        conditions={"dose": "5 uM"},
    )
    result = memory_catalog.add_drafts([draft])[0]
    assert memory_catalog.points(result.id)["sd"].tolist() == [0.1, 0.1, 0.2]
    with pytest.raises(InputError, match="equal lengths"):
        memory_catalog.draft([0, 1], [1.0], observable="v", unit="nM", time_unit="s", lab="L")


PERCENT_CSV = "time,value\n0,0\n5,40\n10,100\n20,70\n30,55\n"


@pytest.mark.parametrize("kind", ["peak", "reference_time", "reference_condition"])
@pytest.mark.parametrize("unit", ["%", "fraction", "1"])
def test_percent_of_a_reference_is_relative(catalog, tmp_path, kind, unit):
    data = write(tmp_path / "pct.csv", PERCENT_CSV)
    write(
        tmp_path / "pct.toml",
        f'observable.id = "velarin_conc"\nobservable.unit = "{unit}"\ntime.unit = "min"\n'
        f'source.lab = "Corvane Biophysics"\nprotocol.normalisation = {{ kind = "{kind}" }}\n',
    )
    observable = catalog.show(catalog.add(data).id).record.observable
    assert observable.relative  # a fit needs a scale factor for it
    assert observable.unit == "dimensionless" and observable.unit_original == unit


def test_percent_without_a_reference_stays_absolute(catalog, tmp_path):
    # "% of cells" with no normalisation is an absolute dimensionless number
    data = write(tmp_path / "cells.csv", PERCENT_CSV)
    options = {**OPTIONS, "observable": {"id": "responding", "unit": "%"}}
    result = catalog.add(data, options=options)
    assert not catalog.show(result.id).record.observable.relative
    assert catalog.points(result.id)["value"].tolist() == [0.0, 0.4, 1.0, 0.7, 0.55]
    # and an explicit choice wins over the rule
    peak = {**options, "protocol": {"normalisation": {"kind": "peak"}}}
    peak["observable"] = {"id": "responding2", "unit": "%", "relative": False}
    assert not catalog.show(catalog.add(data, options=peak).id).record.observable.relative


def test_times_in_minutes_are_stored_as_the_decimal_seconds(catalog, tmp_path):
    # 0.41 min is 24.6 s (SI Brochure, Table 8: 1 min = 60 s); 0.41 * 60 in float64 is not
    # and an sd of 2.01 uM is 2010 nM (1 uM = 1000 nM), not 2009.9999999999998
    data = write(tmp_path / "m.csv", "time,value,sd\n0,1,2.01\n0.41,2,0.2\n0.06,3,0.1\n")
    options = {**OPTIONS, "observable": {"id": "velarin_conc", "unit": "uM"}}
    frame = catalog.points(catalog.add(data, options=options).id)
    assert frame["time"].tolist() == [0.0, 3.6, 24.6]
    assert frame["sd"].tolist() == [2010.0, 100.0, 200.0]
    assert frame["value"].tolist() == [1000.0, 3000.0, 2000.0]


def test_file_logged_before_rounding_is_still_recognised(catalog, tmp_path):
    # a catalog written before converted values were rounded holds the plain products; the
    # same file logged again must be recognised, not logged twice
    from dataclasses import replace

    from curate.records import content_hash

    data = write(tmp_path / "m.csv", "time,value\n0,1\n0.41,2\n0.06,3\n")
    options = {**OPTIONS, "observable": {"id": "front_speed", "unit": "um/s"}}
    draft = catalog.read_file(data, options=options)
    assert draft.legacy_hash is not None and draft.legacy_hash != draft.record.content_hash
    old_arrays = replace(draft.arrays, time=draft.arrays.time.copy())
    old_arrays.time[1:] = [0.06 * 60, 0.41 * 60]  # the unrounded products
    old_hash = content_hash(old_arrays, value_unit=draft.record.observable.unit)
    assert old_hash == draft.legacy_hash
    old = replace(
        draft,
        arrays=old_arrays,
        record=draft.record.model_copy(update={"content_hash": old_hash}),
        legacy_hash=None,
    )
    first = catalog.add_drafts([old])[0]
    again = catalog.add(data, options=options)
    assert not again.added and again.duplicate_of == first.id
    assert catalog.verify().ok  # stored data keep their hashes


def test_negative_and_repeated_times_are_kept_with_a_warning(catalog, tmp_path):
    # a pre-stimulus baseline and unlabelled replicates are legitimate data
    data = write(
        tmp_path / "b.csv", "time,value\n-10,1.0\n-5,1.1\n0,1.0\n5,2\n5,2.2\n10,3\n10,3.1\n"
    )
    result = catalog.add(data, options=OPTIONS)
    record = catalog.show(result.id).record
    assert record.n_points == 7
    assert catalog.points(result.id)["time"].tolist()[:2] == [-600.0, -300.0]
    messages = {w.code: w.message for w in record.warnings}
    assert "2 point(s) before t = 0 (t = -10, -5 min)" in messages["negative_times"]
    assert (
        "2 time(s) occur more than once without a replicate column (t = 5, 10 min)"
        in (messages["repeated_times"])
    )


def test_repeated_times_with_a_replicate_column_need_no_warning(catalog, tmp_path):
    data = write(tmp_path / "r.csv", "time,value,replicate\n0,1,a\n0,1.1,b\n5,2,a\n5,2.2,b\n")
    record = catalog.show(catalog.add(data, options=OPTIONS).id).record
    assert [w.code for w in record.warnings] == []
