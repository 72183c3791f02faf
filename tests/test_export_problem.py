"""The PEtab export of a selection from one stored problem: the problem itself, runnable.

Problems: Boehm et al., J. Proteome Res. 2014 (doi 10.1021/pr5006923) and Fujita et al.,
Sci. Signal. 2010 (doi 10.1126/scisignal.2000810), from the public PEtab benchmark collection
(Benchmark-Models-PEtab; tests/data/petab/ holds the collection's files unchanged). The linter and the likelihood are petab's own (petab.v1:
``lint_problem``, ``calculate_llh``), an outside reference for "runnable" and for the objective.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import shutil

import numpy as np
import pandas as pd
import pytest
from conftest import DATA, NEUTRAL, add_mixed_observable, write

import curate
from curate.errors import InputError
from curate.export.petab_problem import CURATE_COLUMNS
from curate.weighting import Selection

pv1 = pytest.importorskip("petab.v1")

BOEHM, FUJITA = "Boehm_JProteomeRes2014", "Fujita_SciSignal2010"


def problem_yaml(name):
    return DATA / "petab" / name / f"{name}.yaml"


def neutral(tmp_path):
    return write(tmp_path / "neutral.toml", NEUTRAL)


def normalised(path, *, drop=()):
    """Give a PEtab table as text cells, numbers normalised by float() (1E-05 == 0.00001)."""

    def cell(text):
        text = text.strip()
        try:
            return repr(float(text))
        except ValueError:
            return text

    frame = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    return frame.drop(columns=[c for c in drop if c in frame.columns]).map(cell)


def table_names(yaml_path):
    import yaml

    content = yaml.safe_load(yaml_path.read_text())
    (part,) = content["problems"]
    return {
        "condition": part["condition_files"],
        "observable": part["observable_files"],
        "parameter": [content["parameter_file"]],
        "measurement": part["measurement_files"],
        "sbml": part["sbml_files"],
        "visualization": part.get("visualization_files", []),
    }


def lint(yaml_path):
    logging.getLogger("petab").setLevel(logging.CRITICAL)
    pv1.validate_yaml_syntax(str(yaml_path))
    return pv1.lint_problem(pv1.Problem.from_yaml(str(yaml_path)))  # False: no errors


def llh(yaml_path, factor=1.1):
    """Give petab's log-likelihood of a problem against simulations = factor x measurements."""
    problem = pv1.Problem.from_yaml(str(yaml_path))
    simulations = problem.measurement_df.copy()
    parameters = problem.parameter_df.copy()
    # Python floats, not numpy's: the sympy installed here (1.11) cannot read a numpy 2 float
    # (it parses its repr 'np.float64(...)') when petab substitutes it into a noise formula
    simulations["simulation"] = _python_floats(simulations["measurement"] * factor)
    parameters["nominalValue"] = _python_floats(parameters["nominalValue"])
    return pv1.calculate_llh(problem.measurement_df, simulations, problem.observable_df, parameters)


def _python_floats(column):
    return pd.Series([float(x) for x in column], index=column.index, dtype=object)


@pytest.mark.parametrize("name", [BOEHM, FUJITA])
def test_neutral_export_gives_back_the_problem_cell_for_cell(catalog, tmp_path, name):
    catalog.import_petab(problem_yaml(name))
    result = catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    out, original = tmp_path / "p", DATA / "petab" / name
    names = table_names(out / f"{name}.yaml")
    assert names == table_names(problem_yaml(name))  # the problem's own file names
    for role in ("condition", "observable", "parameter"):
        for file in names[role]:
            pd.testing.assert_frame_equal(normalised(out / file), normalised(original / file))
    (measurements,) = names["measurement"]
    exported = normalised(out / measurements, drop=CURATE_COLUMNS)
    pd.testing.assert_frame_equal(exported, normalised(original / measurements))  # row order too
    # nothing to change but the measurement table (curate's columns): copied byte for byte
    for file in (f"{name}.yaml", *names["sbml"], *names["condition"], *names["observable"],
                 *names["parameter"], *names["visualization"]):  # fmt: skip
        assert (out / file).read_bytes() == (original / file).read_bytes(), file
    assert lint(out / f"{name}.yaml") is False
    assert llh(out / f"{name}.yaml") == pytest.approx(llh(problem_yaml(name)), rel=1e-13)
    stored = result.manifest["petab_problem"]
    assert (stored["id"], stored["version"]) == (catalog.problems()[0].id, 1)
    assert stored["rewritten"] == [measurements] and stored["noise_placeholders"] == {}


