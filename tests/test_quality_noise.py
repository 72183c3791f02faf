"""Noise estimators against simulated series of known sigma, numpy/pandas and handbook values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from curate.errors import InputError
from curate.quality import noise

SIGMA = 0.1
REPS = 300
N = 200


def smooth(x):
    # gentle enough that 200 points resolve it: the HKT sequences cancel constants only, so a
    # slope s per step adds (s * sum_j j d_j)^2 to their variance (about 1% of sigma^2 here)
    return 0.3 * np.sin(2 * np.pi * x) + 0.2 * x


def monte_carlo(estimator, *, uneven=False, seed=0):
    rng = np.random.default_rng(seed)
    estimates = []
    for _ in range(REPS):
        x = np.sort(rng.uniform(0, 1, N)) if uneven else np.linspace(0, 1, N)
        y = smooth(x) + rng.normal(0, SIGMA, N)
        estimates.append(estimator(x, y).sd)
    estimates = np.asarray(estimates)
    # tolerance: 4 Monte-Carlo standard errors of the mean estimate (from the replicates
    # themselves), plus 2% for the bias the smooth signal leaves in a difference estimator
    # (for Rice: mean squared signal step (2 pi / N)^2 / 2 over 2 sigma^2, about 1% of sigma^2)
    tolerance = 4 * estimates.std(ddof=1) / np.sqrt(REPS) + 0.02 * SIGMA
    return estimates.mean(), tolerance


@pytest.mark.parametrize(
    ("name", "estimator"),
    [
        ("rice", lambda x, y: noise.rice(y)),
        ("gsj", lambda x, y: noise.gasser_sroka(x, y)),
        ("hkt2", lambda x, y: noise.hall_kay_titterington(y, order=2)),
        ("hkt3", lambda x, y: noise.hall_kay_titterington(y, order=3)),
        ("mad", lambda x, y: noise.mad_pseudo_residuals(x, y)),
    ],
)
def test_difference_estimators_recover_sigma(name, estimator):
    mean, tolerance = monte_carlo(estimator)
    assert abs(mean - SIGMA) < tolerance, (name, mean, tolerance)


def test_gsj_recovers_sigma_on_uneven_spacing():
    mean, tolerance = monte_carlo(lambda x, y: noise.gasser_sroka(x, y), uneven=True, seed=3)
    assert abs(mean - SIGMA) < tolerance


def test_gsj_is_exact_for_a_straight_line():
    x = np.array([0.0, 0.5, 2.0, 2.1, 5.0, 9.0])
    assert noise.gasser_sroka(x, 3.0 * x - 2.0).sd == pytest.approx(0.0, abs=1e-12)


def test_hkt_sequences_are_the_optimal_difference_sequences():
    # Hall, Kay & Titterington (1990): a difference sequence has sum d_j = 0 and sum d_j^2 = 1,
    # and the optimal one of order m has every lag-k autocorrelation sum_j d_j d_{j+k} equal
    # to -1/(2m), k = 1..m. This checks the coefficients we recalled from memory.
    for order, sequence in noise.HKT_SEQUENCES.items():
        d = np.asarray(sequence)
        assert d.sum() == pytest.approx(0.0, abs=2e-4)
        assert (d * d).sum() == pytest.approx(1.0, abs=2e-4)
        for lag in range(1, order + 1):
            assert (d[:-lag] * d[lag:]).sum() == pytest.approx(-1 / (2 * order), abs=2e-4)


def test_mad_resists_outliers_where_rice_does_not():
    rng = np.random.default_rng(11)
    x = np.linspace(0, 1, 400)
    y = smooth(x) + rng.normal(0, SIGMA, 400)
    y[::40] += 3.0  # 10 gross outliers
    assert noise.rice(y).sd > 2 * SIGMA
    assert noise.mad_pseudo_residuals(x, y).sd == pytest.approx(SIGMA, rel=0.15)


def test_replicate_sd_matches_pandas():
    rng = np.random.default_rng(5)
    time = np.repeat(np.arange(8.0), [3, 3, 2, 4, 3, 1, 3, 5])
    value = rng.normal(time, 0.3)
    result = noise.replicate_sd(time, value)
    frame = pd.DataFrame({"t": time, "y": value})
    expected = frame.groupby("t")["y"].std(ddof=1).to_numpy()
    np.testing.assert_allclose(result.sds, expected, rtol=1e-12, equal_nan=True)
    counts = frame.groupby("t")["y"].count().to_numpy()
    pooled = np.sqrt(np.nansum(expected**2 * (counts - 1)) / np.sum(counts - 1))
    assert result.pooled_sd == pytest.approx(pooled, rel=1e-12)
    # numpy's std with ddof=1 for one time point
    assert result.sds[3] == pytest.approx(np.std(value[time == 3], ddof=1), rel=1e-12)
    assert "only 2 replicates" in result.result().warnings[0]


def test_replicates_needed():
    with pytest.raises(InputError, match="no time point has two or more values"):
        noise.replicate_sd(np.arange(5.0), np.ones(5))


def test_reported_conversions():
    # SD = SEM * sqrt(n); a 95% CI half-width is 1.959964 SD (normal quantile, handbook value)
    np.testing.assert_allclose(noise.reported_to_sd(np.array([1.0]), kind="sem", n=4), [2.0])
    np.testing.assert_allclose(
        noise.reported_to_sd(np.array([1.959964]), kind="ci", level=0.95), [1.0], rtol=1e-6
    )
    # with n = 10 the interval is of a mean: half-width = t_{9, 0.975} SEM, t_{9, 0.975} = 2.262157
    # (statistical tables), so SEM = 1 and the single-measurement SD = SEM * sqrt(10)
    np.testing.assert_allclose(
        noise.reported_to_sd(np.array([2.262157]), kind="ci", level=0.95, n=10),
        [np.sqrt(10.0)],
        rtol=1e-6,
    )
    np.testing.assert_allclose(
        noise.reported_to_sd(np.array([10.0]), kind="percent", value=np.array([-40.0])), [4.0]
    )


def test_error_model_recovers_additive_and_proportional_parts():
    rng = np.random.default_rng(2026)
    a_true, b_true = 0.5, 0.08
    mu = np.repeat(np.linspace(1, 100, 60), 4)
    time = np.repeat(np.arange(60.0), 4)
    value = mu + rng.normal(0, np.sqrt(a_true**2 + (b_true * mu) ** 2))
    model = noise.error_model(time, value)
    assert abs(model.a - a_true) < 3 * model.a_stderr
    assert abs(model.b - b_true) < 3 * model.b_stderr
    assert model.b_stderr < 0.2 * b_true  # the proportional part is well determined here
    assert model.sigma(np.array([0.0]))[0] == pytest.approx(model.a)


def test_error_model_needs_three_replicated_times():
    with pytest.raises(InputError, match="the error model needs at least 3"):
        noise.error_model(np.array([0, 0, 1, 1.0]), np.array([1, 2, 3, 4.0]))


def test_floor():
    floored = noise.apply_floor(
        np.array([0.0, 0.01, 1.0]), np.array([5.0, 100.0, 1.0]), absolute=0.02, relative=0.01
    )
    np.testing.assert_allclose(floored, [0.05, 1.0, 1.0])


@pytest.mark.parametrize(("method", "minimum"), sorted(noise.MINIMUM_POINTS.items()))
def test_minimum_points(method, minimum):
    x = np.arange(float(minimum - 1))
    with pytest.raises(InputError, match=f"needs at least {minimum}"):
        noise.choose_and_estimate(x, x**2, method=method)


def test_automatic_choice():
    x = np.arange(10.0)
    assert noise.choose_and_estimate(np.repeat(x, 2), np.repeat(x, 2)).method == "replicates"
    assert noise.choose_and_estimate(x, x, reported_sd=np.full(10, 0.2)).method == "reported"
    chosen = noise.choose_and_estimate(x, np.sin(x))
    assert chosen.method == "gsj" and "no reported uncertainty" in chosen.parameters["choice"]
