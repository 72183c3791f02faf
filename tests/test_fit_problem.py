"""`curate fit --problem ID` on stored PEtab problems, checked against the PEtab test suite."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import NEUTRAL

import curate

# The PEtab test suite, version 1.0.0, SBML cases 0001-0018 (package `petabtests` 0.0.1 on PyPI,
# BSD-3-Clause, https://github.com/PEtab-dev/petab_test_suite): each case gives the problem and
# the expected chi2, log-likelihood and simulations at the nominal parameters, with its own
# tolerances. The case files are copied into tests/data/petab_suite with the suite's licence:
# the package's sdist requires pysb, whose build downloads setuptools from the network.
SUITE = Path(__file__).parent / "data" / "petab_suite" / "sbml"
CASES = [f"{k:04d}" for k in range(1, 19)]


KEYS = ["observableId", "simulationConditionId", "time"]


@pytest.fixture
def neutral(tmp_path: Path) -> Path:
    path = tmp_path / "neutral.toml"
    path.write_text(NEUTRAL)
    return path


def _import(cli, tmp_path: Path, yaml_path: Path) -> str:
    catalog = tmp_path / "curate.db"
    run = cli("import-petab", yaml_path, "--lab", "Suite lab", catalog_path=catalog)
    assert run.code == 0, run.err
    listed = cli("models", "--json", catalog_path=catalog)
    assert listed.code == 0, listed.err
    (problem,) = json.loads(listed.out)
    return str(problem["id"])


@pytest.mark.parametrize("case", CASES)
def test_petab_suite_case_evaluates_to_its_chi2_llh_and_simulations(case, cli, tmp_path, neutral):
    folder = SUITE / case
    solution = yaml.safe_load((folder / f"_{case}_solution.yaml").read_text())
    problem_id = _import(cli, tmp_path, folder / f"_{case}.yaml")
    simulations = tmp_path / "simulations.tsv"
    run = cli("fit", "--problem", problem_id, "--evaluate", "--simulations", simulations,
              "--policy", neutral, "--json", catalog_path=tmp_path / "curate.db")  # fmt: skip
    assert run.code == 0, run.err
    result = json.loads(run.out)
    assert result["chi2"] == pytest.approx(solution["chi2"], abs=solution["tol_chi2"])
    assert -result["nllh"] == pytest.approx(solution["llh"], abs=solution["tol_llh"])
    ours = pd.read_csv(simulations, sep="\t", keep_default_na=False)
    theirs = pd.concat(
        [pd.read_csv(folder / name, sep="\t", keep_default_na=False)
         for name in solution["simulation_files"]]
    )  # fmt: skip
    assert len(ours) == len(theirs)
    keys = KEYS + (["preequilibrationConditionId"]
                   if "preequilibrationConditionId" in theirs.columns else [])  # fmt: skip
    for frame in (ours, theirs):
        frame["time"] = frame["time"].astype(float)
        for key in keys[1:]:
            frame[key] = frame[key].astype(str) if key != "time" else frame[key]
    ours = ours.sort_values([*keys, "simulation"], kind="stable").reset_index(drop=True)
    theirs = theirs.sort_values([*keys, "simulation"], kind="stable").reset_index(drop=True)
    assert (ours[keys].astype(str).to_numpy() == theirs[keys].astype(str).to_numpy()).all()
    np.testing.assert_allclose(
        ours["simulation"].to_numpy(float), theirs["simulation"].to_numpy(float),
        atol=solution["tol_simulations"], rtol=0,
    )  # fmt: skip


def test_unknown_problem_is_one_line(cli, tmp_path, neutral):
    folder = SUITE / "0001"
    _import(cli, tmp_path, folder / "_0001.yaml")
    run = cli("fit", "--problem", "nope", "--evaluate", catalog_path=tmp_path / "curate.db")
    assert run.code == 2
    assert run.err.strip().count("\n") == 0
    assert "--problem nope: no such stored problem" in run.err


def test_problem_and_model_together_are_refused(cli, tmp_path):
    _import(cli, tmp_path, SUITE / "0001" / "_0001.yaml")
    run = cli("fit", "--problem", "x", "--model", "m.py:f", catalog_path=tmp_path / "curate.db")
    assert run.code == 2
    assert "not both" in run.err


def test_simulations_into_a_missing_folder_is_refused_before_any_work(cli, tmp_path):
    problem_id = _import(cli, tmp_path, SUITE / "0001" / "_0001.yaml")
    run = cli("fit", "--problem", problem_id, "--evaluate", "--simulations",
              tmp_path / "no" / "sim.tsv", catalog_path=tmp_path / "curate.db")  # fmt: skip
    assert run.code == 2
    assert "no folder" in run.err
    assert not (tmp_path / "no").exists()


def test_fit_from_the_nominal_point_does_not_end_worse_and_records_tolerances(
    cli, tmp_path, neutral
):
    problem_id = _import(cli, tmp_path, SUITE / "0002" / "_0002.yaml")
    catalog = tmp_path / "curate.db"
    start = json.loads(cli("fit", "--problem", problem_id, "--evaluate", "--policy", neutral,
                           "--json", catalog_path=catalog).out)  # fmt: skip
    run = cli("fit", "--problem", problem_id, "--policy", neutral, "--json",
              "--relative-tolerance", "1e-9", catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    fitted = json.loads(run.out)
    assert fitted["objective"] == "nllh"
    assert fitted["nllh"] <= start["nllh"] + 1e-9
    with curate.open_catalog(catalog) as opened:
        (event,) = [e for e in opened.events() if e["kind"] == "fit"][-1:]
    backend = event["payload"]["backend"]
    assert backend["kind"] == "petab-sbml"
    assert backend["tolerances"]["relative"] == 1e-9
    assert "files" not in backend  # the run record names the stored problem, not its bytes
    assert event["payload"]["result"]["problem"]["id"] == problem_id


@pytest.mark.parametrize(
    ("formula", "reason"),
    [
        ("2 * * A", "an operator without its operand"),
        ("A +", "an operator without its operand"),
        ("(A + 1", "unbalanced parentheses"),
        ("A + 1)", "unbalanced parentheses"),
        ("A B", "not an arithmetic expression PEtab v1 reads"),
    ],
)
def test_a_formula_that_does_not_read_is_named_with_its_reason(formula, reason):
    from curate.errors import InputError
    from curate.fit.petab.formulas import parse_formula

    with pytest.raises(InputError) as caught:
        parse_formula(formula, where="obs.tsv, row 2 (o), observableFormula")
    assert str(caught.value) == (
        f"obs.tsv, row 2 (o), observableFormula: cannot read formula '{formula}' ({reason})"
    )


def test_formulas_compute_what_python_computes():
    # the parser's results against the same arithmetic written in Python (power as ^ and **)
    from curate.fit.petab.formulas import parse_formula

    values = {"A": np.array([0.5, 2.0]), "k": np.array([3.0, 3.0])}
    cases = {"k * A^2 + 1": values["k"] * values["A"] ** 2 + 1,
             "log10(A) - ln(k)": np.log10(values["A"]) - np.log(values["k"]),
             "exp(-A) / (1 + A**k)": np.exp(-values["A"]) / (1 + values["A"] ** values["k"])}  # fmt: skip
    for text, expected in cases.items():
        np.testing.assert_allclose(parse_formula(text, where="w")(values, 2), expected, rtol=1e-15)
