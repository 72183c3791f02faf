"""Stored benchmark problems fitted and checked end to end: Boehm 2014 and Fujita 2010.

Problems: Boehm et al., J. Proteome Res. 2014 (doi 10.1021/pr5006923) and Fujita et al.,
Sci. Signal. 2010 (doi 10.1126/scisignal.2000810), from the public PEtab benchmark collection
(Benchmark-Models-PEtab; tests/data/petab/ holds its files unchanged). The outside reference for
the objective is petab's own likelihood (``petab.v1.calculate_llh``) applied to the simulation
table curate writes; Boehm's best objective, 138.222, is the value the benchmark collection
reports for it (from memory).
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

import pandas as pd
import pytest
from conftest import DATA, NEUTRAL, write

pv1 = pytest.importorskip("petab.v1")

BOEHM, FUJITA = "Boehm_JProteomeRes2014", "Fujita_SciSignal2010"
PROBLEM_ID = {BOEHM: "boehm_jproteomeres2014_01", FUJITA: "fujita_scisignal2010_01"}


def problem_yaml(name: str) -> Path:
    return DATA / "petab" / name / f"{name}.yaml"


@pytest.fixture
def neutral(tmp_path: Path) -> Path:
    return write(tmp_path / "neutral.toml", NEUTRAL)


def _imported(cli, catalog: Path, yaml_path: Path) -> str:
    run = cli("import-petab", yaml_path, catalog_path=catalog)
    assert run.code == 0, run.err
    (stored,) = json.loads(cli("models", "--json", catalog_path=catalog).out)
    return str(stored["id"])


def _evaluate(cli, catalog: Path, problem_id: str, policy: Path, simulations: Path | None = None):
    extra = ["--simulations", simulations] if simulations else []
    run = cli("fit", "--problem", problem_id, "--evaluate", "--policy", policy, "--json", *extra,
              catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    return json.loads(run.out)


def _petab_llh(yaml_path: Path, simulations: Path) -> float:
    """Give petab's log-likelihood of a problem at its nominal parameters for our simulations."""
    logging.getLogger("petab").setLevel(logging.CRITICAL)
    problem = pv1.Problem.from_yaml(str(yaml_path))
    # our table is the measurement rows as imported plus `simulation`: it serves as both
    table = pd.read_csv(simulations, sep="\t", keep_default_na=False, dtype=str)
    assert len(table) == len(problem.measurement_df)
    measurements = table.drop(columns=["simulation"]).replace("", float("nan"))
    for column in ("measurement", "time"):
        measurements[column] = measurements[column].astype(float)
    simulated = measurements.assign(
        simulation=pd.Series([float(x) for x in table["simulation"]], dtype=object)
    )
    parameters = problem.parameter_df.copy()
    # Python floats: the sympy here cannot read numpy 2 floats inside petab's substitution
    parameters["nominalValue"] = pd.Series(
        [float(x) for x in parameters["nominalValue"]], index=parameters.index, dtype=object
    )
    return float(pv1.calculate_llh(measurements, simulated, problem.observable_df, parameters))


@pytest.mark.parametrize("name", [BOEHM, FUJITA])
def test_the_nominal_objective_is_petabs_likelihood_of_our_simulations(
    cli, tmp_path, neutral, name
):
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(name))
    simulations = tmp_path / "simulations.tsv"
    result = _evaluate(cli, catalog, problem_id, neutral, simulations)
    assert result["objective"] == "nllh"
    assert -result["nllh"] == pytest.approx(_petab_llh(problem_yaml(name), simulations), rel=1e-9)
    if name == BOEHM:  # the benchmark collection's reported optimum (from memory): 138.222
        assert result["nllh"] == pytest.approx(138.222, abs=1e-3)


