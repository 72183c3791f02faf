"""PEtab import, checked against the petab library's own reading of two published problems.

Problems: Boehm et al., J. Proteome Res. 2014 (doi 10.1021/pr5006923) and Fujita et al.,
Sci. Signal. 2010 (doi 10.1126/scisignal.2000810), as kept in the public PEtab benchmark
collection (tests/data/petab/).
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import pytest
from conftest import DATA

from curate.errors import InputError

petab_v1 = pytest.importorskip("petab.v1")

PROBLEMS = {
    "Boehm_JProteomeRes2014": "measurementData_Boehm_JProteomeRes2014.tsv",
    "Fujita_SciSignal2010": "measurementData_step_Fujita_SciSignal2010.tsv",
}
GROUP = ["observableId", "simulationConditionId", "datasetId"]


def reference_table(name: str) -> pd.DataFrame:
    logging.getLogger("petab").setLevel(logging.ERROR)
    return petab_v1.get_measurement_df(str(DATA / "petab" / name / PROBLEMS[name]))


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_import_matches_petab_reading(catalog, name):
    results = catalog.import_petab(DATA / "petab" / name / f"{name}.yaml")
    reference = reference_table(name)
    groups = reference.groupby(GROUP, sort=False)
    assert len(results) == groups.ngroups
    assert all(r.added for r in results)
    total = 0
    for result in results:
        record = catalog.show(result.id).record
        petab_info = record.annotations["petab"]
        key = (record.observable.id, petab_info["simulationConditionId"], petab_info["datasetId"])
        expected = groups.get_group(key).sort_values("time", kind="stable")
        points = catalog.points(result.id)
        # time unit 's' in, seconds stored: the numbers are exactly the published ones
        np.testing.assert_array_equal(points["time"].to_numpy(), expected["time"].to_numpy(float))
        np.testing.assert_array_equal(
            points["value"].to_numpy(), expected["measurement"].to_numpy(float)
        )
        total += len(points)
        # every cell of every row kept verbatim, in the stored order
        rows = record.annotations["petab_rows"]
        assert [float(t) for t in rows["time"]] == points["time"].tolist()
        assert [float(m) for m in rows["measurement"]] == points["value"].tolist()
    assert total == len(reference)


def test_numeric_noise_becomes_sd_and_scale_factors_mark_relative_data(catalog):
    results = catalog.import_petab(
        DATA / "petab" / "Fujita_SciSignal2010" / "Fujita_SciSignal2010.yaml", lab="Fujita lab"
    )
    first = catalog.show(results[0].id)
    assert first.record.source.lab == "Fujita lab"
    assert first.record.observable.relative  # observableParameter1_... * (...)
    assert first.record.uncertainty.type.value == "sd"
    points = catalog.points(results[0].id)
    reference = reference_table("Fujita_SciSignal2010")
    chosen = reference[(reference.datasetId == first.record.annotations["petab"]["datasetId"])]
    np.testing.assert_array_equal(
        points["sd"].to_numpy(), chosen["noiseParameters"].to_numpy(float)
    )
    # the condition table's numeric columns become conditions
    assert first.record.conditions["EGF_0"].value == pytest.approx(0.1)


def test_symbolic_noise_is_kept_as_text(catalog):
    results = catalog.import_petab(
        DATA / "petab" / "Boehm_JProteomeRes2014" / "Boehm_JProteomeRes2014.yaml"
    )
    record = catalog.show(results[0].id).record
    assert record.uncertainty is None
    assert set(record.annotations["petab_rows"]["noiseParameters"]) == {"sd_pSTAT5A_rel"}
    assert "sd" not in catalog.points(results[0].id)
    # datasetIds that are valid identifiers become the dataset ids
    assert results[0].id == "model1_data1_pSTAT5A_rel"


def test_reimport_is_recognised(catalog):
    path = DATA / "petab" / "Boehm_JProteomeRes2014" / "Boehm_JProteomeRes2014.yaml"
    first = catalog.import_petab(path)
    again = catalog.import_petab(path)
    assert not any(r.added for r in again)
    assert [r.duplicate_of for r in again] == [r.id for r in first]
    assert catalog.verify().ok


def test_import_cli(cli):
    run = cli(
        "import-petab",
        DATA / "petab" / "Boehm_JProteomeRes2014" / "Boehm_JProteomeRes2014.yaml",
        "--time-unit",
        "min",
        "--json",
    )
    assert run.code == 0, run.err
    import json

    payload = json.loads(run.out)
    assert len(payload) == 3 and all(p["added"] for p in payload)
    assert {json.dumps(p["problem"]) for p in payload} == {
        json.dumps({"id": "boehm_jproteomeres2014_01", "version": 1, "stored": True})
    }


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_the_problem_is_read_whole_and_byte_for_byte(name):
    import hashlib

    from curate.ingest import read_petab_import

    folder = DATA / "petab" / name
    imported = read_petab_import(
        folder / f"{name}.yaml", lab=None, time_unit="s", unit="1", actor="tester"
    )
    problem = imported.problem
    # every file in the folder is named by the YAML (test_data/ is a folder of other problems)
    on_disk = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    assert problem.source == f"{name}.yaml" and problem.files == on_disk
    assert problem.manifest() == {n: hashlib.sha256(b).hexdigest() for n, b in on_disk.items()}
    assert problem.model_ids == (name,)  # <model id="..."> of the benchmark's SBML file
    assert len(imported.drafts) == len(reference_table(name).groupby(GROUP, sort=False))


def test_a_parameter_table_of_a_header_alone_is_a_table_of_no_parameters(catalog, tmp_path):
    problem = curate_export(tmp_path)  # curate's own export: nothing to estimate
    (result,) = catalog.import_petab(problem)
    stored = catalog.problem(result.problem.id)
    assert stored.parameter_df is not None and stored.ids("parameter") == []
    assert stored.sbml_name is None and stored.sbml_sha256 is None
    assert [m.to_dict()["sbml_sha256"] for m in catalog.models()] == [None]


def test_bad_problem_file(cli, tmp_path):
    bad = tmp_path / "p.yaml"
    bad.write_text("format_version: 2\nproblems: []\n")
    run = cli("import-petab", bad)
    assert run.code == 2 and "this reader takes PEtab 1" in run.err
    run = cli("import-petab", tmp_path / "missing.yaml")
    assert run.code == 2 and "no such PEtab problem file" in run.err


def curate_export(tmp_path, *, grades=("B", "B"), units_json=None, unit="nM", relative="false"):
    """Write a small problem shaped like curate's own PEtab export."""
    from conftest import write

    write(tmp_path / "problem.yaml", "format_version: 1\nparameter_file: parameters.tsv\n"
          "problems:\n- sbml_files: []\n  condition_files: [conditions.tsv]\n"
          "  measurement_files: [measurements.tsv]\n  observable_files: [observables.tsv]\n")  # fmt: skip
    write(tmp_path / "parameters.tsv", "parameterId\tparameterScale\tlowerBound\tupperBound\t"
          "nominalValue\testimate\n")  # fmt: skip
    write(tmp_path / "observables.tsv", "observableId\tobservableFormula\tnoiseFormula\n"
          "velarin_conc\tvelarin_conc_model\tnoiseParameter1_velarin_conc\n")  # fmt: skip
    write(tmp_path / "conditions.tsv", "conditionId\tconditionName\tdose\ttemperature\n"
          "c_lab_01\tdose=10 uM\t10000.0\t37.0\n")  # fmt: skip
    header = ("observableId\tsimulationConditionId\tmeasurement\ttime\tnoiseParameters\tdatasetId\t"
              "curateVersion\ttrustGrade\tcurateSd\tcurateGrade\tcurateUnit\tcurateRelative\n")  # fmt: skip
    rows = "".join(
        f"velarin_conc\tc_lab_01\t{value}\t{time}\t{2 * sd}\tlab_01\t3\tB\t{sd}\t{grade}\t{unit}\t{relative}\n"
        for (time, value, sd), grade in zip(
            ((0.0, 1.5, 0.1), (60.0, 2.5, 0.2)), grades, strict=True
        )
    )
    write(tmp_path / "measurements.tsv", header + rows)
    if units_json is not None:
        write(tmp_path / "units.json", units_json)
    return tmp_path / "problem.yaml"