@pytest.mark.parametrize("name", [BOEHM, FUJITA])
def test_the_manifest_hashes_every_file_written(catalog, tmp_path, name):
    catalog.import_petab(problem_yaml(name))
    result = catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    on_disk = {
        str(p.relative_to(tmp_path / "p")): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in (tmp_path / "p").rglob("*")
        if p.is_file() and p.name != "manifest.json"
    }
    manifest = json.loads((tmp_path / "p" / "manifest.json").read_text())
    assert manifest["files"] == on_disk == result.files
    assert manifest["petab_problem"]["source"] == f"{name}.yaml"


def grade_all(catalog, results, grade, *, but=None):
    for r in results:
        catalog.grade(r.id, grade if r.id != but else "B", reason="test")


def test_trust_becomes_one_more_noise_placeholder_where_sigma_is_estimated(catalog, tmp_path):
    # Boehm: sigma is an estimated parameter per observable (noiseParameters sd_<observable>)
    results = catalog.import_petab(problem_yaml(BOEHM))
    dataset = "model1_data1_pSTAT5B_rel"
    grade_all(catalog, results, "A", but=dataset)
    result = catalog.export("petab", tmp_path / "p")  # the default policy: B inflates by 2
    out = tmp_path / "p"
    observables = pd.read_csv(out / "observables_Boehm_JProteomeRes2014.tsv", sep="\t", index_col=0)
    assert observables.loc["pSTAT5B_rel", "noiseFormula"] == (
        "(noiseParameter1_pSTAT5B_rel) * noiseParameter2_pSTAT5B_rel"
    )
    assert observables.loc["pSTAT5A_rel", "noiseFormula"] == "noiseParameter1_pSTAT5A_rel"
    measurements = pd.read_csv(out / "measurementData_Boehm_JProteomeRes2014.tsv", sep="\t")
    graded = measurements[measurements.datasetId == dataset]
    table = catalog.weighted_table()
    chosen = table[table.dataset_id == dataset]
    expected = np.sqrt(chosen["inflation"] / chosen["balance"]).to_numpy()
    assert set(chosen["inflation"]) == {2.0} and set(chosen["balance"]) == {1.0}
    names, factors = zip(*(cell.split(";") for cell in graded["noiseParameters"]), strict=True)
    assert set(names) == {"sd_pSTAT5B_rel"}
    assert set(factors) == {f"{math.sqrt(2):.15g}"} == {"1.4142135623731"}
    np.testing.assert_allclose(np.array(factors, dtype=float), expected, rtol=1e-14)
    others = measurements[measurements.observableId != "pSTAT5B_rel"]
    assert set(others["noiseParameters"]) == {"sd_pSTAT5A_rel", "sd_rSTAT5A_rel"}
    assert result.manifest["petab_problem"]["noise_placeholders"] == {
        "pSTAT5B_rel": "noiseParameter2_pSTAT5B_rel"
    }
    readme = (out / "README.txt").read_text()
    assert "(<original noiseFormula>) * noiseParameter<k+1>_<observableId>" in readme
    assert "Observables with a factor: pSTAT5B_rel (noiseParameter2_pSTAT5B_rel)." in readme
    assert lint(out / "Boehm_JProteomeRes2014.yaml") is False


