"""Exports checked by the petab and frictionless validators, read back exactly, and traced."""

from __future__ import annotations

import json
import logging

import numpy as np
import pandas as pd
import pytest
from conftest import DATA, ROOT, write

from curate.errors import InputError
from curate.weighting import Selection

CHECKLISTS = ROOT / "example_datasets" / "checklists"


@pytest.fixture
def prepared(catalog, examples):
    catalog.intake(examples)
    catalog.estimate_noise()
    by_file = {v.record.source.raw_file_name: v.id for v in catalog.list()}
    for path in sorted(CHECKLISTS.glob("*.toml")):
        dataset = next(i for name, i in by_file.items() if name.startswith(path.stem + "."))
        catalog.grade_from_checklist(dataset, answers_file=path, accept=True)
    return catalog


def test_weighted_table_in_one_call(prepared):
    table = prepared.weighted_table()
    assert len(table) == 242 and table["dataset_id"].nunique() == 13
    for column in (
        "dataset_id",
        "version",
        "observable",
        "unit",
        "unit_ucum",
        "time",
        "value",
        "sd",
        "sigma",
        "weight",
        "grade",
        "dose",
        "temperature",
        "cell_line",
    ):
        assert column in table.columns
    np.testing.assert_allclose(table["weight"], 1 / table["sigma"] ** 2, rtol=1e-12)
    np.testing.assert_allclose(
        table["sigma"], table["sd"] * np.sqrt(table["inflation"] / table["balance"]), rtol=1e-12
    )


def test_table_export_reads_back_exactly(prepared, tmp_path):
    result = prepared.export("table", tmp_path / "t")
    table = prepared.weighted_table()
    for name, reader in (("points.csv", pd.read_csv), ("points.parquet", pd.read_parquet)):
        back = reader(tmp_path / "t" / name)
        for column in ("time", "value", "sd", "sigma", "weight"):
            np.testing.assert_array_equal(
                back[column].to_numpy(), table[column].to_numpy(), err_msg=f"{name} {column}"
            )
        assert back["dataset_id"].tolist() == table["dataset_id"].tolist()
    readme = (tmp_path / "t" / "README.txt").read_text()
    assert (
        "curve_fit(f, t, y, sigma=sigma, absolute_sigma=True)" in readme
        and result.manifest["format"] == "table"
    )


def test_manifest_names_every_dataset_version(prepared, tmp_path):
    result = prepared.export("table", tmp_path / "t")
    manifest = json.loads((tmp_path / "t" / "manifest.json").read_text())
    assert manifest == result.manifest
    assert manifest["catalog_id"] == prepared.catalog_id and manifest["tool"] == "curate"
    assert len(manifest["datasets"]) == 13 and all(
        len(d["content_hash"]) == 64 for d in manifest["datasets"]
    )
    assert manifest["policy"]["sha256"] == prepared.weights().policy.sha256
    assert manifest["event_chain_head"]["seq"] > 0
    assert set(manifest["files"]) == {"points.csv", "points.parquet", "README.txt"}
    assert prepared.store.policy_text(manifest["policy"]["sha256"]) is not None


def stand_in_model(path, species, parameters):
    # a stand-in SBML model (libsbml ships with petab) so that the full lint can run
    libsbml = pytest.importorskip("libsbml")
    doc = libsbml.SBMLDocument(3, 2)
    model = doc.createModel()
    model.setId("stand_in")
    compartment = model.createCompartment()
    compartment.setId("cell")
    compartment.setSize(1)
    compartment.setConstant(True)
    for sid in species:
        s = model.createSpecies()
        s.setId(sid)
        s.setCompartment("cell")
        s.setInitialConcentration(0.0)
        s.setConstant(False)
        s.setBoundaryCondition(False)
        s.setHasOnlySubstanceUnits(False)
    for pid in parameters:
        p = model.createParameter()
        p.setId(pid)
        p.setValue(1.0)
        p.setConstant(True)
    libsbml.writeSBMLToFile(doc, str(path))


def lint(problem_yaml):
    import petab.v1 as pv1

    logging.getLogger("petab").setLevel(logging.CRITICAL)
    pv1.validate_yaml_syntax(str(problem_yaml))
    problem = pv1.Problem.from_yaml(str(problem_yaml))
    return pv1.lint_problem(problem)


