"""Which data identify which parameter: profiles without each group.

Outside reference: for a linear model with known sigma the profile interval without a group is
the Wald interval of the remaining data (statsmodels WLS, ``cov_type="fixed scale"``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from curate import fit as fitting
from curate.fit.deciding import profiles_by_group

sm = pytest.importorskip("statsmodels.api")


def saturating(params, points):
    return params["top"] * (1.0 - np.exp(-points["time"].to_numpy() / params["tau"]))


def two_datasets():
    """'early' samples the rise (t <= 2, tau = 5): it alone fixes tau; 'late' sits on the
    plateau (t >= 40): it alone pins top, and says nothing about tau below a bound."""
    early = np.linspace(0.2, 2.0, 10)
    late = np.linspace(40.0, 60.0, 10)
    t = np.concatenate([early, late])
    y = 8.0 * (1.0 - np.exp(-t / 5.0)) + 0.01 * np.sin(11 * t)
    return pd.DataFrame({"time": t, "value": y, "weight": np.full(20, 1.0 / 0.05**2),
                         "dataset_id": ["early"] * 10 + ["late"] * 10})  # fmt: skip


def test_the_dataset_that_alone_identifies_a_parameter_is_named():
    points = two_datasets()
    spec = fitting.spec_from_dict({"parameters": {
        "top": {"start": 5.0, "lower": 0.01, "upper": 1e4, "log": True},
        "tau": {"start": 2.0, "lower": 0.01, "upper": 1e4, "log": True}}})  # fmt: skip
    problem = fitting.FitProblem(points, saturating, spec)
    best = fitting.fit(problem)
    result = profiles_by_group(problem, best, points["dataset_id"].to_numpy(), by="dataset")
    assert {p.verdict for p in result.full.parameters.values()} == {"identifiable"}
    rows = {g.group: g for g in result.groups}
    assert rows["late"].parameters["tau"]["verdict"] == "identifiable"
    assert rows["late"].parameters["top"]["widening"] > 2.0  # the rise alone pins top loosely
    assert rows["early"].parameters["tau"]["verdict"] == "practically non-identifiable"
    assert rows["early"].parameters["tau"]["opens"] is True
    assert "without dataset early, tau is no longer identifiable (practically non-identifiable)" in result.conclusions
    assert any(c.startswith("without dataset late, the interval of top widens x") for c in result.conclusions)


def line(params, points):
    return params["a"] + params["b"] * points["time"].to_numpy()


def test_intervals_without_a_group_equal_the_wald_interval_of_the_rest():
    rng = np.random.default_rng(5)
    t = np.tile(np.linspace(0.0, 10.0, 8), 3)
    sigma = np.full(len(t), 0.3)
    y = 2.0 + 0.5 * t + rng.normal(0.0, sigma)
    labels = np.repeat(["d1", "d2", "d3"], 8)
    points = pd.DataFrame({"time": t, "value": y, "weight": 1.0 / sigma**2, "dataset_id": labels})
    spec = fitting.spec_from_dict({"parameters": {"a": {"start": 0.0}, "b": {"start": 0.0}}})
    problem = fitting.FitProblem(points, line, spec)
    result = profiles_by_group(problem, fitting.fit(problem), labels, by="dataset")
    for row in result.groups:
        keep = labels != row.group
        reference = sm.WLS(y[keep], sm.add_constant(t[keep]), weights=1.0 / sigma[keep] ** 2).fit(
            cov_type="fixed scale")
        (a_low, _a_high), (_b_low, b_high) = reference.conf_int(alpha=0.05)
        assert row.parameters["a"]["lower"] == pytest.approx(a_low, abs=1e-6)
        assert row.parameters["b"]["upper"] == pytest.approx(b_high, abs=1e-6)
        # a third of the data gone: the interval widens by about sqrt(3/2)
        assert row.parameters["b"]["widening"] == pytest.approx(np.sqrt(1.5), rel=0.02)


MODEL = """
import numpy as np


def predict(params, points):
    return params["top"] * (1.0 - np.exp(-points["time"].to_numpy() / 60.0 / params["tau"]))
"""
SPEC = """
[parameters.top]
start = 5.0
lower = 0.01
upper = 1e4
log = true

[parameters.tau]
start = 2.0
lower = 0.01
upper = 1e4
log = true
"""


def test_cli_sensitivity_profiles_names_the_deciding_dataset(cli, tmp_path):
    import json

    from conftest import NEUTRAL, write

    points = two_datasets()
    for name, group in points.groupby("dataset_id"):
        text = "time,value,sd\n" + "".join(f"{t},{v},0.05\n" for t, v in zip(group["time"], group["value"], strict=True))
        run = cli("add", write(tmp_path / f"{name}.csv", text), "--observable", "signal", "--unit", "nM",
                  "--time-unit", "min", "--lab", f"lab {name}", "--id", name)  # fmt: skip
        assert run.code == 0, run.err
    model, spec = write(tmp_path / "m.py", MODEL), write(tmp_path / "p.toml", SPEC)
    policy = write(tmp_path / "n.toml", NEUTRAL)
    args = ["sensitivity", "--model", f"{model}:predict", "--params", spec, "--policy", policy,
            "--workers", "1", "--profiles"]  # fmt: skip
    run = cli(*args, "--json")
    assert run.code == 0, run.err
    found = json.loads(run.out)["profiles"]
    assert "without dataset early, tau is no longer identifiable (practically non-identifiable)" in found["conclusions"]
    text = cli(*args).out
    assert "which data identify which parameter:" in text and "open" in text
    bad = cli(*args, "--method", "one-step")
    assert bad.code == 2 and "--method exact" in bad.err
    report = tmp_path / "report.html"
    assert cli("report", report).code == 0
    page = report.read_text()
    assert "group x parameter: each parameter&#x27;s verdict and interval widening without each dataset" in page
    assert "without dataset early, tau is no longer identifiable" in page