def reference_llh(name, factor_of, simulation=1.1):
    """Give the log-likelihood of the ORIGINAL problem with each dataset's sigma multiplied by
    its trust factor, computed here from the tables (normal noise on the linear scale, as both
    problems declare; sigma = noiseParameter1: a number, or a parameter's nominal value)."""
    folder = DATA / "petab" / name
    names = table_names(problem_yaml(name))
    observables = pd.read_csv(folder / names["observable"][0], sep="\t", index_col=0)
    assert set(observables["noiseDistribution"]) == {"normal"}
    assert set(observables["observableTransformation"]) == {"lin"}
    assert all(observables["noiseFormula"] == "noiseParameter1_" + observables.index)
    nominal = pd.read_csv(folder / names["parameter"][0], sep="\t", index_col=0)["nominalValue"]
    rows = pd.read_csv(folder / names["measurement"][0], sep="\t", dtype={"noiseParameters": str})
    total = 0.0
    for _, row in rows.iterrows():
        given = row["noiseParameters"]
        sigma = float(nominal[given]) if given in nominal.index else float(given)
        sigma *= factor_of[row["datasetId"]]
        m, s = float(row["measurement"]), simulation * float(row["measurement"])
        total -= 0.5 * math.log(2 * math.pi * sigma**2) + 0.5 * ((s - m) / sigma) ** 2
    return total


@pytest.mark.parametrize(("name", "dataset"), [(BOEHM, "model1_data1_pSTAT5B_rel"),
                                               (FUJITA, "condition_step_01_0_pAkt_tot")])  # fmt: skip
def test_the_exported_objective_is_the_original_with_sigma_scaled_by_trust(
    catalog, tmp_path, name, dataset
):
    results = catalog.import_petab(problem_yaml(name))
    grade_all(catalog, results, "A", but=dataset)
    catalog.export("petab", tmp_path / "p")
    table = catalog.weighted_table()
    factor_of = {
        str(i): math.sqrt(g["inflation"].iloc[0] / g["balance"].iloc[0])
        for i, g in table.groupby("dataset_id", observed=True)
    }
    assert factor_of[dataset] == pytest.approx(math.sqrt(2)) and set(factor_of.values()) == {1.0, factor_of[dataset]}  # fmt: skip
    exported = llh(tmp_path / "p" / f"{name}.yaml")
    assert exported == pytest.approx(reference_llh(name, factor_of), rel=1e-12)
    # and the trust changed it: the original problem's objective is another number
    assert abs(exported - llh(problem_yaml(name))) > 1e-3
    assert lint(tmp_path / "p" / f"{name}.yaml") is False


def test_numeric_noise_gets_the_factor_appended_on_every_row_of_its_observable(catalog, tmp_path):
    # Fujita: sigma is a number per row (0.01); one dataset of pAkt_tot graded B
    results = catalog.import_petab(problem_yaml(FUJITA))
    dataset = "condition_step_01_0_pAkt_tot"
    grade_all(catalog, results, "A", but=dataset)
    catalog.export("petab", tmp_path / "p")
    measurements = pd.read_csv(tmp_path / "p" / "measurementData_step_Fujita_SciSignal2010.tsv",
                               sep="\t", dtype=str, keep_default_na=False)  # fmt: skip
    original = pd.read_csv(DATA / "petab" / FUJITA / "measurementData_step_Fujita_SciSignal2010.tsv",
                           sep="\t", dtype=str, keep_default_na=False)  # fmt: skip
    akt = original.observableId == "pAkt_tot"
    factor = np.where(original["datasetId"] == dataset, ";1.4142135623731", ";1")
    expected = np.where(akt, original["noiseParameters"] + factor, original["noiseParameters"])
    assert measurements["noiseParameters"].tolist() == expected.tolist()
    assert {"0.01", "0.03"} <= set(original[akt]["noiseParameters"])  # numbers of their own