def test_petab_export_passes_the_petab_validator(prepared, tmp_path):
    pytest.importorskip("petab.v1")
    prepared.export("petab", tmp_path / "p")
    assert lint(tmp_path / "p" / "problem.yaml") is False  # False means no errors
    # with a stand-in model the lint also checks parameters and condition columns
    stand_in_model(
        tmp_path / "p" / "model.xml", ["glint_model", "velarin_conc_model"], ["dose", "temperature"]
    )
    import yaml

    problem = yaml.safe_load((tmp_path / "p" / "problem.yaml").read_text())
    problem["problems"][0]["sbml_files"] = ["model.xml"]
    (tmp_path / "p" / "problem.yaml").write_text(yaml.safe_dump(problem))
    assert lint(tmp_path / "p" / "problem.yaml") is False
    measurements = pd.read_csv(tmp_path / "p" / "measurements.tsv", sep="\t")
    table = prepared.weighted_table()
    np.testing.assert_array_equal(
        measurements["noiseParameters"].to_numpy(), table["sigma"].to_numpy()
    )
    relative = measurements[measurements.observableId == "glint"]
    assert relative["observableParameters"].str.startswith("scale_").all()
    assert measurements["simulationConditionId"].nunique() == 13  # one condition per dataset


def test_petab_round_trip_of_a_published_problem(catalog, tmp_path):
    # import Fujita et al. 2010, grade everything A, export without floors: every measurement,
    # time and noise value comes back as published
    pytest.importorskip("petab.v1")
    results = catalog.import_petab(
        DATA / "petab" / "Fujita_SciSignal2010" / "Fujita_SciSignal2010.yaml"
    )
    for r in results:
        catalog.grade(r.id, "A", reason="published benchmark")
    policy = write(
        tmp_path / "exact.toml",
        "[inflation]\nA = 1\nB = 2\nC = 4\nD = 8\n[floors]\nrelative = 0.0\n",
    )
    catalog.export("petab", tmp_path / "p", policy=policy)
    ours = pd.read_csv(tmp_path / "p" / "measurements.tsv", sep="\t")
    original = pd.read_csv(
        DATA / "petab" / "Fujita_SciSignal2010" / "measurementData_step_Fujita_SciSignal2010.tsv",
        sep="\t",
    )
    key = ["datasetId", "time"]
    merged = ours.merge(original, on=key, suffixes=("", "_original"))
    assert len(merged) == len(original) == len(ours)
    np.testing.assert_array_equal(merged["measurement"], merged["measurement_original"])
    np.testing.assert_array_equal(
        merged["noiseParameters"].astype(float), merged["noiseParameters_original"].astype(float)
    )
    assert (merged["observableParameters"] == merged["observableParameters_original"]).all()
    assert lint(tmp_path / "p" / "problem.yaml") is False


def test_datapackage_passes_frictionless(prepared, tmp_path):
    frictionless = pytest.importorskip("frictionless")
    prepared.export("datapackage", tmp_path / "d")
    report = frictionless.validate(str(tmp_path / "d" / "datapackage.json"))
    assert report.valid, report.flatten(["rowNumber", "fieldName", "type", "note"])[:5]
    descriptor = json.loads((tmp_path / "d" / "datapackage.json").read_text())
    fields = {f["name"]: f for f in descriptor["resources"][1]["schema"]["fields"]}
    assert fields["time"]["unitCode"] == "s" and fields["dose"]["unitCode"] == "nmol/L"
    assert fields["temperature"]["unitCode"] == "Cel"


def test_prov_lineage_walks_back_to_raw_files(prepared, tmp_path):
    prov_model = pytest.importorskip("prov.model")
    prepared.export("prov", tmp_path / "l")
    doc = prov_model.ProvDocument.deserialize(str(tmp_path / "l" / "lineage.json"), format="json")
    ids = {
        r.identifier
        for r in doc.get_records(
            (prov_model.ProvEntity, prov_model.ProvActivity, prov_model.ProvAgent)
        )
    }
    for relation in doc.get_records(
        prov_model.ProvRelation
    ):  # the library checks nothing across records
        for _, ref in relation.formal_attributes:
            if isinstance(ref, prov_model.QualifiedName):
                assert ref in ids, f"dangling {ref}"
    derived = {}
    for d in doc.get_records(prov_model.ProvDerivation):
        derived.setdefault(str(d.args[0]), []).append(str(d.args[1]))
    bundle = next(k for k in derived if "export/" in k)
    assert len(derived[bundle]) == 13
    record = derived[bundle][0]
    assert any(src.startswith("ex:raw/") for src in derived[record])


