"""Which data decide between families of good fits, on problems whose families are known.

A sine sampled only at whole times cannot tell the frequency omega from omega + 2 pi (aliasing:
the sampling theorem of Nyquist and Shannon, any signal-processing textbook); samples at
half-integer times can, because there sin((omega + 2 pi) t) = -sin(omega t). So the data taken
at whole times make the two frequencies a pair of families of exactly equal fit, and only the
data taken in between decide between them: which dataset rules a family out is then known in
advance, without reference to curate.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from curate import fit as fitting
from curate.fit.ensemble import ensemble
from curate.fit.families import MAX_WARM, assign, families_by_group, warm_starts
from curate.fit.predict import prediction_band

ALIAS = 0.5 + 2 * math.pi  # the frequency whole-time samples cannot tell from 0.5


def wave(params, points):
    t = points["time"].to_numpy()
    return params["a"] * np.sin(params["omega"] * t)


SPEC = {"parameters": {"a": {"start": 1.0, "lower": 0.1, "upper": 5.0},
                       "omega": {"start": 1.0, "lower": 0.1, "upper": 8.0}}}  # fmt: skip


def aliasing_problem():
    """Dataset A at whole times 0..20 (sd 0.05) and B at half-integer times (sd 0.5), both of
    1.8 sin(0.5 t) with seeded noise: A alone fits omega = 0.5 and 0.5 + 2 pi equally; B does
    not."""
    rng = np.random.default_rng(0)
    whole, half = np.arange(0.0, 21.0), np.arange(0.5, 20.5)
    points = pd.DataFrame({
        "time": np.r_[whole, half],
        "value": np.r_[1.8 * np.sin(0.5 * whole) + rng.normal(0, 0.05, whole.size),
                       1.8 * np.sin(0.5 * half) + rng.normal(0, 0.5, half.size)],
        "weight": np.r_[np.full(whole.size, 1 / 0.05**2), np.full(half.size, 1 / 0.5**2)],
        "dataset": ["A"] * whole.size + ["B"] * half.size,
    })  # fmt: skip
    return fitting.FitProblem(points, wave, fitting.spec_from_dict(SPEC))


def tug_of_war_problem():
    """A at whole times (sd 0.05); B at half-integer times 0.5..9.5 from omega = 0.5 + 2 pi and C
    at the same times from omega = 0.5 (both exact, sd 2): with all three the two frequencies fit
    equally; without B only 0.5 fits, without C only 0.5 + 2 pi."""
    rng = np.random.default_rng(1)
    whole, half = np.arange(0.0, 21.0), np.arange(0.5, 10.0)
    points = pd.DataFrame({
        "time": np.r_[whole, half, half],
        "value": np.r_[1.8 * np.sin(0.5 * whole) + rng.normal(0, 0.05, whole.size),
                       1.8 * np.sin(ALIAS * half), 1.8 * np.sin(0.5 * half)],
        "weight": np.r_[np.full(whole.size, 1 / 0.05**2), np.full(2 * half.size, 1 / 2.0**2)],
        "dataset": ["A"] * whole.size + ["B"] * half.size + ["C"] * half.size,
    })  # fmt: skip
    return fitting.FitProblem(points, wave, fitting.spec_from_dict(SPEC))


def family_at(result, omega):
    """Give the family (kept or rejected) whose median omega is nearest ``omega``."""
    return min(result.families, key=lambda c: abs(c.parameters["omega"]["median"] - omega))


@pytest.fixture(scope="module")
def aliasing():
    problem = aliasing_problem()
    full = ensemble(problem, fitting.FitOptions(starts=40, seed=0))
    return problem, full


def test_only_the_data_between_the_samples_rule_out_the_alias(aliasing):
    problem, full = aliasing
    true, alias = family_at(full, 0.5), family_at(full, ALIAS)
    assert true.id == 1 and true in full.clusters  # the best family is the true frequency
    assert alias not in full.clusters  # B rules the alias out with all the data
    assert alias.parameters["omega"]["median"] == pytest.approx(ALIAS, rel=2e-3)
    assert alias.parameters["a"]["median"] == pytest.approx(1.8, rel=0.05)
    table = families_by_group(problem, full, problem.points["dataset"].to_numpy(), by="dataset")
    rows = {row.group: row for row in table.groups}
    # without B the alias fits as well as the true frequency: A cannot tell them apart
    assert rows["B"].families[str(alias.id)]["fits"] is True
    assert rows["B"].families[str(alias.id)]["delta"] == pytest.approx(0.0, abs=1e-6)
    # without A, B alone (sd 0.5) still rules the alias out by far more than the threshold
    assert rows["A"].families[str(alias.id)]["fits"] is False
    assert rows["A"].families["1"]["fits"] is True and rows["B"].families["1"]["fits"] is True
    assert (f"only dataset B rules out family {alias.id}: without it the family fits "
            f"(as good as the best, within {stats.chi2.ppf(0.95, 2):.2f})") in table.conclusions  # fmt: skip
    assert not any("rests on" in c for c in table.conclusions)
    shape = table.to_dict()
    assert set(shape) == {"by", "threshold", "families", "groups", "conclusions"}
    assert [f["kept"] for f in shape["families"]][:2] == [True, False]
    assert set(shape["groups"][0]) == {"group", "n_points", "best_objective", "best_family",
                                       "families", "new", "error"}  # fmt: skip
    json.dumps(shape, allow_nan=False)


def test_a_family_rests_on_the_dataset_that_pulls_towards_it():
    problem = tug_of_war_problem()
    full = ensemble(problem, fitting.FitOptions(starts=40, seed=0))
    slow, fast = family_at(full, 0.5), family_at(full, ALIAS)
    assert slow in full.clusters and fast in full.clusters
    assert slow.objective == pytest.approx(fast.objective, abs=1e-6)  # B and C balance exactly
    table = families_by_group(problem, full, problem.points["dataset"].to_numpy(), by="dataset")
    rows = {row.group: row for row in table.groups}
    # each half-time dataset alone shifts the balance by sum((2 * 1.8 sin(0.5 t))^2) / 2^2
    half = np.arange(0.5, 10.0)
    expected = float(np.sum((2 * 1.8 * np.sin(0.5 * half)) ** 2) / 4.0)
    assert rows["B"].families[str(fast.id)]["delta"] == pytest.approx(expected, rel=0.02)
    assert rows["C"].families[str(slow.id)]["delta"] == pytest.approx(expected, rel=0.02)
    assert rows["B"].best_family == slow.id and rows["C"].best_family == fast.id
    said = "\n".join(table.conclusions)
    assert f"without dataset B, family {fast.id} no longer fits (it rises" in said
    assert "it rests on dataset B" in said and "it rests on dataset C" in said
    assert "no single dataset decides" not in said  # B and C each decide


def test_warm_starts_cover_every_family_and_assign_finds_them(aliasing):
    _, full = aliasing
    starts, origins = warm_starts(full)
    assert origins[: len(full.families)] == [c.id for c in full.families]
    assert len(starts) <= len(full.families) + MAX_WARM
    for family in full.families:
        assert assign(family.best, full) == family.id
    far = np.array([4.9, 0.15])  # no family lies here
    assert assign(far, full) is None


def test_the_prediction_between_the_samples_rests_on_the_data_taken_between_them():
    problem = tug_of_war_problem()
    full = ensemble(problem, fitting.FitOptions(starts=40, seed=0))
    half = pd.DataFrame({"time": [10.5, 11.5]})
    band = prediction_band(problem, full, half, problem.points["dataset"].to_numpy(),
                           by="dataset")  # fmt: skip
    # the two kept frequencies predict +-1.8 sin(0.5 t) there: the band spans both
    a = family_at(full, 0.5).parameters["a"]["median"]
    np.testing.assert_allclose(band.upper, np.abs(a * np.sin(0.5 * half["time"])), rtol=0.02)
    np.testing.assert_allclose(band.lower, -np.abs(a * np.sin(0.5 * half["time"])), rtol=0.02)
    groups = {g["group"]: g for g in band.groups}
    # without B or C one frequency alone fits: the band closes (no widening)
    assert groups["B"]["widening"] < 0.2 and groups["C"]["widening"] < 0.2
    # leaving out B (or C) settles the sign there: one edge jumps to the other, 2 a |sin(0.5 t)|
    jump = float(np.max(2 * a * np.abs(np.sin(0.5 * half["time"]))))
    assert groups["B"]["moves"] == pytest.approx(jump, rel=0.03)
    assert groups["C"]["moves"] == pytest.approx(jump, rel=0.03)
    assert band.rests_on()["group"] in {"B", "C"}
    assert band.conclusions[-1].startswith(f"the prediction rests most on dataset {band.rests_on()['group']}")
    json.dumps(band.to_dict(), allow_nan=False)
