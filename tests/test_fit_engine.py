"""The fitting engine against the NIST StRD certified values, and its bad inputs."""

from __future__ import annotations

import nist
import numpy as np
import pandas as pd
import pytest
from conftest import write

from curate import fit as fitting
from curate.errors import InputError
from curate.fit.engine import evaluate_at_start


def nist_fit(name, start):
    points, function, spec, content, names = nist.problem(name, start)
    result = fitting.fit(
        fitting.FitProblem(points, function, spec),
        fitting.FitOptions(tolerance=1e-15, scale_covariance=True, max_evaluations=20000),
    )
    value_digits = min(
        nist.digits(result.parameters[n]["value"], c)
        for n, c in zip(names, content["values"], strict=True)
    )
    sd_digits = min(
        nist.digits(result.parameters[n]["stderr"] or 0.0, c)
        for n, c in zip(names, content["sds"], strict=True)
    )
    return result, value_digits, sd_digits, content


@pytest.mark.parametrize(
    "name", [n for n, d in nist.DIFFICULTY.items() if d in ("lower", "average")]
)
def test_nist_lower_and_average_from_start_2(name):
    # NIST StRD nonlinear regression: require >= 6 agreeing digits in every certified value
    # (and >= 4 in every certified standard deviation, computed with the residual variance)
    result, value_digits, sd_digits, content = nist_fit(name, "start2")
    assert value_digits >= 6, (name, value_digits)
    assert sd_digits >= 4, (name, sd_digits)
    assert nist.digits(result.chi2, content["rss"]) >= 6
    assert result.dof == len(content["y"]) - len(content["values"])


@pytest.mark.parametrize("name", [n for n, d in nist.DIFFICULTY.items() if d == "higher"])
def test_nist_higher_difficulty_from_start_2(name):
    # stated in DEVELOPERS.md: the higher-difficulty problems from start 2 reach >= 10 digits in
    # every value and SD here (with the polish); we require 6 and 4, as for the others
    _, value_digits, sd_digits, _ = nist_fit(name, "start2")
    assert value_digits >= 6, (name, value_digits)
    assert sd_digits >= 4, (name, sd_digits)


def test_multistart_rescues_a_hard_start():
    # MGH09 from start 1 is a known failure for local optimisers; Latin-hypercube starts inside
    # generous bounds find the certified minimum
    points, function, _spec, content, names = nist.problem("MGH09", "start1")
    bounded = fitting.spec_from_dict({"parameters": {n: {"start": s, "lower": -1.0, "upper": 1.0} for n, s in
                                                     zip(names, [0.25, 0.39, 0.415, 0.39], strict=True)}})  # fmt: skip
    result = fitting.fit(
        fitting.FitProblem(points, function, bounded),
        fitting.FitOptions(starts=16, seed=1, tolerance=1e-15),
    )
    assert len(result.starts) == 16
    assert (
        min(
            nist.digits(result.parameters[n]["value"], c)
            for n, c in zip(names, content["values"], strict=True)
        )
        >= 4
    )


def linear_points(n=30, seed=0, relative=False):
    rng = np.random.default_rng(seed)
    t = np.linspace(0, 10, n)
    y = 2.0 + 0.5 * t + rng.normal(0, 0.1, n)
    return pd.DataFrame(
        {
            "time": t,
            "value": y,
            "weight": 100.0,
            "relative": relative,
            "dataset_id": "d",
            "calibration_group": "d",
        }
    )


def line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


def test_weighted_linear_fit_matches_closed_form():
    points = linear_points()
    spec = fitting.spec_from_dict({"parameters": {"a": {"start": 0.0}, "b": {"start": 0.0}}})
    result = fitting.fit(fitting.FitProblem(points, line, spec))
    X = np.column_stack([np.ones(len(points)), points["time"]])
    W = np.diag(points["weight"])
    beta = np.linalg.solve(X.T @ W @ X, X.T @ W @ points["value"])
    covariance = np.linalg.inv(X.T @ W @ X)
    assert result.parameters["a"]["value"] == pytest.approx(beta[0], rel=1e-9)
    assert result.parameters["b"]["value"] == pytest.approx(beta[1], rel=1e-9)
    assert result.parameters["b"]["stderr"] == pytest.approx(np.sqrt(covariance[1, 1]), rel=1e-6)
    assert result.dof == 28 and result.converged


def test_closed_form_scale_factor_of_relative_data():
    rng = np.random.default_rng(3)
    t = np.linspace(0.1, 5, 40)
    points = pd.DataFrame({"time": t, "value": 7.0 * np.exp(-0.8 * t) * (1 + rng.normal(0, 0.01, 40)), "weight": 1.0,
                           "relative": True, "dataset_id": "glint_1", "calibration_group": "run"})  # fmt: skip

    def decay(params, frame):
        return np.exp(-params["k"] * frame["time"].to_numpy())

    spec = fitting.spec_from_dict({"parameters": {"k": {"start": 0.3, "lower": 0.0, "log": True}}})
    result = fitting.fit(fitting.FitProblem(points, decay, spec))
    assert result.parameters["k"]["value"] == pytest.approx(0.8, rel=0.02)
    # keyed by calibration group, in the convention data = s x model (as PEtab's scale_run)
    assert result.scale_factors == {"run": pytest.approx(7.0, rel=0.02)}
    assert result.dof == 40 - 1 - 1  # the scale factor costs a degree of freedom