UNITS_JSON = (
    '{"time": {"column": "time", "unit": "s", "ucum": "s"}, "conditions": {'
    '"dose": {"column": "dose", "unit": "nM", "ucum": "nmol/L"},'
    '"temperature": {"column": "temperature", "unit": "°C", "ucum": "Cel"}}}'
)


def test_curate_annotation_columns_are_read_back(catalog, tmp_path):
    problem = curate_export(tmp_path, units_json=UNITS_JSON)
    (result,) = catalog.import_petab(problem, lab="Harrow Point Lab")
    version = catalog.show(result.id)
    record = version.record
    assert result.id == "lab_01"
    assert record.observable.unit == "nanomolar" and not record.observable.relative
    assert version.grade == "B"
    assert "curate PEtab export" in record.trust.rationale
    assert (
        record.conditions["dose"].value == 10000.0 and record.conditions["dose"].unit == "nanomolar"
    )
    assert record.conditions["temperature"].unit == "degree_Celsius"
    # the sd before trust inflation, not the exported sigma (noiseParameters)
    assert catalog.points(result.id)["sd"].tolist() == [0.1, 0.2]


def test_curate_annotations_that_disagree_within_a_dataset_are_refused(catalog, tmp_path):
    problem = curate_export(tmp_path, grades=("B", "C"))
    with pytest.raises(
        InputError, match="column 'curateGrade': 'C' differs from 'B' in the same dataset"
    ):
        catalog.import_petab(problem)
    assert catalog.list() == []


def test_unreadable_units_file_is_refused(catalog, tmp_path):
    problem = curate_export(tmp_path, units_json="{not json")
    with pytest.raises(InputError, match="units.json: not readable JSON"):
        catalog.import_petab(problem)


def test_curate_relative_flag_wins_over_the_formula(catalog, tmp_path):
    # percent of peak exported as relative data in '1': the formula alone (no scale
    # parameter, another dataset's) would make it absolute
    problem = curate_export(tmp_path, unit="1", relative="true")
    (result,) = catalog.import_petab(problem, unit="nM")
    observable = catalog.show(result.id).record.observable
    assert observable.relative and observable.unit == "dimensionless"  # curateUnit wins too
