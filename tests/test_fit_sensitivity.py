"""Leave-one-group-out checks against statsmodels' influence measures and independent refits."""

from __future__ import annotations

import io
import json
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest
from conftest import ROOT, write
from scipy import optimize

from curate import fit as fitting
from curate.errors import InputError
from curate.fit import sensitivity


def line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


SPEC = fitting.spec_from_dict({"parameters": {"a": {"start": 0.0}, "b": {"start": 0.0}}})


def linear_problem(n=12, seed=0, per_group=1):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, n)
    y = 1.5 + 0.7 * x + rng.normal(0, 0.4, n)
    y[3] += 2.0  # an influential point
    points = pd.DataFrame({"time": x, "value": y, "weight": 1.0, "relative": False,
                           "dataset_id": [f"g{k // per_group}" for k in range(n)]})  # fmt: skip
    problem = fitting.FitProblem(points, line, SPEC)
    full = fitting.fit(problem, fitting.FitOptions(scale_covariance=True, tolerance=1e-14))
    return problem, full, points


@pytest.mark.parametrize("method", ["exact", "one-step", "auto"])
def test_linear_shifts_and_cook_match_statsmodels(method):
    # reference: statsmodels OLSInfluence (dfbeta = params - params without i; Cook's distance
    # with the covariance scaled by the residual variance)
    influence_module = pytest.importorskip("statsmodels.stats.outliers_influence")
    sm = pytest.importorskip("statsmodels.api")
    problem, full, points = linear_problem()
    result = sensitivity.leave_one_group_out(problem, full, points["dataset_id"].to_numpy(), by="dataset",
                                             method=method, options=fitting.FitOptions(tolerance=1e-14))  # fmt: skip
    ols = sm.OLS(points["value"].to_numpy(), sm.add_constant(points["time"].to_numpy())).fit()
    influence = influence_module.OLSInfluence(ols)
    for k, group in enumerate(sorted(points["dataset_id"], key=lambda g: int(g[1:]))):
        row = next(g for g in result.groups if g.group == group)
        for j, name in enumerate(("a", "b")):
            shift = row.parameters[name]["value"] - full.parameters[name]["value"]
            assert shift == pytest.approx(-influence.dfbeta[k, j], abs=1e-8)
        assert row.cook_distance == pytest.approx(influence.cooks_distance[0][k], abs=1e-8)


def test_one_step_equals_group_deletion_formula_for_linear_models():
    problem, full, points = linear_problem(n=15, per_group=3)
    result = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method="one-step"
    )
    X = np.column_stack([np.ones(len(points)), points["time"]])
    beta = np.array([full.parameters["a"]["value"], full.parameters["b"]["value"]])
    e = points["value"].to_numpy() - X @ beta
    xtx_inv = np.linalg.inv(X.T @ X)
    for row in result.groups:
        g = (points["dataset_id"] == row.group).to_numpy()
        h_gg = X[g] @ xtx_inv @ X[g].T
        # delta_beta = (X'WX)^-1 X_g' W_g (I - H_gg)^-1 e_g, the change when group g is deleted
        delta = xtx_inv @ X[g].T @ np.linalg.solve(np.eye(g.sum()) - h_gg, e[g])
        got = np.array([row.parameters["a"]["value"], row.parameters["b"]["value"]]) - beta
        np.testing.assert_allclose(got, -delta, atol=1e-8)


def test_exact_refit_equals_an_independent_fit_of_the_reduced_data():
    rng = np.random.default_rng(4)
    t = np.linspace(0.2, 8, 40)
    values = 3.0 * np.exp(-0.45 * t) + rng.normal(0, 0.03, 40)
    points = pd.DataFrame({"time": t, "value": values, "weight": 1 / 0.03**2, "relative": False,
                           "dataset_id": np.repeat(["d1", "d2", "d3", "d4"], 10)})  # fmt: skip

    def decay(params, frame):
        return params["A"] * np.exp(-params["k"] * frame["time"].to_numpy())

    spec = fitting.spec_from_dict(
        {"parameters": {"A": {"start": 1.0}, "k": {"start": 0.2, "lower": 0, "log": True}}}
    )
    problem = fitting.FitProblem(points, decay, spec)
    full = fitting.fit(problem, fitting.FitOptions(tolerance=1e-14))
    result = sensitivity.leave_one_group_out(problem, full, points["dataset_id"].to_numpy(), by="dataset",
                                             options=fitting.FitOptions(tolerance=1e-14))  # fmt: skip
    for row in result.groups:
        keep = points["dataset_id"] != row.group
        tk, yk = t[keep], values[keep]
        independent = optimize.least_squares(lambda p, tk=tk, yk=yk: (yk - p[0] * np.exp(-p[1] * tk)) / 0.03, [1.0, 0.2],
                                             xtol=1e-15, ftol=1e-15, gtol=1e-15).x  # fmt: skip
        assert row.parameters["A"]["value"] == pytest.approx(independent[0], rel=1e-6)
        assert row.parameters["k"]["value"] == pytest.approx(independent[1], rel=1e-6)
        assert row.heldout_dof == 10