def test_a_subset_keeps_what_its_rows_use_and_lints(catalog, tmp_path):
    catalog.import_petab(problem_yaml(BOEHM))
    dataset = "model1_data1_pSTAT5A_rel"
    result = catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path),
                            selection=Selection(ids=(dataset,)))  # fmt: skip
    out = tmp_path / "p"
    measurements = normalised(
        out / "measurementData_Boehm_JProteomeRes2014.tsv", drop=CURATE_COLUMNS
    )
    original = normalised(DATA / "petab" / BOEHM / "measurementData_Boehm_JProteomeRes2014.tsv")
    pd.testing.assert_frame_equal(measurements, original[original.datasetId == dataset].reset_index(drop=True))  # fmt: skip
    observables = pd.read_csv(out / "observables_Boehm_JProteomeRes2014.tsv", sep="\t")
    assert observables["observableId"].tolist() == ["pSTAT5A_rel"]
    parameters = pd.read_csv(out / "parameters_Boehm_JProteomeRes2014.tsv", sep="\t")
    # the other observables' noise parameters only their rows used; model parameters all stay
    left_out = result.manifest["petab_problem"]["left_out"]
    assert left_out["parameters"] == ["sd_pSTAT5B_rel", "sd_rSTAT5A_rel"]
    assert len(parameters) == 11 - 2 and "specC17" in set(parameters["parameterId"])
    assert left_out["observables"] == ["pSTAT5B_rel", "rSTAT5A_rel"]
    plots = pd.read_csv(out / "visualizationSpecification_Boehm_JProteomeRes2014.tsv", sep="\t")
    assert plots["datasetId"].tolist() == [dataset]
    assert (out / "model_Boehm_JProteomeRes2014.xml").read_bytes() == (
        DATA / "petab" / BOEHM / "model_Boehm_JProteomeRes2014.xml"
    ).read_bytes()
    assert lint(out / "Boehm_JProteomeRes2014.yaml") is False


def test_an_excluded_grade_leaves_its_rows_out_and_the_rest_lints(catalog, tmp_path):
    results = catalog.import_petab(problem_yaml(FUJITA))
    dropped = "condition_step_00_1_pEGFR_tot"
    for r in results:
        catalog.grade(r.id, "X" if r.id == dropped else "A", reason="test")
    catalog.export("petab", tmp_path / "p")
    measurements = pd.read_csv(
        tmp_path / "p" / "measurementData_step_Fujita_SciSignal2010.tsv", sep="\t"
    )
    original = pd.read_csv(DATA / "petab" / FUJITA / "measurementData_step_Fujita_SciSignal2010.tsv", sep="\t")  # fmt: skip
    assert dropped not in set(measurements["datasetId"])
    assert len(measurements) == len(original) - (original.datasetId == dropped).sum()
    plots = pd.read_csv(tmp_path / "p" / "visualizationSpecification_Fujita_SciSignal2010.tsv", sep="\t")  # fmt: skip
    assert dropped not in set(plots["datasetId"]) and len(plots) == 18 - 1
    assert lint(tmp_path / "p" / "Fujita_SciSignal2010.yaml") is False


def test_rows_come_back_in_the_file_order_though_intake_sorts_by_time(catalog, tmp_path):
    folder = tmp_path / "shuffled"
    shutil.copytree(DATA / "petab" / BOEHM, folder)
    path = folder / "measurementData_Boehm_JProteomeRes2014.tsv"
    header, *rows = path.read_bytes().decode().splitlines()
    rows = rows[::-1]  # latest times first: intake sorts each dataset's points by time
    path.write_text("\n".join([header, *rows]) + "\n")
    catalog.import_petab(folder / f"{BOEHM}.yaml")
    catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    exported = normalised(tmp_path / "p" / path.name, drop=CURATE_COLUMNS)
    pd.testing.assert_frame_equal(exported, normalised(path))
    assert exported["time"].iloc[0] == "240.0"