@pytest.mark.parametrize("name", [BOEHM, FUJITA])
def test_export_then_import_gives_the_same_objective(cli, tmp_path, neutral, name):
    catalog, fresh = tmp_path / "c.db", tmp_path / "fresh.db"
    problem_id = _imported(cli, catalog, problem_yaml(name))
    before = _evaluate(cli, catalog, problem_id, neutral)
    assert (
        cli("export", "petab", tmp_path / "out", "--policy", neutral, catalog_path=catalog).code
        == 0
    )
    again = _imported(cli, fresh, tmp_path / "out" / f"{name}.yaml")
    after = _evaluate(cli, fresh, again, neutral)
    assert after["nllh"] == pytest.approx(before["nllh"], rel=1e-12)
    assert after["chi2"] == pytest.approx(before["chi2"], rel=1e-12)


def test_trust_exported_is_the_objective_curate_fits(cli, tmp_path, neutral):
    # the default policy inflates an ungraded dataset's sigma; the export writes that factor
    # into the noise formulas, so the exported problem under a neutral policy is the same
    # objective as the stored problem under the default policy
    catalog, fresh = tmp_path / "c.db", tmp_path / "fresh.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    datasets = json.loads(cli("models", "--json", catalog_path=catalog).out)[0]["datasets"]
    assert cli("grade", datasets[0], "A", "--reason", "checked", catalog_path=catalog).code == 0
    assert cli("grade", datasets[1], "B", "--reason", "checked", catalog_path=catalog).code == 0
    run = cli("fit", "--problem", problem_id, "--evaluate", "--json", catalog_path=catalog)
    weighted = json.loads(run.out)
    neutral_start = _evaluate(cli, catalog, problem_id, neutral)
    assert weighted["nllh"] != pytest.approx(neutral_start["nllh"], abs=1e-3)  # trust acts
    assert cli("export", "petab", tmp_path / "out", catalog_path=catalog).code == 0
    again = _imported(cli, fresh, tmp_path / "out" / f"{BOEHM}.yaml")
    assert _evaluate(cli, fresh, again, neutral)["nllh"] == pytest.approx(
        weighted["nllh"], rel=1e-10
    )


def test_a_fit_from_the_nominal_parameters_does_not_end_worse(cli, tmp_path, neutral):
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    start = _evaluate(cli, catalog, problem_id, neutral)
    run = cli("fit", "--problem", problem_id, "--policy", neutral, "--json", catalog_path=catalog)
    assert run.code == 0, run.err
    fitted = json.loads(run.out)
    assert fitted["nllh"] <= start["nllh"] + 1e-7
    assert fitted["nllh"] == pytest.approx(138.222, abs=1e-3)
    assert len(fitted["parameters"]) == 11  # nine estimated, two fixed (ratio, specC17)
    assert fitted["parameters"]["ratio"] == {"value": 0.693, "stderr": None}


