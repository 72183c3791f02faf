"""Ensembles of good fits: mirror optima found as two families of equal objective."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from curate import fit as fitting
from curate.errors import InputError
from curate.fit.ensemble import ensemble


def two_exponentials(params, points):
    t = points["time"].to_numpy()
    return np.exp(-params["k1"] * t) + np.exp(-params["k2"] * t)


def mirror_problem():
    """Two decays of equal amplitude: swapping k1 and k2 gives the same curve, so the fit has two
    mirror optima of exactly equal objective (a textbook non-uniqueness; no source needed)."""
    t = np.linspace(0.0, 20.0, 40)
    y = np.exp(-0.1 * t) + np.exp(-1.0 * t) + 0.002 * np.sin(3 * t)
    points = pd.DataFrame({"time": t, "value": y, "weight": np.full(len(t), 1.0 / 0.01**2)})
    spec = fitting.spec_from_dict({"parameters": {
        "k1": {"start": 0.05, "lower": 0.01, "upper": 10.0, "log": True},
        "k2": {"start": 3.0, "lower": 0.01, "upper": 10.0, "log": True}}})  # fmt: skip
    return fitting.FitProblem(points, two_exponentials, spec)


def test_mirror_optima_are_two_clusters_of_equal_objective():
    result = ensemble(mirror_problem(), fitting.FitOptions(starts=30, seed=0))
    assert result.threshold == pytest.approx(stats.chi2.ppf(0.95, 2), rel=1e-12)  # 5.991
    assert result.failed == [] and result.starts == 30
    families = [c for c in result.clusters if c.size >= 2]
    assert len(families) == 2
    first, second = families
    assert first.objective == pytest.approx(second.objective, rel=1e-8, abs=1e-8)
    assert first.parameters["k1"]["median"] == pytest.approx(second.parameters["k2"]["median"], rel=1e-4)
    assert first.parameters["k2"]["median"] == pytest.approx(second.parameters["k1"]["median"], rel=1e-4)
    assert sorted([first.parameters["k1"]["median"], first.parameters["k2"]["median"]]) == pytest.approx([0.1, 1.0], rel=0.05)
    # the same families from another seed
    again = ensemble(mirror_problem(), fitting.FitOptions(starts=30, seed=1))
    assert len([c for c in again.clusters if c.size >= 2]) == 2
    shape = result.to_dict()
    assert {"starts", "failed", "threshold", "best", "accepted", "clusters"} <= set(shape)
    assert set(shape["best"]) == {"objective", "parameters"}
    assert set(shape["clusters"][0]) == {"id", "size", "objective", "parameters"}
    assert set(shape["clusters"][0]["parameters"]["k1"]) == {"median", "min", "max"}
    json.dumps(shape, allow_nan=False)


def failing_sometimes(params, points):
    if params["k1"] > 3.0:
        raise RuntimeError("solver failed")
    return two_exponentials(params, points)


def test_starts_where_the_model_fails_are_recorded_not_fatal():
    problem = mirror_problem()
    problem = fitting.FitProblem(problem.points, failing_sometimes, problem.spec)
    result = ensemble(problem, fitting.FitOptions(starts=20, seed=0))
    assert result.failed and all("solver failed" in f["error"] for f in result.failed)
    assert result.accepted >= 1 and len(result.failed) + len(result.objectives) == 20


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [({"threshold": 0.0}, "--threshold 0.0"), ({"cut": -1.0}, "--cut -1.0")],
)
def test_bad_settings_are_refused(kwargs, message):
    with pytest.raises(InputError, match=message):
        ensemble(mirror_problem(), fitting.FitOptions(starts=5), **kwargs)
    with pytest.raises(InputError, match="at least 2 starts"):
        ensemble(mirror_problem(), fitting.FitOptions(starts=1))


def slow_two_exponentials(params, points):
    import time

    time.sleep(0.004)  # a model slow enough that two workers pay for their start
    return two_exponentials(params, points)


@pytest.mark.xdist_group("own_processes")
def test_two_workers_give_the_serial_ensemble(monkeypatch):
    from curate.fit import ensemble as module

    # the pool is used whatever the machine's speed (the choice itself is timing)
    monkeypatch.setattr(module, "WORKER_START_SECONDS", -1e9)
    problem = mirror_problem()
    problem = fitting.FitProblem(problem.points, slow_two_exponentials, problem.spec)
    serial = ensemble(problem, fitting.FitOptions(starts=24, seed=2))
    pooled = ensemble(problem, fitting.FitOptions(starts=24, seed=2), workers=2)
    assert pooled.executor == "process pool (2 workers)"
    np.testing.assert_allclose(pooled.objectives, serial.objectives, rtol=1e-10)
    assert [c.size for c in pooled.clusters] == [c.size for c in serial.clusters]


def test_past_the_clustering_limit_the_rest_join_the_nearest_family(monkeypatch):
    from curate.fit import ensemble as module

    whole = ensemble(mirror_problem(), fitting.FitOptions(starts=30, seed=0))
    monkeypatch.setattr(module, "MAX_CLUSTERED", 8)  # linkage over 8 fits, the others assigned
    sampled = ensemble(mirror_problem(), fitting.FitOptions(starts=30, seed=0))
    assert sampled.accepted == whole.accepted > 8
    assert sorted(c.size for c in sampled.clusters) == sorted(c.size for c in whole.clusters)
    for a, b in zip(sampled.clusters, whole.clusters, strict=True):
        assert a.parameters["k1"]["median"] == pytest.approx(b.parameters["k1"]["median"], rel=1e-6)


@pytest.mark.xdist_group("own_processes")
def test_dask_gives_the_serial_ensemble():
    pytest.importorskip("dask.distributed")
    serial = ensemble(mirror_problem(), fitting.FitOptions(starts=16, seed=3))
    spread = ensemble(mirror_problem(), fitting.FitOptions(starts=16, seed=3), dask="local")
    assert spread.executor.startswith("dask (local, ")
    np.testing.assert_allclose(spread.objectives, serial.objectives, rtol=1e-10)
    assert [c.size for c in spread.clusters] == [c.size for c in serial.clusters]


def test_a_parameter_the_model_never_reads_is_named_and_does_not_split_families():
    problem = mirror_problem()
    spec = fitting.spec_from_dict({"parameters": {
        "k1": {"start": 0.05, "lower": 0.01, "upper": 10.0, "log": True},
        "k2": {"start": 3.0, "lower": 0.01, "upper": 10.0, "log": True},
        "k_leak": {"start": 0.01, "lower": 0.001, "upper": 1.0, "log": True}}})  # fmt: skip
    result = ensemble(fitting.FitProblem(problem.points, two_exponentials, spec),
                      fitting.FitOptions(starts=20, seed=0))  # fmt: skip
    assert result.notes == ["k_leak changes no residual: the model does not read it; fix it in the "
                            "spec (families are told apart without it)"]  # fmt: skip
    assert len([c for c in result.clusters if c.size >= 2]) == 2  # the mirror pair, not 20
    assert ensemble(mirror_problem(), fitting.FitOptions(starts=5)).notes == []


def test_a_small_family_the_clustering_sample_misses_is_still_found(monkeypatch):
    from curate.fit import ensemble as module

    # two large families and one of two fits far from both, whose objectives rank where the
    # evenly spread sample of 8 does not look
    rng = np.random.default_rng(4)
    coordinates = np.vstack([rng.normal(0.0, 0.05, (30, 2)), rng.normal(5.0, 0.05, (20, 2)),
                             [[20.0, 20.0], [20.02, 20.0]]])  # fmt: skip
    objectives = np.arange(52, dtype=float)
    objectives[50:] = [0.5, 1.5]  # ranks 1 and 2: between the sampled ranks 0 and 7
    exact = module._labels(coordinates, objectives, 0.5)
    monkeypatch.setattr(module, "MAX_CLUSTERED", 8)
    sampled = module._labels(coordinates, objectives, 0.5)
    assert len(np.unique(exact)) == 3
    # the same partition, whatever the names
    pairs = {(int(a), int(b)) for a, b in zip(exact, sampled, strict=True)}
    assert len(pairs) == 3
    assert sampled[50] == sampled[51] and sampled[50] not in set(sampled[:50])
