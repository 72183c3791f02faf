"""Censored points in a fit: the censored-normal term against scipy's own censored fits."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import scipy
from scipy import optimize, stats

from curate import fit as fitting
from curate.errors import InputError
from curate.fit.censored import censored_terms, fit_points, residuals_with_censoring


def _mean(params, points):
    return np.full(len(points), params["mu"])


def _line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


def test_censored_term_is_minus_log_phi_also_far_in_the_tail():
    # Phi(-40) = 3.7e-350 underflows as a float; log_ndtr keeps -log Phi(-40) = 804.6 (Abramowitz
    # & Stegun 26.2.12, asymptotic tail: log Phi(-x) ~ -x^2/2 - log(x sqrt(2 pi)))
    z = np.array([1.0, 0.0, -40.0, 1.0])
    codes = np.array([1, 1, 1, 2])
    terms = censored_terms(z, codes)
    assert terms[0] == pytest.approx(-stats.norm.logcdf(1.0), rel=1e-14)
    assert terms[1] == pytest.approx(math.log(2.0), rel=1e-14)
    assert terms[2] == pytest.approx(800 + math.log(40 * math.sqrt(2 * math.pi)), rel=1e-5)
    assert terms[3] == pytest.approx(-stats.norm.logcdf(-1.0), rel=1e-14)  # above: Phi(-z)
    residual = residuals_with_censoring(z, codes)
    assert 0.5 * residual**2 == pytest.approx(terms, rel=1e-13)


def _tight_fmin(func, x0, args=(), disp=0):
    return optimize.fmin(func, x0, args=args, disp=0, xtol=1e-12, ftol=1e-14, maxiter=20000)


def _censored_sample(seed=3, n=60, limit=9.0):
    rng = np.random.default_rng(seed)
    raw = rng.normal(10.0, 2.0, n)
    below = raw < limit
    values = np.where(below, limit, raw)
    return raw, values, below, limit


@pytest.mark.skipif(
    tuple(int(x) for x in scipy.__version__.split(".")[:2]) < (1, 11),
    reason="scipy.stats.CensoredData needs scipy >= 1.11",
)
def test_mean_and_sd_of_left_censored_normal_samples_equal_scipys_censored_fit():
    # outside check: scipy.stats.norm.fit on scipy.stats.CensoredData (scipy >= 1.11), the
    # maximum-likelihood fit of the censored-normal model (Tobin 1958)
    raw, values, below, limit = _censored_sample()
    assert 10 <= below.sum() <= 40  # a real share of the sample is censored
    data = stats.CensoredData(uncensored=raw[~below], left=np.full(below.sum(), limit))
    # scipy's default search (optimize.fmin, xtol 1e-4) stops near 1e-5 of its optimum; the
    # same likelihood with a tighter search tolerance is the reference
    mu_ref, sd_ref = stats.norm.fit(data, optimizer=_tight_fmin)
    points = pd.DataFrame({"time": np.arange(len(values), dtype=float), "value": values,
                           "censored": np.where(below, "below", "")})  # fmt: skip
    spec = fitting.ParameterSpec((fitting.Parameter("mu", 8.0),))

    def profile(log_sd: float) -> tuple[float, float]:
        # for a fixed sd the engine fits mu; the sd is found by maximising over it
        frame = points.assign(weight=math.exp(-2 * log_sd))
        problem = fitting.FitProblem(frame, _mean, spec)
        result = fitting.fit(problem, fitting.FitOptions(tolerance=1e-14))
        return problem.nllh(result.theta), result.values()["mu"]

    found = optimize.minimize_scalar(lambda s: profile(s)[0], bracket=(0.0, 1.5), tol=1e-12)
    sd = math.exp(found.x)
    mu = profile(found.x)[1]
    assert mu == pytest.approx(mu_ref, abs=1e-6)
    assert sd == pytest.approx(sd_ref, abs=1e-6)
    # and not the naive answers: treating the limits as numbers, or leaving them out
    assert abs(mu_ref - values.mean()) > 0.1 and abs(mu_ref - raw[~below].mean()) > 0.1


def _line_with_left_censoring(seed=5):
    rng = np.random.default_rng(seed)
    time = np.linspace(0.0, 10.0, 40)
    sigma = np.full(len(time), 0.4)
    sigma[::3] = 0.7
    y = 0.3 + 0.25 * time + rng.normal(0.0, sigma)
    limit = 1.2
    below = y < limit
    return time, sigma, np.where(below, limit, y), below, limit


def test_straight_line_with_left_censored_points_equals_an_independent_maximum_likelihood():
    time, sigma, value, below, limit = _line_with_left_censoring()
    assert 5 <= below.sum() <= 20
    points = pd.DataFrame({"time": time, "value": value, "weight": 1 / sigma**2,
                           "censored": np.where(below, "below", "")})  # fmt: skip
    spec = fitting.ParameterSpec((fitting.Parameter("a", 1.0), fitting.Parameter("b", 0.1)))
    problem = fitting.FitProblem(points, _line, spec)
    result = fitting.fit(problem, fitting.FitOptions(tolerance=1e-14))

    # outside check: the censored-normal log-likelihood written with scipy.stats.norm.logpdf
    # (observed) and norm.logcdf (below the limit), maximised by scipy.optimize.minimize
    def nllh(p):
        f = p[0] + p[1] * time
        observed = stats.norm.logpdf(value[~below], f[~below], sigma[~below]).sum()
        censored = stats.norm.logcdf((limit - f[below]) / sigma[below]).sum()
        return -(observed + censored)

    reference = optimize.minimize(nllh, [1.0, 0.1], method="Nelder-Mead",
                                  options={"xatol": 1e-12, "fatol": 1e-14, "maxiter": 20000})  # fmt: skip
    values = result.values()
    assert values["a"] == pytest.approx(reference.x[0], abs=1e-6)
    assert values["b"] == pytest.approx(reference.x[1], abs=1e-6)
    assert result.nllh == pytest.approx(reference.fun, abs=1e-9)
    # the standard errors against the inverse of the nllh's Hessian by finite differences of
    # the independent nllh (the observed information; exact for this linear model)
    step = 1e-4
    hessian = np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            e_i, e_j = np.eye(2)[i] * step, np.eye(2)[j] * step
            x = reference.x
            hessian[i, j] = (nllh(x + e_i + e_j) - nllh(x + e_i - e_j) - nllh(x - e_i + e_j)
                             + nllh(x - e_i - e_j)) / (4 * step * step)  # fmt: skip
    observed_se = np.sqrt(np.diag(np.linalg.inv(hessian)))
    ours = np.array([result.parameters["a"]["stderr"], result.parameters["b"]["stderr"]])
    assert ours == pytest.approx(observed_se, rel=1e-4)


def test_without_censored_points_the_objective_is_unchanged():
    time, sigma, value, _, _ = _line_with_left_censoring()
    plain = pd.DataFrame({"time": time, "value": value, "weight": 1 / sigma**2})
    marked = plain.assign(censored="")  # the column present, no point censored
    spec = fitting.ParameterSpec((fitting.Parameter("a", 1.0), fitting.Parameter("b", 0.1)))
    theta = np.array([0.7, 2.1])
    one, two = fitting.FitProblem(plain, _line, spec), fitting.FitProblem(marked, _line, spec)
    # the weighted least-squares residual and normal nllh, written out by hand
    f = 0.7 + (2.1 * 0.1) * time
    by_hand = (value - f) / sigma
    nllh = 0.5 * by_hand @ by_hand + np.log(sigma).sum() + 0.5 * len(time) * math.log(2 * math.pi)
    for problem in (one, two):
        assert np.abs(problem.residual(theta) - by_hand).max() < 1e-12
        assert abs(problem.nllh(theta) - nllh) < 1e-12
    a, b = fitting.fit(one), fitting.fit(two)
    assert abs(a.chi2 - b.chi2) < 1e-12 and a.values() == b.values()


def test_a_censored_point_above_its_limit_pulls_the_fit_up():
    # one point above 5.0 (a saturated reading), the rest observed at 1.0
    points = pd.DataFrame({"time": np.arange(6.0), "value": [1.0, 1.0, 1.0, 1.0, 1.0, 5.0],
                           "weight": 1.0, "censored": ["", "", "", "", "", "above"]})  # fmt: skip
    spec = fitting.ParameterSpec((fitting.Parameter("mu", 1.0),))
    fitted = fitting.fit(fitting.FitProblem(points, _mean, spec)).values()["mu"]
    omitted = fitting.fit(fitting.FitProblem(points.iloc[:5], _mean, spec)).values()["mu"]
    assert omitted == pytest.approx(1.0)
    # d/dmu [0.5 * 5 (mu-1)^2 - log Phi(mu - 5)] = 0 solved by brentq on the same formula
    reference = optimize.brentq(
        lambda m: 5 * (m - 1) - stats.norm.pdf(m - 5) / stats.norm.cdf(m - 5), 1.0, 5.0
    )
    assert fitted == pytest.approx(reference, abs=1e-7) and fitted > 1.05


def test_relative_data_take_their_scale_factor_from_observed_points_only():
    time = np.arange(8.0)
    model = 1.0 + time
    value = 3.0 * model
    codes = np.array(["below", "", "", "", "", "", "", ""])
    value[0] = 100.0  # a limit far above 3 * model: would drag s* if it counted
    points = pd.DataFrame({"time": time, "value": value, "weight": 1.0, "relative": True,
                           "calibration_group": "blot1", "censored": codes})  # fmt: skip
    spec = fitting.ParameterSpec((fitting.Parameter("a", 1.0, fixed=True),
                                  fitting.Parameter("b", 1.0, fixed=True)))  # fmt: skip
    problem = fitting.FitProblem(points, _line, spec)
    theta = problem.to_internal({})
    assert problem.scales(problem.predict(theta))[0] == pytest.approx(3.0, rel=1e-12)
    residual = problem.residual(theta)
    assert residual[1:] == pytest.approx(0.0, abs=1e-12)
    # the censored point is below 100 with s f = 3: -log Phi(97) is ~0
    assert residual[0] == pytest.approx(0.0, abs=1e-12)


def test_policy_omit_leaves_censored_points_out_and_says_so():
    table = pd.DataFrame({"value": [1.0, 2.0, 0.5], "censored": ["", "", "below"]})
    kept, notes = fit_points(table, "omit")
    assert list(kept["value"]) == [1.0, 2.0]
    assert notes == ['1 censored points left out of the fit (policy: censored = "omit")']
    same, notes = fit_points(table, "likelihood")
    assert len(same) == 3 and "censored-normal" in notes[0]


def test_a_noise_model_backend_refuses_censored_points_in_one_line():
    class NoiseModel(fitting.PythonFunction):  # type: ignore[misc]
        noise_model = True

    points = pd.DataFrame({"value": [1.0], "weight": [1.0], "censored": ["below"]})
    spec = fitting.ParameterSpec((fitting.Parameter("mu", 1.0),))
    with pytest.raises(InputError, match='1 censored points: .* censored = "omit"'):
        fitting.FitProblem(points, NoiseModel(_mean), spec)