def test_jackknife_formula():
    values = [{"a": 1.0}, {"a": 2.0}, {"a": 4.0}]
    # sqrt((G-1)/G * sum (x - mean)^2) with mean 7/3: sqrt(2/3 * 14/3)
    assert sensitivity.jackknife_stderr(values, ["a"])["a"] == pytest.approx(
        np.sqrt(2 / 3 * 14 / 3)
    )


def test_group_that_holds_a_parameters_only_data():
    points = pd.DataFrame({"time": [0, 1, 2, 3, 0, 1, 2, 3.0], "value": [1, 2, 3, 4, 5, 6, 7, 8.0], "weight": 1.0,
                           "relative": False, "dataset_id": ["a"] * 4 + ["b"] * 4, "is_b": [0] * 4 + [1] * 4})  # fmt: skip

    def offset(params, frame):
        return (
            params["m"] * frame["time"].to_numpy()
            + params["c"]
            + params["shift_b"] * frame["is_b"].to_numpy()
        )

    spec = fitting.spec_from_dict(
        {"parameters": {"m": {"start": 1.0}, "c": {"start": 0.0}, "shift_b": {"start": 0.0}}}
    )
    problem = fitting.FitProblem(points, offset, spec)
    full = fitting.fit(problem)
    result = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset"
    )
    without_b = next(g for g in result.groups if g.group == "b")
    # shift_b acts only on b's rows: without b it is held, and the rest is refitted exactly
    assert without_b.error is None
    assert without_b.flags[0].startswith(
        "leaving out dataset b leaves shift_b with no data: held at the full-fit value"
    )
    assert without_b.parameters["shift_b"] == {"value": None, "shift_se": None}
    # reference: the straight line through a's points alone (numpy's polyfit)
    slope, intercept = np.polyfit([0, 1, 2, 3.0], [1, 2, 3, 4.0], 1)
    assert without_b.parameters["m"]["value"] == pytest.approx(slope, abs=1e-8)
    assert without_b.parameters["c"]["value"] == pytest.approx(intercept, abs=1e-8)
    one_step = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method="one-step"
    )
    quick = next(g for g in one_step.groups if g.group == "b")  # linear: one step is exact
    assert quick.parameters["m"]["value"] == pytest.approx(slope, abs=1e-8)
    assert quick.parameters["shift_b"]["value"] is None


def test_needs_two_groups():
    problem, full, points = linear_problem()
    with pytest.raises(InputError, match="only one group"):
        sensitivity.leave_one_group_out(problem, full, np.array(["x"] * len(points)), by="lab")


@pytest.fixture(scope="module")
def demo_catalog(tmp_path_factory):
    import curate
    from curate.demo import run_demo

    folder = tmp_path_factory.mktemp("sensitivity") / "demo"
    run_demo(folder)
    with curate.open_catalog(folder / "curate.db", actor="tester") as catalog:
        yield catalog


MODEL = f"{ROOT / 'example_datasets' / 'model.py'}:predict"
PARAMS = ROOT / "example_datasets" / "params.toml"


def test_process_pool_gives_the_serial_results(demo_catalog, monkeypatch):
    monkeypatch.setattr(sensitivity, "WORKER_START_SECONDS", 0.0)  # workers even for quick refits
    serial = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, workers=1)
    pooled = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, workers=2)
    assert pooled.executor.startswith("process pool")
    for a, b in zip(serial.groups, pooled.groups, strict=True):
        assert a.parameters == b.parameters and a.cook_distance == b.cook_distance


