"""The negative log-likelihood objective of noise-model backends, against reference libraries."""

from __future__ import annotations

import math
from typing import ClassVar

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from curate.fit import likelihood
from curate.fit.backends import ModelBackend, PointEvaluation
from curate.fit.engine import FitOptions, fit
from curate.fit.likelihood import negative_log_likelihood, point_nllh, scaled_residuals
from curate.fit.problem import FitProblem
from curate.fit.sensitivity import leave_one_group_out
from curate.fit.spec import Parameter, ParameterSpec


class Line(ModelBackend):
    """h = a + b t, sigma a parameter: a noise model of its own, as a PEtab problem has."""

    kind = "test-line"
    noise_model: ClassVar[bool] = True

    def __init__(self, transformation: str = "lin", distribution: str = "normal") -> None:
        self.transformation = transformation
        self.distribution = distribution

    def evaluate(self, parameters: dict[str, float], points: pd.DataFrame) -> PointEvaluation:
        t = points["time"].to_numpy(dtype=float)
        n = len(t)
        return PointEvaluation(
            parameters["a"] + parameters["b"] * t,
            np.full(n, parameters["sigma"]),
            np.array([self.transformation] * n, dtype=object),
            np.array([self.distribution] * n, dtype=object),
        )

    def predict(self, parameters: dict[str, float], points: pd.DataFrame) -> np.ndarray:
        return self.evaluate(parameters, points).simulation


def _spec(a: float = 1.0, b: float = 0.1, sigma: float = 1.0) -> ParameterSpec:
    return ParameterSpec(
        parameters=(
            Parameter("a", a, -100.0, 100.0, False, False),
            Parameter("b", b, -100.0, 100.0, False, False),
            Parameter("sigma", sigma, 1e-6, 1e3, True, False),
        ),
        scale_factors=False,
    )


def _points(y: np.ndarray, t: np.ndarray, **columns: object) -> pd.DataFrame:
    return pd.DataFrame({"time": t, "value": y, "weight": np.ones(len(y)), **columns})


def test_estimated_normal_noise_reaches_the_maximum_likelihood_of_ordinary_least_squares() -> None:
    # Reference: statsmodels OLS; its llf is the Gaussian log-likelihood at the MLE, with
    # sigma^2 = RSS / n (statsmodels documentation, RegressionResults.llf).
    rng = np.random.default_rng(4)
    t = np.linspace(0, 10, 40)
    y = 2.0 + 0.7 * t + rng.normal(0, 0.5, len(t))
    result = fit(FitProblem(_points(y, t), Line(), _spec()), FitOptions())
    ols = sm.OLS(y, sm.add_constant(t)).fit()
    assert result.objective == "nllh"
    assert result.nllh == pytest.approx(-ols.llf, abs=1e-7)
    assert result.parameters["a"]["value"] == pytest.approx(ols.params[0], abs=1e-6)
    assert result.parameters["b"]["value"] == pytest.approx(ols.params[1], abs=1e-6)
    # the nllh is flat in sigma at its optimum: n (d sigma / sigma)^2 ~ the optimiser's 1e-10 on
    # the nllh allows d sigma / sigma ~ 2e-6
    assert result.parameters["sigma"]["value"] == pytest.approx(
        math.sqrt(ols.ssr / len(y)), rel=1e-5
    )
    # chi2 is the sum of squared scaled residuals: n at the MLE of sigma
    assert result.chi2 == pytest.approx(len(y), rel=1e-5)


def test_log_transformed_noise_matches_scipys_lognormal_fit() -> None:
    # Reference: scipy.stats.lognorm.fit with floc=0 (the closed-form MLE of a lognormal):
    # shape = sd of ln y (ddof 0), scale = exp(mean ln y); nllh includes the ln y Jacobian.
    rng = np.random.default_rng(7)
    y = np.exp(1.3 + rng.normal(0, 0.4, 60))
    t = np.zeros(len(y))
    spec = ParameterSpec(
        parameters=(
            Parameter("a", 2.0, 1e-3, 1e3, True, False),
            Parameter("b", 0.0, 0.0, 0.0, False, True),
            Parameter("sigma", 1.0, 1e-6, 1e3, True, False),
        ),
        scale_factors=False,
    )
    result = fit(FitProblem(_points(y, t), Line(transformation="log"), spec), FitOptions())
    shape, _loc, scale = stats.lognorm.fit(y, floc=0)
    assert result.parameters["a"]["value"] == pytest.approx(scale, rel=1e-6)
    assert result.parameters["sigma"]["value"] == pytest.approx(shape, rel=1e-6)
    reference = -float(np.sum(stats.lognorm.logpdf(y, shape, 0, scale)))
    assert result.nllh == pytest.approx(reference, abs=1e-7)