def test_a_selection_mixing_a_problem_with_other_data_is_refused(catalog, tmp_path):
    catalog.import_petab(problem_yaml(BOEHM))
    absolute, relative = add_mixed_observable(catalog)
    with pytest.raises(InputError) as caught:
        catalog.export("petab", tmp_path / "p")
    message = str(caught.value)
    assert "\n" not in message and message.startswith("petab export: the selection mixes")
    assert f"no stored problem ({absolute}, {relative})" in message
    assert "stored problem boehm_jproteomeres2014_01 (model1_data1_pSTAT5A_rel, " in message
    assert not (tmp_path / "p").exists()  # refused before anything is written
    # each part alone exports
    catalog.export("petab", tmp_path / "q", selection=Selection(ids=(absolute, relative)))
    assert (tmp_path / "q" / "measurements.tsv").is_file()  # today's export, unchanged


def test_a_selection_from_two_problems_is_refused(catalog, tmp_path):
    catalog.import_petab(problem_yaml(BOEHM))
    catalog.import_petab(problem_yaml(FUJITA))
    with pytest.raises(InputError, match=r"boehm_jproteomeres2014_01 \(model1_data1_pSTAT5A_rel, model1_data1_pSTAT5B_rel, model1_data1_rSTAT5A_rel\) with datasets of stored problem fujita_scisignal2010_01 \(condition_step_00_1_pAkt_tot, .* and 13 more\)"):  # fmt: skip
        catalog.export("petab", tmp_path / "p")
    assert not (tmp_path / "p").exists()


@pytest.mark.parametrize("name", [BOEHM, FUJITA])
def test_the_export_imports_into_a_fresh_catalog_as_the_same_data(catalog, tmp_path, name):
    results = catalog.import_petab(problem_yaml(name))
    grade_all(catalog, results, "A", but=results[0].id)
    catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    with curate.open_catalog(tmp_path / "fresh.db", actor="tester") as fresh:
        again = fresh.import_petab(tmp_path / "p" / f"{name}.yaml")
        assert [r.id for r in again] == [r.id for r in results]
        for first, second in zip(results, again, strict=True):
            before, after = catalog.show(first.id), fresh.show(second.id)
            assert after.record.conditions == before.record.conditions
            assert after.record.observable.id == before.record.observable.id
            assert after.grade == before.grade  # curateGrade carried the grades back
            pd.testing.assert_frame_equal(fresh.points(second.id), catalog.points(first.id))
        (stored,) = fresh.problems()
        assert stored.source == f"{name}.yaml"
        for file, raw in stored.files.items():  # YAML, SBML, tables: what the export wrote
            assert raw == (tmp_path / "p" / file).read_bytes(), file
        named = {file for files in table_names(problem_yaml(name)).values() for file in files}
        assert set(stored.files) == {f"{name}.yaml", *named}


def test_cli_export_of_a_stored_problem(cli, tmp_path):
    assert cli("import-petab", problem_yaml(BOEHM)).code == 0
    policy = neutral(tmp_path)
    run = cli("export", "petab", tmp_path / "p", "--policy", policy)
    assert run.code == 0, run.err
    assert "petab export of 3 dataset versions (48 points)" in run.out
    assert "measurementData_Boehm_JProteomeRes2014.tsv" in run.out
    assert (tmp_path / "p" / "model_Boehm_JProteomeRes2014.xml").is_file()
    run = cli("export", "petab", tmp_path / "q", "--policy", policy, "--json")
    assert run.code == 0, run.err
    payload = json.loads(run.out)
    assert set(payload) == {"format", "outdir", "files", "manifest_sha256", "weights"}
    assert set(payload["files"]) == {p.name for p in (tmp_path / "q").iterdir()} - {"manifest.json"}
    assert lint(tmp_path / "q" / "Boehm_JProteomeRes2014.yaml") is False


def test_cli_refuses_a_mixed_selection_in_one_line(cli, tmp_path):
    assert cli("import-petab", problem_yaml(BOEHM)).code == 0
    assert cli("import-petab", problem_yaml(FUJITA)).code == 0
    run = cli("export", "petab", tmp_path / "p")
    assert run.code == 2 and run.err.count("\n") == 1 and "Traceback" not in run.err
    assert "the selection mixes datasets of stored problem boehm_jproteomeres2014_01" in run.err
    assert not (tmp_path / "p").exists()