def test_refits_quicker_than_starting_workers_run_here_and_say_so(demo_catalog, monkeypatch):
    monkeypatch.setattr(sensitivity, "WORKER_START_SECONDS", 1e6)
    serial = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, workers=1)
    asked = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, workers=2)
    assert serial.executor == "serial"
    assert asked.executor.startswith("serial: a refit takes ")
    assert asked.executor.endswith(" s, less than starting 2 worker processes would")
    for a, b in zip(serial.groups, asked.groups, strict=True):
        assert a.parameters == b.parameters and a.cook_distance == b.cook_distance


def test_dask_gives_the_process_pool_results(demo_catalog):
    pytest.importorskip("dask.distributed")
    pooled = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, workers=2)
    dask = demo_catalog.sensitivity(by="lab", model=MODEL, params=PARAMS, dask="local")
    assert dask.executor == "dask (local)"
    for a, b in zip(pooled.groups, dask.groups, strict=True):
        assert a.group == b.group and a.parameters == b.parameters


def test_sensitivity_on_the_example_flags_the_saturated_dataset(demo_catalog):
    result = demo_catalog.sensitivity(by="dataset", model=MODEL, params=PARAMS, workers=1)
    by_group = {g.group: g for g in result.groups}
    saturated = by_group["marrowby_velarin_conc_01"]
    assert saturated.heldout_chi2 / saturated.heldout_dof > 10
    assert any("marrowby_velarin_conc_01" in flag for flag in result.flags())
    assert set(result.jackknife_stderr) == {"k_on", "K_d", "k_off", "k_syn", "k_deg", "q10"}
    record = [e for e in demo_catalog.events() if e["kind"] == "sensitivity"][-1]
    assert record["payload"]["model_sha256"] and len(record["payload"]["datasets"]) == 13


def test_auto_gives_the_flags_of_exact_refits_on_the_example(demo_catalog):
    # --method auto: the one-step screen for every dataset, exact refits for those it cannot
    # settle (near a threshold, or the quadratic model failing along the step); the flags are
    # those of exact refits of every dataset
    exact = demo_catalog.sensitivity(by="dataset", model=MODEL, params=PARAMS, workers=1)
    auto = demo_catalog.sensitivity(by="dataset", model=MODEL, params=PARAMS, workers=1,
                                    method="auto")  # fmt: skip
    assert sorted(auto.flags()) == sorted(exact.flags())
    assert auto.method == "auto" and auto.auto is not None
    refitted = auto.auto["refitted"]
    assert "marrowby_velarin_conc_01" in refitted  # the flagged one is always refitted
    assert auto.executor.startswith(f"auto: {len(refitted)} of {len(auto.groups)} groups")
    assert auto.to_dict()["auto"] == auto.auto
    assert sensitivity.SensitivityResult.from_dict(auto.to_dict()).auto == auto.auto
    by_group = {g.group: g for g in exact.groups}
    for group in auto.groups:  # a refitted group carries the exact refit's numbers
        if group.group in refitted:
            assert group.parameters == by_group[group.group].parameters


def test_auto_refits_a_group_whose_screen_nears_a_threshold():
    # the linear problem's influential point (index 3): its one-step shift is exact for a
    # linear model, and within a factor 2 of the 2 SE threshold, so auto refits it exactly
    problem, full, points = linear_problem()
    result = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method="auto",
        options=fitting.FitOptions(tolerance=1e-14), shift_threshold=0.5,
    )  # fmt: skip
    exact = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method="exact",
        options=fitting.FitOptions(tolerance=1e-14), shift_threshold=0.5,
    )  # fmt: skip
    assert "g3" in result.auto["refitted"]
    assert result.auto["refitted"]["g3"].endswith("SE in the screen")
    assert sorted(result.flags()) == sorted(exact.flags())
    with pytest.raises(InputError, match="expected exact, one-step or auto"):
        sensitivity.leave_one_group_out(problem, full, points["dataset_id"].to_numpy(),
                                        by="dataset", method="fast")  # fmt: skip


def rendered(renderable) -> str:
    from rich.console import Console

    console = Console(width=400, record=True, file=io.StringIO())
    console.print(renderable)
    return console.export_text()


def fitter_script(tmp_path, body):
    script = write(tmp_path / "fitter.py", textwrap.dedent(body))
    return f"{sys.executable} {script} {{data}} {{out}}"