def test_trace_and_impact(prepared, tmp_path):
    prepared.export("table", tmp_path / "t")
    assert prepared.trace(tmp_path / "t").intact
    target = prepared.list()[0].id
    assert prepared.impact(target) == []
    prepared.revise(target, reason="lab corrected the dose", conditions={"dose": "9 uM"})
    report = prepared.trace(tmp_path / "t")
    assert not report.intact
    assert report.changed == [f"{target} version 3: now version 4 (revise since the export)"]
    found = prepared.impact(target)
    assert len(found) == 1 and found[0].used_version == 3 and found[0].changes == ("revise",)
    (tmp_path / "t" / "points.csv").write_text("tampered")
    assert "points.csv: edited since the export" in prepared.trace(tmp_path / "t").files_changed


def test_hand_edited_manifest_is_refused(prepared, tmp_path):
    prepared.export("table", tmp_path / "t")
    path = tmp_path / "t" / "manifest.json"
    manifest = json.loads(path.read_text())
    manifest["datasets"][0]["version"] = 99
    path.write_text(json.dumps(manifest))
    with pytest.raises(InputError, match="the manifest was edited after it was written"):
        prepared.trace(tmp_path / "t")


def test_non_empty_folder_needs_force_and_keeps_user_files(prepared, tmp_path):
    folder = tmp_path / "t"
    write(folder / "my_notes.txt", "mine")
    with pytest.raises(InputError, match="not empty"):
        prepared.export("table", folder)
    prepared.export("table", folder, force=True)
    assert (folder / "my_notes.txt").read_text() == "mine"
    assert (folder / "points.csv").exists()


def test_selection(prepared, tmp_path):
    glint = prepared.weighted_table(selection=Selection(observables=("glint",)))
    assert set(glint["observable"]) == {"glint"}
    harrow = prepared.weighted_table(selection=Selection(labs=("Harrow Point Lab",), grades=("A",)))
    assert set(harrow["lab"]) == {"Harrow Point Lab"}
    warm = prepared.weighted_table(selection=Selection(conditions=(("temperature", "30 degC"),)))
    assert set(warm["temperature"]) == {30.0}
    first = prepared.list()[0]
    pinned = prepared.weighted_table(
        selection=Selection(ids=(first.id,), versions=((first.id, 1),))
    )
    assert set(pinned["version"]) == {1}
    with pytest.raises(InputError, match="the selection matches no dataset") as refused:
        prepared.weighted_table(selection=Selection(labs=("Nobody",)))
    assert "{" not in str(refused.value)
    words = Selection(
        observables=("glint",), labs=("A", "B"), conditions=(("dose", "10uM"),), grades=("C",),
        versions=(("x_01", 2),), include_retired=True,
    ).describe()  # fmt: skip
    assert words == (
        "observable glint; lab 'A' or 'B'; condition dose = 10uM; grade C; x_01 at version 2; "
        "retired ones included"
    )
    assert Selection().describe() == "every current dataset"


def test_excluded_grade_stays_out(prepared):
    target = prepared.list()[0].id
    prepared.grade(target, "X", reason="kept, never fitted")
    assert target not in set(prepared.weighted_table()["dataset_id"])


def test_folds_written_with_gaps(prepared, tmp_path):
    result = prepared.folds("lab", tmp_path / "f")
    assert len(result.folds) == 4
    corvane = next(f for f in result.folds if f["held_out_groups"] == ["Corvane Biophysics"])
    assert (
        "condition temperature = 25.0 occurs only in the held-out data" in corvane["training_lacks"]
    )
    train = pd.read_csv(tmp_path / "f" / corvane["name"] / "train.csv")
    test = pd.read_csv(tmp_path / "f" / corvane["name"] / "test.csv")
    assert set(test["lab"]) == {"Corvane Biophysics"} and "Corvane Biophysics" not in set(
        train["lab"]
    )
    assert len(train) + len(test) == 242
    assert prepared.trace(tmp_path / "f").intact
    kfold = prepared.folds("kfold:3:1", tmp_path / "k")
    assert sum(f["test_points"] for f in kfold.folds) == 242
    by_dose = prepared.folds("condition:dose", tmp_path / "c")
    assert sorted(g for f in by_dose.folds for g in f["held_out_groups"]) == ["1000", "10000"]


