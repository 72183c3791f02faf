"""The polish that ends every fit: flat-valley problems against 50-digit references, the
complex-step detection, bounds, and the NIST StRD problems at the default tolerance."""

from __future__ import annotations

import math

import flat_valley
import nist
import numpy as np
import pandas as pd
import pytest

from curate import fit as fitting
from curate.fit.polish import accurate_jacobian, supports_complex_step


def flat_valley_fit(name, **options):
    content = flat_valley.read(name)
    names = [f"b{k + 1}" for k in range(len(content["start"]))]
    points = pd.DataFrame({"time": content["x"], "value": content["y"], "weight": 1.0})
    model = flat_valley.MODELS[name]

    def function(params, frame):
        return model([params[n] for n in names], frame["time"].to_numpy(), np.exp)

    spec = fitting.spec_from_dict(
        {"parameters": {n: {"start": s} for n, s in zip(names, content["start"], strict=True)}}
    )
    result = fitting.fit(
        fitting.FitProblem(points, function, spec),
        fitting.FitOptions(scale_covariance=True, **options),
    )
    values = [nist.digits(result.parameters[n]["value"], c)
              for n, c in zip(names, content["values"], strict=True)]  # fmt: skip
    sds = [nist.digits(result.parameters[n]["stderr"] or 0.0, c)
           for n, c in zip(names, content["sds"], strict=True)]  # fmt: skip
    return result, min(values), min(sds), content


@pytest.mark.parametrize("name", list(flat_valley.MODELS))
@pytest.mark.parametrize("tolerance", [1e-10, 1e-15])
def test_flat_valley_problems_reach_the_50_digit_reference(name, tolerance):
    # reference: the least-squares minimum of the stored data in 50-digit mpmath arithmetic
    # (tests/flat_valley.py says how the data and the reference were made); measured here
    # 10.7-11 digits in every value and SD at both tolerances
    result, value_digits, sd_digits, content = flat_valley_fit(name, tolerance=tolerance)
    assert value_digits >= 9, (name, value_digits)
    assert sd_digits >= 8, (name, sd_digits)
    assert nist.digits(result.chi2, content["rss"]) >= 10
    assert result.converged
    assert result.options["polished"]["jacobian"] == "complex step"


def test_without_the_polish_the_search_stops_in_the_valley():
    # why the polish exists: least_squares alone stops on the objective's change, the residual
    # sum of squares right to 11 digits and some parameter only to about 5.6 (measured)
    result, value_digits, _, content = flat_valley_fit("CloseRates", polish=False)
    assert nist.digits(result.chi2, content["rss"]) >= 10
    assert value_digits < 7
    assert "polished" not in result.options and result.options["polish"] is False


@pytest.mark.parametrize("name", list(flat_valley.MODELS))
def test_the_stored_reference_is_what_50_digit_arithmetic_gives(name):
    # the reference recomputed from the stored data: it is reproducible, and no float64 code
    # (ours or scipy's) took part in it
    content = flat_valley.read(name)
    again = flat_valley.reference(name, content["x"], content["y"], content["start"])
    for stored, recomputed in zip(content["values"], again["values"], strict=True):
        assert float(recomputed) == pytest.approx(stored, rel=1e-15)
    assert float(again["rss"]) == pytest.approx(content["rss"], rel=1e-15)


@pytest.mark.parametrize("name", list(nist.DIFFICULTY))
def test_every_nist_problem_from_start_2_at_the_default_tolerance(name):
    # NIST StRD nonlinear regression, certified values and SDs from each file; at the default
    # tolerance 1e-10 the search alone gave 5.0 value digits on MGH09 and 4.9 SD digits on
    # Thurber; with the polish at least 9.6 and 8.9 (measured). The issue asked for 6 and 4.
    points, function, spec, content, names = nist.problem(name, "start2")
    result = fitting.fit(
        fitting.FitProblem(points, function, spec), fitting.FitOptions(scale_covariance=True)
    )
    values = min(nist.digits(result.parameters[n]["value"], c)
                 for n, c in zip(names, content["values"], strict=True))  # fmt: skip
    sds = min(nist.digits(result.parameters[n]["stderr"] or 0.0, c)
              for n, c in zip(names, content["sds"], strict=True))  # fmt: skip
    assert values >= 8, (name, values)
    assert sds >= 7, (name, sds)


def exponential_points():
    t = np.linspace(0, 4, 20)
    return pd.DataFrame({"time": t, "value": 3.0 * np.exp(-0.7 * t) + 0.01 * np.sin(7 * t),
                         "weight": 1.0})  # fmt: skip