def test_laplace_point_terms_equal_scipys_density() -> None:
    # Reference: scipy.stats.laplace.logpdf (location h, scale sigma); log10 adds ln(y ln 10)
    y = np.array([1.0, 2.5, 4.0])
    h = np.array([1.2, 2.0, 4.4])
    sigma = np.array([0.3, 0.5, 0.7])
    lin = point_nllh(y, h, sigma, np.array(["lin"] * 3), np.array(["laplace"] * 3))
    assert lin == pytest.approx(-stats.laplace.logpdf(y, h, sigma), abs=1e-12)
    log10 = point_nllh(y, h, sigma, np.array(["log10"] * 3), np.array(["laplace"] * 3))
    density = stats.laplace.logpdf(np.log10(y), np.log10(h), sigma) - np.log(y * math.log(10))
    assert log10 == pytest.approx(-density, abs=1e-12)
    normal = negative_log_likelihood(y, h, sigma, np.array(["lin"] * 3), np.array(["normal"] * 3))
    assert normal == pytest.approx(-np.sum(stats.norm.logpdf(y, h, sigma)), abs=1e-12)
    r = scaled_residuals(y, h, sigma, np.array(["lin"] * 3), np.array(["laplace"] * 3))
    assert 0.5 * r**2 == pytest.approx(np.abs(y - h) / sigma, abs=1e-12)
    assert np.sign(r).tolist() == [-1.0, 1.0, -1.0]


def test_trust_inflation_multiplies_sigma() -> None:
    # sigma_eff = sigma_model * sqrt(inflation / balance): a dataset graded down 4x in variance
    # counts as if its noise were twice as large, in chi2 and in the nllh
    t = np.linspace(0, 5, 12)
    y = 1 + 0.5 * t + np.tile([0.1, -0.1], 6)
    plain = FitProblem(_points(y, t), Line(), _spec(1.0, 0.5, 0.2))
    graded = FitProblem(_points(y, t, inflation=np.full(12, 4.0), balance=np.ones(12)), Line(),
                        _spec(1.0, 0.5, 0.2))  # fmt: skip
    theta = plain.to_internal({"a": 1.0, "b": 0.5, "sigma": 0.2})
    r_plain = plain.point_residual(theta)
    r_graded = graded.point_residual(theta)
    assert r_graded == pytest.approx(r_plain / 2)
    expected = -float(np.sum(stats.norm.logpdf(y, 1 + 0.5 * t, 0.4)))
    assert graded.nllh(theta) == pytest.approx(expected, abs=1e-10)


def test_leave_one_group_out_runs_on_the_likelihood() -> None:
    rng = np.random.default_rng(11)
    t = np.tile(np.linspace(0, 10, 10), 3)
    labels = np.repeat(["one", "two", "three"], 10)
    y = 2.0 + 0.7 * t + rng.normal(0, 0.5, len(t))
    problem = FitProblem(_points(y, t), Line(), _spec())
    full = fit(problem, FitOptions())
    result = leave_one_group_out(problem, full, labels, by="dataset", method="exact")
    assert [g.group for g in result.groups] == ["one", "three", "two"]
    for group in result.groups:
        keep = labels != group.group
        ols = sm.OLS(y[keep], sm.add_constant(t[keep])).fit()
        # the refit without a group is the OLS fit of the rest (statsmodels as the reference)
        assert group.parameters["b"]["value"] == pytest.approx(ols.params[1], abs=1e-5)
        assert group.heldout_chi2 is not None and group.heldout_chi2 > 0


def test_point_scales_give_the_residual_functions_numbers():
    rng = np.random.default_rng(3)
    n = 12
    y = rng.uniform(0.5, 3.0, n)
    simulation = rng.uniform(0.5, 3.0, n)
    sigma = rng.uniform(0.1, 1.0, n)
    transformation = np.array(["lin", "log", "log10"] * 4, dtype=object)
    distribution = np.array(["normal", "laplace"] * 6, dtype=object)
    scales = likelihood.PointScales(y, transformation, distribution)
    expected = np.concatenate([
        likelihood.scaled_residuals(y, simulation, sigma, transformation, distribution),
        likelihood.noise_residuals(sigma, distribution),
    ])  # fmt: skip
    np.testing.assert_allclose(scales.residuals(simulation, sigma), expected, rtol=1e-14)
    assert scales.residuals(simulation, sigma)[n:].min() > 0
