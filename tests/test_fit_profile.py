"""Profile likelihoods (Raue et al. 2009, Bioinformatics 25:1923) and their verdicts.

Reference for the intervals: for a model linear in its parameters with known sigma, the profile
of the weighted sum of squares is exactly quadratic, so the likelihood-ratio interval at
chi2(0.95, 1) is the Wald interval beta +- 1.959964 SE; statsmodels' WLS with a fixed scale
(``cov_type="fixed scale"``, normal quantiles) gives that interval independently.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from curate import fit as fitting
from curate.errors import InputError
from curate.fit.profile import VERDICTS, profile, profile_threshold

sm = pytest.importorskip("statsmodels.api")


def line_points(seed=3, n=25):
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, 10.0, n)
    sigma = 0.2 + 0.05 * t
    y = 1.5 + 0.7 * t + rng.normal(0.0, sigma)
    return pd.DataFrame({"time": t, "value": y, "weight": 1.0 / sigma**2}), t, y, sigma


def line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


def fitted(points, model, parameters):
    problem = fitting.FitProblem(points, model, fitting.spec_from_dict({"parameters": parameters}))
    return problem, fitting.fit(problem, fitting.FitOptions(tolerance=1e-14))


def test_threshold_is_the_chi2_quantile():
    # chi2(0.95, 1) = 3.841459 (any statistics handbook table)
    assert profile_threshold(0.95) == pytest.approx(3.841458820694124, rel=1e-12)
    with pytest.raises(InputError, match="between 0 and 1"):
        profile_threshold(1.5)


def test_linear_model_profile_interval_equals_the_wald_interval():
    points, t, y, sigma = line_points()
    problem, best = fitted(points, line, {"a": {"start": 0.0}, "b": {"start": 0.0}})
    result = profile(problem, best)
    reference = sm.WLS(y, sm.add_constant(t), weights=1.0 / sigma**2).fit(cov_type="fixed scale")
    (a_low, a_high), (b_low, b_high) = reference.conf_int(alpha=0.05)
    for name, low, high in (("a", a_low, a_high), ("b", b_low, b_high)):
        found = result.parameters[name]
        assert found.verdict == "identifiable"
        assert found.lower == pytest.approx(low, abs=1e-6)
        assert found.upper == pytest.approx(high, abs=1e-6)
        values = np.array([x for x, _ in found.points])
        assert np.all(np.diff(values) > 0) and values[0] < low and values[-1] > high
    assert result.parameters["a"].value == pytest.approx(reference.params[0], rel=1e-8)
    # every walked point lies on the exact quadratic profile
    se = reference.bse[1]
    for x, objective in result.parameters["b"].points:
        expected = result.optimum + ((x - reference.params[1]) / se) ** 2
        assert objective == pytest.approx(expected, rel=1e-7, abs=1e-7)


def product_model(params, points):
    return params["k1"] * params["k2"] * (1.0 - np.exp(-points["time"].to_numpy() / 3.0))


def test_only_a_product_identified_gives_flat_profiles():
    points, *_ = line_points()
    t = points["time"].to_numpy()
    points = points.assign(value=6.0 * (1.0 - np.exp(-t / 3.0)) + 0.1 * np.sin(7 * t))
    spec = {"k1": {"start": 1.0, "lower": 1e-3, "upper": 1e3, "log": True},
            "k2": {"start": 2.0, "lower": 1e-3, "upper": 1e3, "log": True}}  # fmt: skip
    problem, best = fitted(points, product_model, spec)
    result = profile(problem, best)
    for name in ("k1", "k2"):
        assert result.parameters[name].verdict == "structurally non-identifiable"
        assert result.parameters[name].lower is None and result.parameters[name].upper is None
        values = [x for x, _ in result.parameters[name].points]
        assert min(values) < 1e-2 and max(values) > 1e2  # walked to (near) both bounds


def reparameterised(params, points):
    return params["product"] * (1.0 - np.exp(-points["time"].to_numpy() / 3.0))


def test_the_product_reparameterised_is_identifiable():
    points, *_ = line_points()
    t = points["time"].to_numpy()
    points = points.assign(value=6.0 * (1.0 - np.exp(-t / 3.0)) + 0.1 * np.sin(7 * t))
    problem, best = fitted(points, reparameterised,
                           {"product": {"start": 1.0, "lower": 1e-3, "upper": 1e3, "log": True}})  # fmt: skip
    found = profile(problem, best).parameters["product"]
    assert found.verdict == "identifiable"
    assert found.lower < found.value < found.upper


def saturating(params, points):
    t = points["time"].to_numpy()
    return params["top"] * t / (params["half"] + t)


def test_a_half_saturation_beyond_the_data_is_practically_non_identifiable():
    """Data that never bend (times far below the half-saturation constant): the profile of
    ``half`` rises on the low side but stays below the threshold up to the bound."""
    t = np.linspace(0.1, 1.0, 12)
    points = pd.DataFrame({"time": t, "value": 50.0 * t / (400.0 + t) + 0.001 * np.cos(5 * t),
                           "weight": np.full(12, 1.0 / 0.002**2)})  # fmt: skip
    spec = {"top": {"start": 10.0, "lower": 1e-3, "upper": 1e6, "log": True},
            "half": {"start": 10.0, "lower": 1e-3, "upper": 1e6, "log": True}}  # fmt: skip
    problem, best = fitted(points, saturating, spec)
    found = profile(problem, best, ["half"]).parameters["half"]
    assert found.verdict == "practically non-identifiable"
    assert found.upper is None and found.lower is not None


def test_unknown_and_fixed_parameters_are_refused():
    points, *_ = line_points()
    problem, best = fitted(points, line, {"a": {"start": 0.0}, "b": {"start": 0.0},
                                          "c": {"start": 1.0, "fixed": True}})  # fmt: skip
    with pytest.raises(InputError, match="profile --parameter c: it is fixed in the spec"):
        profile(problem, best, ["c"])
    with pytest.raises(InputError, match="profile --parameter zz: it is not a parameter"):
        profile(problem, best, ["zz"])


def test_json_shape():
    points, *_ = line_points()
    problem, best = fitted(points, line, {"a": {"start": 0.0}, "b": {"start": 0.0}})
    shape = profile(problem, best, ["b"]).to_dict()
    assert set(shape) == {"parameters"} and set(shape["parameters"]) == {"b"}
    assert set(shape["parameters"]["b"]) == {"value", "lower", "upper", "verdict", "points"}
    assert shape["parameters"]["b"]["verdict"] in VERDICTS
    assert all(len(p) == 2 for p in shape["parameters"]["b"]["points"])


def test_cli_profile_records_a_run_and_refuses_bad_input(cli, tmp_path):
    import json

    from conftest import add_mixed_observable, saturating_model

    import curate

    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        absolute, _ = add_mixed_observable(catalog)
    model, params = saturating_model(tmp_path)
    run = cli("profile", "--model", f"{model}:predict", "--params", params, "--json")
    assert run.code == 0, run.err
    found = json.loads(run.out)["parameters"]
    assert set(found) == {"top", "tau"}
    for entry in found.values():
        assert entry["verdict"] == "identifiable" and entry["lower"] < entry["value"] < entry["upper"]
    assert found["top"]["value"] == pytest.approx(20.0, rel=1e-6)
    text = cli("profile", "--model", f"{model}:predict", "--params", params, "--parameter", "tau")
    assert text.code == 0 and "tau" in text.out and "identifiable" in text.out
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        assert [e["kind"] for e in catalog.events()].count("profile") == 2
        catalog.revise(absolute, reason="relabelled", label="concentration")
        assert "profile" in [e.kind for e in catalog.impact(absolute)]
    for args, message in (
        (("--parameter", "nope"), "profile --parameter nope: it is not a parameter"),
        (("--level", "1.2"), "confidence level 1.2"),
    ):
        bad = cli("profile", "--model", f"{model}:predict", "--params", params, *args)
        assert bad.code == 2 and message in bad.err and bad.err.count("\n") == 1


def test_the_report_draws_the_newest_ensemble_and_profiles(cli, tmp_path):
    from conftest import add_mixed_observable, saturating_model

    import curate

    report = tmp_path / "r.html"
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        add_mixed_observable(catalog)
    assert cli("report", report).code == 0
    page = report.read_text()
    assert "No ensemble recorded yet" in page and "No profile recorded yet" in page
    model, params = saturating_model(tmp_path)
    assert cli("profile", "--model", f"{model}:predict", "--params", params).code == 0
    assert cli("ensemble", "--model", f"{model}:predict", "--params", params, "--starts", "6").code == 0
    assert cli("report", report).code == 0
    page = report.read_text()
    assert '<section id="ensemble"><h2>Many good fits</h2>' in page and "6 starts (seed 0)" in page
    assert '<section id="profiles"><h2>Profiles</h2>' in page
    assert 'alt="waterfall' in page and "each parameter&#x27;s profile with its threshold" in page
    assert page.count("identifiable") >= 2


def test_a_mirror_optimum_found_by_the_starts_is_named_beside_the_interval():
    # two decays of equal amplitude: swapping k1 and k2 gives the same curve, so the profile of
    # k1 comes back to the optimum at the other rate (textbook non-uniqueness; no source needed)
    t = np.linspace(0.0, 20.0, 40)
    y = np.exp(-0.1 * t) + np.exp(-1.0 * t) + 0.002 * np.sin(3 * t)
    points = pd.DataFrame({"time": t, "value": y, "weight": np.full(len(t), 1.0 / 0.01**2)})

    def decays(params, frame):
        time = frame["time"].to_numpy()
        return np.exp(-params["k1"] * time) + np.exp(-params["k2"] * time)

    spec = fitting.spec_from_dict({"parameters": {
        "k1": {"start": 0.05, "lower": 0.01, "upper": 10.0, "log": True},
        "k2": {"start": 3.0, "lower": 0.01, "upper": 10.0, "log": True}}})  # fmt: skip
    problem = fitting.FitProblem(points, decays, spec)
    best = fitting.fit(problem, fitting.FitOptions(starts=12, seed=0))
    result = profile(problem, best, ["k1"])
    k1 = result.parameters["k1"]
    assert k1.verdict == VERDICTS[0]
    mirror = 1.0 if k1.value < 0.5 else 0.1
    assert not (k1.lower <= mirror <= k1.upper)
    notes = [n for n in result.notes if "not one interval" in n]
    assert len(notes) == 1 and f"k1 = {mirror:.4g}" in notes[0].replace("0.1000", "0.1")
    # one start: no other optimum is known, nothing is claimed
    alone = profile(problem, fitting.fit(problem, fitting.FitOptions(starts=1)), ["k1"])
    assert not [n for n in alone.notes if "not one interval" in n]
