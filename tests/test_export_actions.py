"""Exports checked by the petab and frictionless validators, read back exactly, and traced."""

from __future__ import annotations

import importlib.util
import json
import logging
import math

import numpy as np
import pandas as pd
import pytest
from conftest import DATA, ROOT, add_mixed_observable, cut_event_tail, write

import curate
from curate.errors import InputError
from curate.fit.runs import run_sensitivity
from curate.fit.spec import load_spec
from curate.weighting import Selection, load_policy

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
    assert set(manifest["files"]) == {"points.csv", "points.parquet", "units.json", "README.txt"}
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


def test_petab_export_of_an_observable_mixing_absolute_and_relative_data_lints(catalog, tmp_path):
    # one observable formula with an observableParameter placeholder: relative rows name their
    # calibration group's scale parameter, absolute rows the numeric override 1 (PEtab v1:
    # each row's observableParameters must fill every placeholder; checked by petab's linter)
    pytest.importorskip("petab.v1")
    absolute, relative = add_mixed_observable(catalog)
    catalog.export("petab", tmp_path / "p")
    assert lint(tmp_path / "p" / "problem.yaml") is False
    stand_in_model(tmp_path / "p" / "model.xml", ["velarin_conc_model"], ["dose"])
    import yaml

    problem = yaml.safe_load((tmp_path / "p" / "problem.yaml").read_text())
    problem["problems"][0]["sbml_files"] = ["model.xml"]
    (tmp_path / "p" / "problem.yaml").write_text(yaml.safe_dump(problem))
    assert lint(tmp_path / "p" / "problem.yaml") is False
    observables = pd.read_csv(tmp_path / "p" / "observables.tsv", sep="\t")
    assert observables["observableFormula"].tolist() == [
        "observableParameter1_velarin_conc * velarin_conc_model"
    ]
    measurements = pd.read_csv(tmp_path / "p" / "measurements.tsv", sep="\t", dtype=str)
    by_dataset = measurements.groupby("datasetId")["observableParameters"].unique()
    assert by_dataset[absolute].tolist() == ["1"]
    assert by_dataset[relative].tolist() == ["scale_blot_7"]
    parameters = pd.read_csv(tmp_path / "p" / "parameters.tsv", sep="\t")
    assert parameters["parameterId"].tolist() == ["scale_blot_7"]


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
    # the export of a stored problem keeps the problem's own file names
    ours = pd.read_csv(tmp_path / "p" / "measurementData_step_Fujita_SciSignal2010.tsv", sep="\t")
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
    assert lint(tmp_path / "p" / "Fujita_SciSignal2010.yaml") is False


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
                                       "current_version", "retired", "changes", "superseded"}  # fmt: skip
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


# -- what a manifest names about the catalog, and the chain head it anchors ----------------


def test_manifest_names_the_catalog_by_id_and_file_name_only(prepared, tmp_path):
    prepared.export("table", tmp_path / "t")
    text = (tmp_path / "t" / "manifest.json").read_text()
    manifest = json.loads(text)
    assert manifest["catalog_file"] == "test.db" and "catalog_path" not in manifest
    assert str(tmp_path) not in text  # no folder of this machine travels with the export
    policy = tmp_path / "lab_policy.toml"
    policy.write_text((ROOT / "curate" / "data" / "policy.toml").read_text())
    prepared.export("table", tmp_path / "t2", policy=policy.resolve())
    text = (tmp_path / "t2" / "manifest.json").read_text()
    assert json.loads(text)["policy"]["origin"] == "lab_policy.toml" and str(tmp_path) not in text
    assert prepared.trace(tmp_path / "t").intact


def _cut_behind_the_export(catalog, tmp_path):
    """Retire a dataset, export, then cut the catalog back before the retirement."""
    target = catalog.list()[0].id
    catalog.retire(target, reason="saturated detector")
    head = catalog.head()
    catalog.export("table", tmp_path / "t")
    assert json.loads((tmp_path / "t" / "manifest.json").read_text())["event_chain_head"] == {
        "seq": head[0],
        "hash": head[1],
    }
    cut_event_tail(catalog.path, head[0] - 1)
    assert not catalog.show(target).record.retired and catalog.verify().ok
    return head