def test_an_external_fitter_without_standard_errors_gets_no_all_clear(demo_catalog, tmp_path):
    # the fitter reports only values: a shift in SE cannot be judged, so no "nothing moves"
    command = fitter_script(
        tmp_path,
        """
        import json, sys
        import pandas as pd
        frame = pd.read_csv(sys.argv[1])
        json.dump({"parameters": {"level": float(frame.value.mean())}}, open(sys.argv[2], "w"))
    """,
    )
    result = demo_catalog.sensitivity(by="lab", fitter_cmd=command, workdir=tmp_path / "w")
    assert result.flags() == [] and result.unjudged() == ["level"]
    assert any("no standard error for level" in note for note in result.notes())
    from rich.console import Console

    from curate.present.run_text import sensitivity_text

    console = Console(record=True, width=200)
    console.print(sensitivity_text(result))
    plain = console.export_text()
    assert "no parameter moves more than" not in plain
    assert "no flag, but level could not be judged" in plain
    full = result.full["parameters"]["level"]["value"]
    first = result.groups[0].parameters["level"]["value"]
    assert f"{100 * (first - full) / abs(full):+.1f}%" in plain  # the relative change instead


def test_an_external_fitter_giving_nan_is_a_failed_refit(demo_catalog, tmp_path):
    command = fitter_script(
        tmp_path,
        """
        import sys
        import pandas as pd
        frame = pd.read_csv(sys.argv[1])
        value = "NaN" if "Marrowby Group" not in set(frame.lab) else float(frame.value.mean())
        open(sys.argv[2], "w").write('{"parameters": {"level": %s}, "stderr": {"level": 1.0}}' % value)
    """,
    )
    result = demo_catalog.sensitivity(by="lab", fitter_cmd=command, workdir=tmp_path / "w")
    errors = {g.group: g.error for g in result.groups}
    assert errors["Marrowby Group"] == "the fitter's result.json gives no finite value for level"
    assert not next(g for g in result.groups if g.group == "Marrowby Group").converged
    assert all(e is None for k, e in errors.items() if k != "Marrowby Group")


def test_external_fitter(demo_catalog, tmp_path):
    # an external "fitter": a straight line through the table, written as JSON
    command = fitter_script(
        tmp_path,
        """
        import json, sys
        import numpy as np, pandas as pd
        frame = pd.read_csv(sys.argv[1])
        frame = frame[frame.observable == "velarin_conc"]
        slope, intercept = np.polyfit(frame.time, frame.value, 1, w=np.sqrt(frame.weight))
        json.dump({"parameters": {"slope": slope, "intercept": intercept}, "stderr": {"slope": 1e-4, "intercept": 0.1}},
                  open(sys.argv[2], "w"))
    """,
    )
    result = demo_catalog.sensitivity(by="lab", fitter_cmd=command, workdir=tmp_path / "runs")
    assert result.method == "external" and len(result.groups) == 4
    assert all(g.error is None for g in result.groups)
    assert (tmp_path / "runs" / "full" / "data.csv").exists() and (
        tmp_path / "runs" / "full" / "fitter.log"
    ).exists()
    assert set(result.jackknife_stderr) == {"slope", "intercept"}


def test_external_fitter_failures_are_reported_per_fold(demo_catalog, tmp_path):
    command = fitter_script(
        tmp_path,
        """
        import json, sys, time
        import pandas as pd
        frame = pd.read_csv(sys.argv[1])
        labs = set(frame.lab)
        if "Corvane Biophysics" not in labs:
            sys.exit(3)                      # fails without Corvane
        if "Harrow Point Lab" not in labs:
            open(sys.argv[2], "w").write("not json")
            sys.exit(0)
        if "Quillfen Institute" not in labs:
            time.sleep(120)                  # hangs without Quillfen
        json.dump({"parameters": {"n": float(len(frame))}}, open(sys.argv[2], "w"))
    """,
    )
    # the timeout leaves room for a loaded machine to start Python and import pandas
    result = demo_catalog.sensitivity(
        by="lab", fitter_cmd=command, workdir=tmp_path / "runs", timeout=20
    )
    errors = {g.group: g.error for g in result.groups}
    assert "exited with code 3" in errors["Corvane Biophysics"]
    assert errors["Harrow Point Lab"].startswith(
        'the fitter\'s result.json is not {"parameters": {NAME: value}} (not JSON: Expecting value '
        "at line 1, column 1)"
    )
    assert "longer than 20 s" in errors["Quillfen Institute"]
    assert errors["Marrowby Group"] is None
    assert result.groups[2].parameters["n"]["value"] == 222.0