def test_petablint_passes_on_the_export_with_its_model(catalog, tmp_path):
    import subprocess
    import sys

    catalog.import_petab(problem_yaml(FUJITA))
    catalog.export("petab", tmp_path / "p")
    run = subprocess.run(
        [sys.executable, "-m", "petab.petablint", str(tmp_path / "p" / f"{FUJITA}.yaml")],
        capture_output=True,
        text=True,
        check=False,
    )
    assert run.returncode == 0, run.stdout + run.stderr


def test_an_edited_problem_exports_its_newest_version(catalog, tmp_path):
    folder = tmp_path / "edited"
    shutil.copytree(DATA / "petab" / BOEHM, folder)
    catalog.import_petab(folder / f"{BOEHM}.yaml")
    parameters = folder / "parameters_Boehm_JProteomeRes2014.tsv"
    parameters.write_bytes(parameters.read_bytes().replace(b"k_phos\tk_{phos}\tlog10\t1E-05\t100000", b"k_phos\tk_{phos}\tlog10\t1E-05\t1000"))  # fmt: skip
    again = catalog.import_petab(folder / f"{BOEHM}.yaml")
    assert not any(r.added for r in again) and again[0].problem.version == 2
    result = catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    # the datasets stay linked to version 1 (their data did not change); the export takes
    # the problem as it stands now
    assert result.manifest["petab_problem"]["version"] == 2
    assert (tmp_path / "p" / parameters.name).read_bytes() == parameters.read_bytes()