SPEC = fitting.spec_from_dict({"parameters": {"a": {"start": 2.0}, "k": {"start": 0.5, "lower": 0.0, "log": True}}})  # fmt: skip


def analytic_jacobian(problem, theta):
    # r = y - a exp(-k t) with internal a / 2 and ln k: dr/dx_a = -2 e^{-kt}, dr/d ln k = a k t e^{-kt}
    values = problem.to_natural(theta)
    t = problem.points["time"].to_numpy()
    decay = np.exp(-values["k"] * t)
    return np.column_stack([-2.0 * decay, values["a"] * values["k"] * t * decay])


def test_a_numpy_model_gets_the_exact_complex_step_jacobian():
    def model(params, frame):
        return params["a"] * np.exp(-params["k"] * frame["time"].to_numpy())

    problem = fitting.FitProblem(exponential_points(), model, SPEC)
    theta = problem.to_internal({"a": 2.5, "k": 0.6})
    jacobian, method = accurate_jacobian(problem, theta)
    assert method == "complex step" and supports_complex_step(problem, theta)
    np.testing.assert_allclose(jacobian, analytic_jacobian(problem, theta), rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize(
    "model",
    [
        # math.exp refuses complex numbers: a TypeError
        lambda params, frame: [params["a"] * math.exp(-params["k"] * t) for t in frame["time"]],
        # abs() carries a real number through and loses k's derivative: caught by the check
        # against central differences
        lambda params, frame: params["a"] * np.exp(-abs(params["k"]) * frame["time"].to_numpy()),
        # a cast to float drops the imaginary part (with a warning, an error in the detection)
        lambda params, frame: np.asarray(
            params["a"] * np.exp(-params["k"] * frame["time"].to_numpy())
        ).astype(float),
    ],
    ids=["math", "abs", "cast"],
)
def test_a_model_that_cannot_carry_complex_numbers_gets_fourth_order_differences(model):
    problem = fitting.FitProblem(exponential_points(), model, SPEC)
    theta = problem.to_internal({"a": 2.5, "k": 0.6})
    jacobian, method = accurate_jacobian(problem, theta)
    assert method == "fourth-order differences" and problem.complex_step is False
    # fourth-order central differences of step eps^(1/5): about 1e-11 relative here
    np.testing.assert_allclose(jacobian, analytic_jacobian(problem, theta), rtol=1e-9, atol=1e-10)
    result = fitting.fit(problem)
    assert result.options["polished"]["jacobian"] == "fourth-order differences"


def test_a_bound_that_holds_a_parameter_leaves_the_others_at_their_constrained_optimum():
    # y = a + b t with b's upper bound below its unconstrained value: b sits on the bound and a
    # is the mean of y - b t (the least-squares solution with b fixed, written out by hand)
    t = np.linspace(0, 1, 11)
    points = pd.DataFrame({"time": t, "value": 1.0 + 2.0 * t + 0.01 * np.cos(9 * t), "weight": 1.0})
    spec = fitting.spec_from_dict({"parameters": {"a": {"start": 0.5}, "b": {"start": 1.0, "upper": 1.5}}})  # fmt: skip

    def line(params, frame):
        return params["a"] + params["b"] * frame["time"].to_numpy()

    result = fitting.fit(fitting.FitProblem(points, line, spec))
    assert result.parameters["b"]["value"] == pytest.approx(1.5, rel=1e-11)
    expected = float(np.mean(points["value"] - 1.5 * t))
    assert result.parameters["a"]["value"] == pytest.approx(expected, rel=1e-12)
    assert result.options["polished"]["stopped_on"] in ("scaled step", "projected gradient")


def test_the_polish_never_ends_above_where_the_search_stopped():
    # a model with noise of its own (rounded to 7 digits, as an ODE solver's tolerance would
    # leave it): the polish cannot beat that noise, but it must not make the fit worse
    def noisy(params, frame):
        exact = params["a"] * np.exp(-params["k"] * frame["time"].to_numpy())
        return np.array([float(f"{v:.7g}") for v in exact])

    points = exponential_points()
    plain = fitting.fit(fitting.FitProblem(points, noisy, SPEC), fitting.FitOptions(polish=False))
    polished = fitting.fit(fitting.FitProblem(points, noisy, SPEC))
    assert polished.chi2 <= plain.chi2 * (1 + 1e-12)
    assert polished.options["polished"]["jacobian"] == "fourth-order differences"