def test_export_cli(cli, tmp_path, examples):
    assert cli("intake", examples).code == 0
    assert cli("noise", "--all").code == 0
    run = cli("weights", "--json")
    assert run.code == 0 and len(json.loads(run.out)["datasets"]) == 13
    run = cli("export", "petab", tmp_path / "p", "--observable", "velarin_conc")
    assert run.code == 0 and "petab export of 8 dataset versions" in run.out
    assert cli("trace", tmp_path / "p").code == 0
    run = cli("export", "petab", tmp_path / "p")
    assert run.code == 2 and "not empty" in run.err
    run = cli("export", "excel", tmp_path / "x")
    assert run.code == 2 and "unknown export format 'excel'" in run.err
    run = cli("export", "table", tmp_path / "n", "--lab", "Nobody")
    assert run.code == 2 and run.err.strip() == (
        "curate: error: the selection matches no dataset that the policy lets into a fit "
        "(lab 'Nobody'; the policy leaves out grade X); widen it, or see `curate list`"
    )
    bad_policy = write(tmp_path / "bad.toml", "[inflation]\nA = 1\nB = 2\nC = 4\nD = -1\n")
    run = cli("weights", "--policy", bad_policy)
    assert run.code == 2 and "field 'inflation.D': -1 is not allowed" in run.err
    run = cli("folds", tmp_path / "f", "--by", "lab", "--json")
    assert run.code == 0 and len(json.loads(run.out)["folds"]) == 4
    target = json.loads(cli("list", "--json").out)[0]["id"]
    assert cli("retire", target, "--reason", "rerun").code == 0
    run = cli("trace", tmp_path / "f")
    assert run.code == 1 and "retired" in run.out
    run = cli("impact", target, "--json")
    assert run.code == 0 and json.loads(run.out)[0]["retired"] is True
    assert [e["kind"] for e in json.loads(run.out)] == ["folds"]
    text = cli("impact", target).out
    assert text.startswith(f"1 fold set used an outdated version of {target}:")


def test_impact_names_each_kind_of_run(prepared, tmp_path):
    import curate
    from curate.present.run_text import impact_text

    target = prepared.list(observable="velarin_conc")[0].id
    spec = write(tmp_path / "p.toml", "[parameters.level]\nstart = 10\n")

    def flat(params, points):
        return np.full(len(points), params["level"])

    selection = Selection(observables=("velarin_conc",))
    prepared.export("table", tmp_path / "t", selection=selection)
    prepared.folds("lab", tmp_path / "f", selection=selection)
    prepared.fit(curate.PythonFunction(flat), spec, selection=selection)
    prepared.sensitivity(
        model=f"{write(tmp_path / 'm.py', MODEL_FILE)}:flat", params=spec, method="one-step",
        by="lab", selection=selection,
    )  # fmt: skip
    prepared.revise(target, reason="lab corrected the dose", conditions={"dose": "9 uM"})
    found = prepared.impact(target)
    assert [e.kind for e in found] == ["export", "folds", "fit", "sensitivity"]
    assert [e.to_dict()["kind"] for e in found] == ["export", "folds", "fit", "sensitivity"]
    assert set(found[2].to_dict()) == {"event", "at", "kind", "format", "outdir", "used_version",
                                       "current_version", "retired", "changes"}  # fmt: skip
    lines = impact_text(target, found).plain.splitlines()
    assert lines[0] == (
        f"1 export, 1 fold set, 1 fit, 1 sensitivity run used an outdated version of {target}:"
    )
    assert " table export " in lines[1] and str(tmp_path / "t") in lines[1]
    assert " fold set (by lab) " in lines[2]
    assert lines[3].endswith("  fit: used version 3, now version 4 (revise)")
    assert lines[4].endswith("  sensitivity run: used version 3, now version 4 (revise)")


MODEL_FILE = """
import numpy as np

def flat(params, points):
    return np.full(len(points), params["level"])
"""