def test_sensitivity_cli_json_and_report(cli, tmp_path):
    from curate.demo import run_demo

    run_demo(tmp_path / "demo")
    catalog = tmp_path / "demo" / "curate.db"
    run = cli("sensitivity", "--model", MODEL, "--params", PARAMS, "--by", "lab", "--method", "one-step",
              "--workers", "1", "--report", tmp_path / "s.html", "--json", catalog_path=catalog)  # fmt: skip
    assert run.code == 0, run.err
    payload = json.loads(run.out)
    assert set(payload) >= {"full", "groups", "jackknife_stderr"}
    group = payload["groups"][0]
    assert set(group) >= {
        "group",
        "n_points",
        "parameters",
        "cook_distance",
        "heldout_chi2",
        "heldout_dof",
        "flags",
    }
    assert set(group["parameters"]["k_on"]) == {"value", "shift_se"}
    assert set(payload["full"]) >= {
        "parameters",
        "scale_factors",
        "chi2",
        "dof",
        "n_points",
        "converged",
        "starts",
    }
    page = (tmp_path / "s.html").read_text()
    assert "data:image/png;base64," in page and "Leave one lab out" in page
    run = cli("fit", "--model", MODEL, "--params", PARAMS, "--json", catalog_path=catalog)
    fitted = json.loads(run.out)
    assert set(fitted["parameters"]["q10"]) == {"value", "stderr"} and fitted["n_points"] == 242
    strict = write(tmp_path / "strict.toml", "[inflation]\nA = 1\nB = 4\nC = 16\nD = 100\n")
    run = cli("sensitivity", "--model", MODEL, "--params", PARAMS, "--by", "lab", "--workers", "1",
              "--policies", PARAMS.parent / "policy.toml", strict, catalog_path=catalog)  # fmt: skip
    assert run.code == 0 and "under policy" in run.out and "strict" in run.out
    bad = cli("sensitivity", "--model", "nowhere.py:f", "--params", PARAMS, catalog_path=catalog)
    assert bad.code == 2 and "no such file" in bad.err
    bad = cli("sensitivity", "--params", PARAMS, catalog_path=catalog)
    assert bad.code == 2 and "either --model with --params, or --fitter-cmd" in bad.err


@pytest.mark.parametrize(
    ("command", "missing"),
    [("prog {data}", "no {out}"), ("prog {out}", "no {data}"), ("prog", "no {data} and no {out}")],
)
def test_fitter_command_without_its_placeholders_is_refused_up_front(
    demo_catalog, command, missing
):
    before = len(demo_catalog.events())
    with pytest.raises(InputError) as refused:
        demo_catalog.sensitivity(by="lab", fitter_cmd=command)
    assert str(refused.value).startswith(f"--fitter-cmd '{command}': {missing} in the command;")
    assert len(demo_catalog.events()) == before


def test_fitter_temp_folders_go_after_success_and_stay_named_after_failure(
    demo_catalog, tmp_path, monkeypatch
):
    import tempfile

    from curate.present.run_text import sensitivity_text

    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    good = fitter_script(tmp_path, """
        import json, sys
        json.dump({"parameters": {"n": 1.0}, "stderr": {"n": 0.1}}, open(sys.argv[2], "w"))
    """)  # fmt: skip
    result = demo_catalog.sensitivity(by="lab", fitter_cmd=good)
    assert list(scratch.iterdir()) == [] and result.full["workdir"] is None
    assert "the fitter's files" not in rendered(sensitivity_text(result))
    failing = write(tmp_path / "failing.py", textwrap.dedent("""
        import json, sys
        import pandas as pd
        if "Marrowby Group" not in set(pd.read_csv(sys.argv[1]).lab):
            sys.exit(4)
        json.dump({"parameters": {"n": 1.0}, "stderr": {"n": 0.1}}, open(sys.argv[2], "w"))
    """))  # fmt: skip
    result = demo_catalog.sensitivity(
        by="lab", fitter_cmd=f"{sys.executable} {failing} {{data}} {{out}}"
    )
    kept = list(scratch.iterdir())
    assert len(kept) == 1 and result.full["workdir"] == str(kept[0])
    error = {g.group: g.error for g in result.groups}["Marrowby Group"]
    assert f"(log: {kept[0] / 'without_Marrowby_Group' / 'fitter.log'})" in error
    assert f"the fitter's files (tables, results, logs) are in {kept[0]}" in rendered(
        sensitivity_text(result)
    )
    # an explicit workdir stays, even after a clean run
    demo_catalog.sensitivity(by="lab", fitter_cmd=good, workdir=tmp_path / "mine")
    assert (tmp_path / "mine" / "full" / "result.json").is_file()