@pytest.mark.parametrize(
    ("name", "by", "groups"),
    [
        (BOEHM, "dataset", ["model1_data1_pSTAT5A_rel", "model1_data1_pSTAT5B_rel",
                            "model1_data1_rSTAT5A_rel"]),
        (FUJITA, "condition:EGF_0", ["0.1", "0.3", "1", "3", "10", "30"]),
    ],
)  # fmt: skip
def test_leave_one_group_out_runs_to_completion_for_every_group(
    cli, tmp_path, neutral, name, by, groups
):
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(name))
    run = cli("sensitivity", "--problem", problem_id, "--by", by, "--workers", "2",
              "--policy", neutral, "--json", catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    result = json.loads(run.out)
    assert [g["group"] for g in result["groups"]] == groups
    for group in result["groups"]:
        assert group["error"] is None, group
        assert group["converged"], group
        assert group["n_points"] > 0
        moved = [p for p in group["parameters"].values() if p["value"] is not None]
        assert moved, group
    assert result["full"]["nllh"] <= _evaluate(cli, catalog, problem_id, neutral)["nllh"] + 1e-7


@pytest.mark.slow
def test_a_multi_start_fit_from_the_bounds_reaches_the_best_objective(cli, tmp_path, neutral):
    # 60 Latin-hypercube starts inside the parameter table's bounds (log10 1e-5..1e5 for all
    # nine), besides the nominal start: on this machine class about 90 s, one start in 60
    # reaching 138.22 for seeds 0 and 1 alike (the others end at local optima 140.1, 145.8,
    # 147.5, ...). The optimum 138.222 is the benchmark collection's (from memory) and ours.
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    run = cli("fit", "--problem", problem_id, "--starts", "61", "--seed", "0", "--policy", neutral,
              "--json", catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    result = json.loads(run.out)
    drawn = result["starts"][1:]  # the first start is the nominal point
    assert len(drawn) == 60
    best = min(s["nllh"] for s in drawn if s["nllh"] is not None)
    assert best == pytest.approx(138.222, abs=0.1)
    assert result["nllh"] == pytest.approx(138.222, abs=1e-3)


def test_params_override_the_table_entries_they_name_and_keep_the_others(cli, tmp_path, neutral):
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    spec = write(tmp_path / "fix.toml", "[parameters.k_exp_hetero]\nstart = 1e-5\nfixed = true\n")
    run = cli("fit", "--problem", problem_id, "--params", spec, "--policy", neutral, "--evaluate",
              "--json", catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    result = json.loads(run.out)
    assert result["parameters"]["k_exp_hetero"] == {"value": 1e-5, "stderr": None}
    estimated = [n for n, p in result["parameters"].items() if p["stderr"] is not None]
    assert len(estimated) == 8  # the table's nine estimated, less the one now fixed
    unknown = write(tmp_path / "unknown.toml", "[parameters.k_nope]\nstart = 1\nfixed = true\n")
    refused = cli("fit", "--problem", problem_id, "--params", unknown, catalog_path=catalog)
    assert refused.code == 2
    assert "parameter 'k_nope' is not in" in refused.err and refused.err.count("\n") == 1


def test_the_simulation_table_carries_the_sigma_the_objective_used(cli, tmp_path):
    # under the default policy (trust inflates sigma), the Gaussian log-density of each row at
    # (measurement, simulation, curateSigma) sums to the reported nllh: scipy.stats.norm as the
    # reference (Boehm's observables are all linear-scale, normal noise)
    from scipy import stats

    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    datasets = json.loads(cli("models", "--json", catalog_path=catalog).out)[0]["datasets"]
    assert cli("grade", datasets[0], "B", "--reason", "one blot", catalog_path=catalog).code == 0
    simulations = tmp_path / "sim.tsv"
    run = cli("fit", "--problem", problem_id, "--evaluate", "--simulations", simulations, "--json",
              catalog_path=catalog)  # fmt: skip
    result = json.loads(run.out)
    table = pd.read_csv(simulations, sep="\t")
    density = stats.norm.logpdf(
        table["measurement"], loc=table["simulation"], scale=table["curateSigma"]
    )
    assert -density.sum() == pytest.approx(result["nllh"], rel=1e-12)
    assert any("ungraded" in note for note in result["notes"])  # two datasets left ungraded


def test_a_stored_problem_refits_on_dask_as_it_does_here(cli, tmp_path, neutral):
    pytest.importorskip("dask.distributed")
    catalog = tmp_path / "c.db"
    problem_id = _imported(cli, catalog, problem_yaml(BOEHM))
    found = {}
    for name, extra in (("here", ["--workers", "1"]), ("dask", ["--dask", "local"])):
        run = cli("sensitivity", "--problem", problem_id, "--by", "dataset", "--policy", neutral,
                  "--json", *extra, catalog_path=catalog)  # fmt: skip
        assert run.code == 0, run.err
        found[name] = json.loads(run.out)
    assert found["dask"]["executor"] == "dask (local)"
    for a, b in zip(found["here"]["groups"], found["dask"]["groups"], strict=True):
        assert a["parameters"] == b["parameters"]