def test_log_parameter_stderr_maps_to_natural_scale():
    points = linear_points()
    linear = fitting.fit(
        fitting.FitProblem(
            points,
            line,
            fitting.spec_from_dict({"parameters": {"a": {"start": 1.0}, "b": {"start": 1.0}}}),
        )
    )
    logged = fitting.fit(
        fitting.FitProblem(
            points,
            line,
            fitting.spec_from_dict(
                {
                    "parameters": {
                        "a": {"start": 1.0, "lower": 0, "log": True},
                        "b": {"start": 1.0, "lower": 0, "log": True},
                    }
                }
            ),
        )
    )
    for name in ("a", "b"):
        assert logged.parameters[name]["value"] == pytest.approx(
            linear.parameters[name]["value"], rel=1e-7
        )
        assert logged.parameters[name]["stderr"] == pytest.approx(
            linear.parameters[name]["stderr"], rel=1e-4
        )


def test_global_search_then_polish():
    points, function, _spec, content, _names = nist.problem("BoxBOD", "start1")
    bounded = fitting.spec_from_dict({"parameters": {"b1": {"start": 1.0, "lower": 1.0, "upper": 1000.0},
                                                     "b2": {"start": 1.0, "lower": 0.01, "upper": 5.0}}})  # fmt: skip
    result = fitting.fit(
        fitting.FitProblem(points, function, bounded),
        fitting.FitOptions(global_search=True, tolerance=1e-15),
    )
    assert result.starts[0]["from"] == "global search"
    assert nist.digits(result.parameters["b1"]["value"], content["values"][0]) >= 5


def test_spec_errors(tmp_path):
    cases = {
        "[parameters.k]\nlower = 0\n": "field 'parameters.k.start': required",
        "[parameters.k]\nstart = 5\nlower = 0\nupper = 1\n": "start 5 is outside its bounds",
        "[parameters.k]\nstart = 1\nlower = 2\nupper = 1\n": "lower 2 is not below upper 1",
        "[parameters.k]\nstart = -1\nlog = true\n": "a log-scale parameter needs start > 0",
        "[parameters.k]\nstart = 1\nfixed = true\n": "every parameter is fixed",
        "[parameters.k]\nstart = 1\nstep = 2\n": "field 'parameters.k.step': unknown",
        '[parameters.k]\nstart = "one"\n': "expected a number",
    }
    for number, (body, message) in enumerate(cases.items()):
        path = write(tmp_path / f"s{number}.toml", body)
        with pytest.raises(InputError, match=message):
            fitting.load_spec(path)
    spec = fitting.load_spec(
        write(tmp_path / "ok.toml", '[parameters.k]\nstart = 1\nupper = "inf"\n')
    )
    assert spec.parameters[0].upper == float("inf") and len(spec.sha256) == 64


def test_a_model_file_can_import_a_module_beside_it(tmp_path):
    folder = tmp_path / "models"
    folder.mkdir()
    (folder / "kinetics_helpers_x7.py").write_text("def line(p, t):\n    return p['a'] * t\n")
    (folder / "m.py").write_text(
        "from kinetics_helpers_x7 import line\n"
        "def predict(params, points):\n    return line(params, points['time'].to_numpy())\n"
    )
    model = fitting.load_model(f"{folder / 'm.py'}:predict")
    import pandas as pd

    assert list(model({"a": 2.0}, pd.DataFrame({"time": [1.0, 3.0]}))) == [2.0, 6.0]