def test_every_noise_model_and_transformation_takes_the_factor_exactly(catalog, tmp_path):
    # Boehm with its noise models changed here (not as published): laplace noise on the log10
    # scale with two noise placeholders (one estimated, one a number); normal noise on the ln
    # scale with a constant formula and empty cells
    folder = tmp_path / "variant"
    shutil.copytree(DATA / "petab" / BOEHM, folder)
    observables_file = folder / "observables_Boehm_JProteomeRes2014.tsv"
    observables = pd.read_csv(observables_file, sep="\t", dtype=str, keep_default_na=False)
    changes = {
        "pSTAT5A_rel": ("noiseParameter1_pSTAT5A_rel + noiseParameter2_pSTAT5A_rel", "log10", "laplace"),
        "pSTAT5B_rel": ("0.5", "log", "normal"),
    }  # fmt: skip
    for observable, (formula, transformation, distribution) in changes.items():
        row = observables.observableId == observable
        observables.loc[row, ["noiseFormula", "observableTransformation", "noiseDistribution"]] = (
            formula, transformation, distribution,
        )  # fmt: skip
    observables.to_csv(observables_file, sep="\t", index=False)
    measurements_file = folder / "measurementData_Boehm_JProteomeRes2014.tsv"
    rows = pd.read_csv(measurements_file, sep="\t", dtype=str, keep_default_na=False)
    rows.loc[rows.observableId == "pSTAT5A_rel", "noiseParameters"] = "sd_pSTAT5A_rel;0.05"
    rows.loc[rows.observableId == "pSTAT5B_rel", "noiseParameters"] = ""
    rows.to_csv(measurements_file, sep="\t", index=False)
    parameters_file = folder / "parameters_Boehm_JProteomeRes2014.tsv"
    parameters = pd.read_csv(parameters_file, sep="\t", dtype=str, keep_default_na=False)
    parameters[parameters.parameterId != "sd_pSTAT5B_rel"].to_csv(parameters_file, sep="\t", index=False)  # fmt: skip
    assert lint(folder / f"{BOEHM}.yaml") is False  # the variant is a valid problem itself
    results = catalog.import_petab(folder / f"{BOEHM}.yaml")
    grades = {"model1_data1_pSTAT5A_rel": "B", "model1_data1_pSTAT5B_rel": "C", "model1_data1_rSTAT5A_rel": "A"}  # fmt: skip
    for r in results:
        catalog.grade(r.id, grades[r.id], reason="test")
    catalog.export("petab", tmp_path / "p")  # the default policy: B inflates by 2, C by 4
    out = tmp_path / "p"
    exported = pd.read_csv(out / observables_file.name, sep="\t", index_col=0)["noiseFormula"]
    assert exported.to_dict() == {
        "pSTAT5A_rel": f"({changes['pSTAT5A_rel'][0]}) * noiseParameter3_pSTAT5A_rel",
        "pSTAT5B_rel": "(0.5) * noiseParameter1_pSTAT5B_rel",
        "rSTAT5A_rel": "noiseParameter1_rSTAT5A_rel",
    }
    written = pd.read_csv(out / measurements_file.name, sep="\t", dtype=str, keep_default_na=False)
    assert written.groupby("observableId")["noiseParameters"].unique().map(list).to_dict() == {
        "pSTAT5A_rel": ["sd_pSTAT5A_rel;0.05;1.4142135623731"],
        "pSTAT5B_rel": ["2"],
        "rSTAT5A_rel": ["sd_rSTAT5A_rel"],
    }
    assert lint(out / f"{BOEHM}.yaml") is False
    # the reference: each PEtab noise density (PEtab 1 documentation, written from memory)
    # with sigma multiplied by sqrt(inflation), y the measurement and s = 1.1 y the simulation
    nominal = pd.read_csv(parameters_file, sep="\t", index_col=0)["nominalValue"]
    total = 0.0
    for _, row in rows.iterrows():
        y = float(row["measurement"])
        s = 1.1 * y
        if row["observableId"] == "pSTAT5A_rel":  # laplace on log10 y, scale sigma
            sigma = (nominal["sd_pSTAT5A_rel"] + 0.05) * math.sqrt(2)
            total -= math.log(2 * sigma * y * math.log(10)) + abs(math.log10(s) - math.log10(y)) / sigma  # fmt: skip
        elif row["observableId"] == "pSTAT5B_rel":  # normal on ln y
            sigma = 0.5 * math.sqrt(4)
            total -= 0.5 * math.log(2 * math.pi * sigma**2 * y**2) + 0.5 * ((math.log(s) - math.log(y)) / sigma) ** 2  # fmt: skip
        else:  # normal on y
            sigma = nominal["sd_rSTAT5A_rel"]
            total -= 0.5 * math.log(2 * math.pi * sigma**2) + 0.5 * ((s - y) / sigma) ** 2
    assert llh(out / f"{BOEHM}.yaml") == pytest.approx(total, rel=1e-12)


def test_datasets_imported_before_row_numbers_were_kept_still_export(catalog, tmp_path):
    # a dataset version without annotations['petab_row_index'] (imported by an earlier curate):
    # its rows follow the others, in the stored (time-sorted) order
    catalog.import_petab(problem_yaml(BOEHM))
    dataset = "model1_data1_pSTAT5A_rel"
    annotations = dict(catalog.show(dataset).record.annotations)
    del annotations["petab_row_index"]
    catalog.new_version(dataset, kind="revise", reason="test", update={"annotations": annotations})
    catalog.export("petab", tmp_path / "p", policy=neutral(tmp_path))
    exported = normalised(tmp_path / "p" / "measurementData_Boehm_JProteomeRes2014.tsv", drop=CURATE_COLUMNS)  # fmt: skip
    original = normalised(DATA / "petab" / BOEHM / "measurementData_Boehm_JProteomeRes2014.tsv")
    first = original.datasetId == dataset
    expected = pd.concat([original[~first], original[first]], ignore_index=True)
    pd.testing.assert_frame_equal(exported, expected)
    assert lint(tmp_path / "p" / f"{BOEHM}.yaml") is False