def test_trace_tells_a_catalog_rolled_back_behind_the_export(prepared, tmp_path):
    head = _cut_behind_the_export(prepared, tmp_path)
    report = prepared.trace(tmp_path / "t")
    assert report.changed == [] and report.files_changed == []  # every dataset it used is there
    assert not report.intact
    assert report.chain_changed == [
        f"the catalog no longer extends head {head[0]}:{head[1][:12]} (from this export): "
        f"it ends at event {head[0] - 1} (events were cut off, or an older copy was put back)"
    ]
    assert report.to_dict()["chain_changed"] == report.chain_changed


def test_trace_tells_an_export_whose_own_event_was_cut_off(prepared, tmp_path):
    prepared.export("table", tmp_path / "t")
    seq = prepared.head()[0]
    cut_event_tail(prepared.path, seq - 1)  # only the export's own event goes
    assert prepared.trace(tmp_path / "t").chain_changed == [
        "the catalog holds no event of this export (cut off, or an older copy was put back)"
    ]


def test_verify_against_an_export(prepared, tmp_path):
    head = _cut_behind_the_export(prepared, tmp_path)
    for source in (tmp_path / "t", tmp_path / "t" / "manifest.json"):
        report = prepared.verify(against=source)
        assert not report.ok and report.anchor.seq == head[0]
        assert report.problems == [
            f"the catalog no longer extends head {head[0]}:{head[1][:12]} (from export "
            f"manifest {tmp_path / 't' / 'manifest.json'}): it ends at event {head[0] - 1} "
            "(events were cut off, or an older copy was put back)"
        ]
    with pytest.raises(InputError, match="no such export folder, manifest or backup file"):
        prepared.verify(against=tmp_path / "nowhere")
    with pytest.raises(InputError, match="not both"):
        prepared.verify(head, against=tmp_path / "t")


def test_verify_against_an_export_of_another_catalog_is_refused(prepared, tmp_path):
    import curate

    with curate.open_catalog(tmp_path / "other.db") as other:
        data = write(tmp_path / "o.csv", "time,value,sd\n0,1,0.1\n1,2,0.1\n")
        other.add(data, options={"observable": {"id": "x", "unit": "nM"}, "time": {"unit": "s"},
                                 "source": {"lab": "Elsewhere"}})  # fmt: skip
        other.export("table", tmp_path / "o")
    with pytest.raises(InputError, match=r"o: exported from catalog [0-9a-f-]+, not .*test\.db"):
        prepared.verify(against=tmp_path / "o")


def _line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


def test_every_run_records_the_chain_head_it_was_made_at(catalog, tmp_path):
    import curate

    for k in range(3):
        data = write(
            tmp_path / f"d{k}.csv", f"time,value,sd\n0,{k},0.1\n1,{k + 1},0.1\n2,{k + 2.1},0.1\n"
        )
        catalog.add(data, options={"observable": {"id": "x", "unit": "nM"}, "time": {"unit": "s"},
                                   "source": {"lab": f"Lab {k}"}})  # fmt: skip
    spec = write(tmp_path / "p.toml", "[parameters.a]\nstart = 0\n[parameters.b]\nstart = 0\n")
    before = catalog.head()
    folds = catalog.folds("lab", tmp_path / "f")
    assert folds.manifest["event_chain_head"] == {"seq": before[0], "hash": before[1]}
    assert json.loads((tmp_path / "f" / "manifest.json").read_text()) == folds.manifest
    backend = curate.PythonFunction(_line)
    catalog.fit(backend, spec)
    run_sensitivity(catalog, backend, load_spec(spec), by="lab", policy=load_policy(),
                    selection=Selection())  # fmt: skip
    runs = [e for e in catalog.events() if e["kind"] in ("export", "fit", "sensitivity")]
    assert [e["kind"] for e in runs] == ["export", "fit", "sensitivity"]
    for event in runs:
        assert event["payload"]["event_chain_head"] == {
            "seq": event["seq"] - 1,
            "hash": event["prev_hash"],
        }


MINUTES_CSV = "time,value,sd\n0,2.01,0.06\n0.06,2.03,0.07\n0.41,4.1,0.41\n1.1,3.6,0.1\n"