def test_model_errors(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        fitting.load_model(str(tmp_path / "missing.py") + ":f")
    model_file = write(
        tmp_path / "m.py",
        """
        import numpy as np
        def short(params, points):
            return np.ones(len(points) - 1)
        def nan(params, points):
            return np.full(len(points), np.nan)
        def boom(params, points):
            raise RuntimeError("bad dose")
        def text(params, points):
            return ["1.0"] + ["fast"] * (len(points) - 1)
        def keyed(params, points):
            return points["dose"]
    """,
    )
    with pytest.raises(InputError, match="defines no function 'absent'"):
        fitting.load_model(f"{model_file}:absent")
    with pytest.raises(InputError, match="expected module:function"):
        fitting.load_model("no_colon")
    spec = fitting.spec_from_dict({"parameters": {"a": {"start": 1.0}}})
    for name, message in (("short", "returned 29 values for 30 rows"), ("nan", "returned nan at row 1"),
                          ("boom", r"the model failed: bad dose \(call it"),
                          ("text", "the model returned '1.0' at row 1, which is not a number"),
                          ("keyed", "the model failed: no column or parameter 'dose'")):  # fmt: skip
        model = fitting.load_model(f"{model_file}:{name}")
        with pytest.raises(InputError, match=message):
            fitting.fit(fitting.FitProblem(linear_points(), model, spec))


def boxbod_bounded():
    points, function, _spec, _content, _names = nist.problem("BoxBOD", "start1")
    bounded = fitting.spec_from_dict({"parameters": {"b1": {"start": 1.0, "lower": 1.0, "upper": 1000.0},
                                                     "b2": {"start": 1.0, "lower": 0.01, "upper": 5.0}}})  # fmt: skip
    return fitting.FitProblem(points, function, bounded)


def test_global_search_reports_progress_and_honours_its_generations():
    calls = []
    result = fitting.fit(
        boxbod_bounded(),
        fitting.FitOptions(global_search=True, generations=4, starts=2),
        progress=lambda done, total, stage: calls.append((done, total, stage)),
    )
    searched = [c for c in calls if c[2] == "global search"]
    assert searched == [(k, 4, "global search") for k in range(1, 5)]
    assert [c for c in calls if c[2] == "local fits"] == [(k, 3, "local fits") for k in range(4)]
    assert result.options["generations"] == 4 and result.evaluations > 0


def test_evaluation_budget_stops_the_whole_fit():
    # the global search stops after the generation that spends the budget; later starts get
    # nothing, and the result says it stopped rather than converged
    result = fitting.fit(
        boxbod_bounded(), fitting.FitOptions(global_search=True, starts=3, max_evaluations=100)
    )
    population = 15 * 2  # scipy's default popsize 15 times the number of free parameters
    final = 2 * 2 + 2  # the standard errors' central differences and the last residuals
    assert 100 <= result.evaluations <= 100 + population + final
    assert not result.converged
    assert result.message.startswith("stopped: the budget of 100 model evaluations is spent")
    assert [s["message"] for s in result.starts] == [
        "not run: the budget of 100 model evaluations is spent"
    ] * 4
    calls = []
    problem = boxbod_bounded()
    counted = problem.backend.function

    def counting(params, points):
        calls.append(1)
        return counted(params, points)

    problem.backend.function = counting
    local = fitting.fit(problem, fitting.FitOptions(starts=2, max_evaluations=5))
    # every call of the model counts, the Jacobian's included: the search stays within 5, and
    # the final standard errors cost 2 p + 2 more; the result reports the true count
    assert local.evaluations == len(calls) <= 5 + final and not local.converged
    assert local.to_dict()["options"]["max_evaluations"] == 5
    with pytest.raises(InputError, match="max_evaluations = 0: expected at least 1"):
        fitting.fit(boxbod_bounded(), fitting.FitOptions(max_evaluations=0))


def test_a_model_failing_beside_the_optimum_gets_one_sided_differences_or_no_stderr():
    # y = a + b t, fitted exactly; the model refuses a > 1 (as an ODE model may refuse a
    # parameter past a bound): a's column is taken one-sided, and where both sides fail the
    # parameter gets no standard error instead of the whole evaluation failing
    t = np.linspace(0, 1, 9)
    points = pd.DataFrame({"time": t, "value": 1.0 + 2.0 * t, "weight": np.ones(9)})

    def model(params, frame, limit=1.0):
        if params["a"] > limit:
            raise InputError("no steady state")
        return params["a"] + params["b"] * frame["time"].to_numpy()

    spec = fitting.ParameterSpec((fitting.Parameter("a", 1.0, -10, 10),
                                  fitting.Parameter("b", 2.0, -10, 10)))  # fmt: skip
    result = evaluate_at_start(fitting.FitProblem(points, model, spec))
    # one-sided at a = 1: the linear least-squares standard errors with unit weights (sigma 1),
    # sqrt of the diagonal of (X'X)^-1 (the textbook formula, computed here directly)
    x = np.column_stack([np.ones(9), t])
    expected = np.sqrt(np.diag(np.linalg.inv(x.T @ x)))
    assert result.parameters["a"]["stderr"] == pytest.approx(expected[0], rel=1e-4)
    assert result.parameters["b"]["stderr"] == pytest.approx(expected[1], rel=1e-4)

    def nowhere_but_here(params, frame):
        if abs(params["a"] - 1.0) > 1e-12:
            raise InputError("no steady state")
        return params["a"] + params["b"] * frame["time"].to_numpy()

    result = evaluate_at_start(fitting.FitProblem(points, nowhere_but_here, spec))
    assert result.parameters["a"]["stderr"] is None
    assert result.parameters["b"]["stderr"] is not None and result.parameters["b"]["stderr"] > 0
    assert result.chi2 == pytest.approx(0.0, abs=1e-20)