def dose_response_problem():
    # two doses of a saturating dose-response: with one dose left, Emax and EC50 are confounded
    rng = np.random.default_rng(7)
    t = np.tile(np.linspace(1, 30, 12), 4)
    dose = np.repeat([10.0, 100.0, 10.0, 100.0], 12)
    truth = 5.0 * dose / (dose + 30.0) * (1 - np.exp(-0.2 * t))
    points = pd.DataFrame({"time": t, "value": truth + rng.normal(0, 0.05, len(t)), "weight": 400.0,
                           "relative": False, "dataset_id": np.repeat(["d1", "d2", "d3", "d4"], 12),
                           "observable": "signal", "dose": dose})  # fmt: skip

    def model(params, frame):
        d = frame["dose"].to_numpy()
        drive = params["Emax"] * d / (d + params["EC50"])
        return drive * (1 - np.exp(-params["k"] * frame["time"].to_numpy()))

    spec = fitting.spec_from_dict({"parameters": {
        "Emax": {"start": 4.0, "lower": 0}, "EC50": {"start": 20.0, "lower": 0, "log": True},
        "k": {"start": 0.1, "lower": 0}}})  # fmt: skip
    problem = fitting.FitProblem(points, model, spec)
    return problem, fitting.fit(problem), points


@pytest.mark.parametrize("method", ["exact", "one-step"])
def test_leaving_out_one_of_two_doses_flags_the_dose_response_parameters(method):
    problem, full, points = dose_response_problem()
    result = sensitivity.leave_one_group_out(
        problem, full, points["dose"].map("{:g}".format).to_numpy(), by="condition:dose",
        method=method,
    )  # fmt: skip
    for group in result.groups:
        kept = "100.0" if group.group == "10" else "10.0"
        assert group.flags[0] == (
            f"without condition:dose {group.group} the rest no longer identifies Emax, EC50 "
            f"(1 combination(s) lost; dose takes one value ({kept}) in training): their shifts "
            "mean little"
        )
        assert all(np.isfinite(p["value"]) for p in group.parameters.values())
    errors = {g.group: g.error for g in result.groups}
    # an exact refit on one dose may run off along the lost direction (Emax and EC50 grow
    # together; whether it does, for either dose, depends on the optimiser's path and on where
    # the full fit ended: from the polished full fit neither does, from main's unpolished one the
    # high dose did): said, not crashed. The one-step approximation never refits, so it never
    # runs off.
    ran_off = "the parameters ran off to infinity"
    if method == "exact":
        assert set(errors.values()) <= {None, ran_off}
    else:
        assert errors == {"10": None, "100": None}
    # leaving out a dataset keeps both doses: nothing is lost, nothing flagged as such
    by_dataset = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method=method
    )
    assert not any("no longer identifies" in flag for flag in by_dataset.flags())


def test_jackknife_over_few_groups_carries_a_caveat():
    problem, full, points = dose_response_problem()
    few = sensitivity.leave_one_group_out(
        problem, full, points["dataset_id"].to_numpy(), by="dataset", method="one-step"
    )
    caveat = (
        "the jackknife standard errors come from only 4 groups: treat them as rough (fewer than "
        "5 groups; common practice, not a published rule)"
    )
    assert few.notes() == [caveat] and few.to_dict()["notes"] == [caveat]
    from curate.present.html import sensitivity_section
    from curate.present.run_text import sensitivity_text

    assert caveat in rendered(sensitivity_text(few)).replace("\n", " ")
    assert caveat in sensitivity_section(few)
    labels = np.repeat([f"g{k}" for k in range(6)], 8)
    many = sensitivity.leave_one_group_out(problem, full, labels, by="dataset", method="one-step")
    assert many.notes() == [] and many.to_dict()["notes"] == []