@pytest.fixture
def minutes(catalog, tmp_path):
    """A dataset logged in minutes and uM: every converted number has a short decimal form."""
    data = write(tmp_path / "minutes.csv", MINUTES_CSV)
    options = {"observable": {"id": "velarin_conc", "unit": "uM"}, "time": {"unit": "min"},
               "source": {"lab": "Harrow Point Lab"}, "conditions": {"dose": "2.01 uM", "passage": 5},
               "trust": {"grade": "B", "rationale": "one run"}}  # fmt: skip
    catalog.add(data, options=options)
    return catalog


def test_minutes_come_back_as_decimal_seconds_in_every_export(minutes, tmp_path):
    # 0.41 min = 24.6 s, 0.06 min = 3.6 s, 1.1 min = 66 s (SI Brochure, Table 8); 2.01 uM =
    # 2010 nM (IUPAC Green Book 2.10); the plain float products end in ...9999998
    for fmt in ("table", "petab", "datapackage"):
        minutes.export(fmt, tmp_path / fmt)
    texts = {
        path.name: path.read_text()
        for path in (tmp_path / "table" / "points.csv", tmp_path / "petab" / "measurements.tsv",
                     tmp_path / "datapackage" / "points.csv")
    }  # fmt: skip
    for name, text in texts.items():
        assert "99999" not in text and "00000000" not in text, (name, text)
    table = pd.read_csv(tmp_path / "table" / "points.csv")
    assert table["time"].tolist() == [0.0, 3.6, 24.6, 66.0]
    assert table["value"].tolist() == [2010.0, 2030.0, 4100.0, 3600.0]
    assert table["sd"].tolist() == [60.0, 70.0, 410.0, 100.0]
    parquet = pd.read_parquet(tmp_path / "table" / "points.parquet")
    assert parquet["time"].tolist() == [0.0, 3.6, 24.6, 66.0]
    assert parquet["dose"].tolist() == [2010.0] * 4
    measurements = pd.read_csv(tmp_path / "petab" / "measurements.tsv", sep="\t", dtype=str)
    assert measurements["time"].tolist() == ["0.0", "3.6", "24.6", "66.0"]
    assert measurements["measurement"].tolist() == ["2010.0", "2030.0", "4100.0", "3600.0"]
    # and the outside validators still accept them
    if importlib.util.find_spec("petab") is not None:
        assert lint(tmp_path / "petab" / "problem.yaml") is False
    if importlib.util.find_spec("frictionless") is not None:
        import frictionless

        assert frictionless.validate(str(tmp_path / "datapackage" / "datapackage.json")).valid
    descriptor = json.loads((tmp_path / "datapackage" / "datapackage.json").read_text())
    fields = {f["name"]: f for f in descriptor["resources"][1]["schema"]["fields"]}
    assert fields["dose"]["unitCode"] == "nmol/L" and fields["passage"]["unitCode"] == "1"
    described = json.loads((tmp_path / "petab" / "units.json").read_text())["conditions"]
    assert described["passage"] == {"column": "passage", "unit": "1", "ucum": "1"}


def test_exports_name_units_by_symbol_and_give_every_condition_its_unit(prepared, tmp_path):
    ucum = pytest.importorskip("ucumvert")
    prepared.export("table", tmp_path / "t")
    points = pd.read_csv(tmp_path / "t" / "points.csv")
    assert set(points["unit"]) == {"nM", "a.u."}  # the symbol, not pint's 'nanomolar'
    assert set(points["unit_ucum"]) == {"nmol/L", "[arb'U]"}
    described = json.loads((tmp_path / "t" / "units.json").read_text())
    assert described["time"] == {"column": "time", "unit": "s", "ucum": "s"}
    conditions = described["conditions"]
    assert conditions["dose"] == {"column": "dose", "unit": "nM", "ucum": "nmol/L"}
    assert conditions["temperature"] == {"column": "temperature", "unit": "°C", "ucum": "Cel"}
    assert conditions["cell_line"] == {"column": "cell_line", "unit": None, "ucum": None}
    # the symbol and the UCUM code name one magnitude: pint (our registry) against ucumvert's
    # UCUM registry, an outside reading of UCUM
    registry = ucum.PintUcumRegistry()
    one = registry.from_ucum("nmol/L").to(registry.Quantity(1, "nM").units).m
    assert math.isclose(one, 1.0, rel_tol=1e-12)
    prepared.export("datapackage", tmp_path / "d")
    assert set(pd.read_csv(tmp_path / "d" / "points.csv")["unit"]) == {"nM", "a.u."}
    assert set(pd.read_csv(tmp_path / "d" / "datasets.csv")["unit"]) == {"nM", "a.u."}
    readme = (tmp_path / "t" / "README.txt").read_text()
    assert "units.json names the unit of every column" in readme


def test_petab_export_carries_units_and_reads_back_into_a_fresh_catalog(prepared, tmp_path):
    pytest.importorskip("petab.v1")
    prepared.grade(prepared.list(observable="glint")[0].id, "c", reason="relative, one blot")
    prepared.export("petab", tmp_path / "p")
    assert lint(tmp_path / "p" / "problem.yaml") is False  # the new columns pass the linter
    exported = prepared.weighted_table()
    with curate.open_catalog(tmp_path / "fresh.db", actor="tester") as fresh:
        results = fresh.import_petab(tmp_path / "p" / "problem.yaml", lab="Harrow Point Lab")
        assert len(results) == 13 and all(r.added for r in results)
        for version in prepared.list():
            back = fresh.show(version.id)  # datasetId is the dataset id
            original, copy = version.record, back.record
            assert copy.observable.unit == original.observable.unit
            assert copy.observable.relative == original.observable.relative
            assert back.grade == version.grade
            # numbers with their units, and text conditions too (through curateConditions)
            assert {k: (c.value, c.unit) for k, c in copy.conditions.items()} == {
                k: (c.value, c.unit) for k, c in original.conditions.items()
            }
            points, expected = fresh.points(version.id), prepared.points(version.id)
            np.testing.assert_array_equal(points["time"], expected["time"])
            np.testing.assert_array_equal(points["value"], expected["value"])
            rows = exported[exported["dataset_id"] == version.id]
            np.testing.assert_array_equal(points["sd"], rows["sd"].to_numpy())  # not sigma


def test_petab_export_refuses_times_before_zero(catalog, tmp_path):
    # PEtab 1 has no simulation start time other than 0 (SBML's initial time; PEtab issue
    # #420 asks for one), so a pre-stimulus baseline cannot be placed: refused, nothing written
    data = write(tmp_path / "b.csv", "time,value\n-10,1.0\n-5,1.1\n0,1.0\n5,2\n10,3\n20,3.5\n")
    options = {"observable": {"id": "velarin_conc", "unit": "nM"}, "time": {"unit": "min"},
               "source": {"lab": "Harrow Point Lab"}}  # fmt: skip
    dataset = catalog.add(data, options=options).id
    with pytest.raises(InputError) as err:
        catalog.export("petab", tmp_path / "p")
    assert str(err.value).startswith(
        f"petab export: dataset {dataset} has 2 time(s) before t = 0 (t = -10, -5 min)"
    )
    assert not (tmp_path / "p").exists()
    catalog.export("table", tmp_path / "t")  # the table keeps them
    assert pd.read_csv(tmp_path / "t" / "points.csv")["time"].tolist()[:2] == [-600.0, -300.0]


def test_repeated_times_without_replicates_pass_the_petab_linter(catalog, tmp_path):
    pytest.importorskip("petab.v1")
    data = write(tmp_path / "r.csv", "time,value\n0,1.0\n0,1.1\n5,2\n5,2.2\n10,3\n10,3.3\n")
    options = {"observable": {"id": "velarin_conc", "unit": "nM"}, "time": {"unit": "min"},
               "source": {"lab": "Harrow Point Lab"}}  # fmt: skip
    catalog.add(data, options=options)
    catalog.export("petab", tmp_path / "p")
    assert lint(tmp_path / "p" / "problem.yaml") is False
    measurements = pd.read_csv(tmp_path / "p" / "measurements.tsv", sep="\t")
    assert measurements["time"].tolist() == [0.0, 0.0, 300.0, 300.0, 600.0, 600.0]
