"""Weighting policies and weights: formula, Kish n_eff, balancing, caps, floors, bad policies."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import write
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.errors import InputError
from curate.weighting import weights
from curate.weighting.policy import load_policy


def frame(rows):
    return pd.DataFrame(rows, columns=["dataset_id", "observable", "lab", "grade", "value", "sd"])


def policy_file(tmp_path, body, name="p.toml"):
    return load_policy(write(tmp_path / name, body))


BASE = """
exclude = ["X"]
ungraded = "C"
[inflation]
A = 1.0
B = 2.0
C = 4.0
D = 10.0
[floors]
absolute = 0.0
relative = 0.0
"""


def test_weight_formula_and_sigma(tmp_path):
    policy = policy_file(tmp_path, BASE)
    points = frame(
        [
            ("a", "v", "L1", "A", 10.0, 0.5),
            ("b", "v", "L2", "C", 10.0, 0.5),
            ("c", "v", "L2", None, 10.0, 2.0),
        ]
    )
    weighted, _ = weights.apply_policy(points, policy)
    # w = b / (sd^2 v): 1/(0.25*1) = 4, 1/(0.25*4) = 1, ungraded counts as C: 1/(4*4)
    np.testing.assert_allclose(weighted["weight"], [4.0, 1.0, 1 / 16])
    np.testing.assert_allclose(weighted["sigma"], 1 / np.sqrt(weighted["weight"]))
    np.testing.assert_allclose(
        weighted["sigma"], weighted["sd"] * np.sqrt(weighted["inflation"] / weighted["balance"])
    )
    assert weighted["grade_used"].tolist() == ["A", "C", "C"]


def test_kish_effective_sample_size_hand_derived():
    # weights 1, 1, 2, 4: (sum w)^2 / sum w^2 = 8^2 / (1 + 1 + 4 + 16) = 64 / 22 (Kish 1965)
    assert weights.kish_n_eff(np.array([1.0, 1.0, 2.0, 4.0])) == pytest.approx(64 / 22)
    assert weights.kish_n_eff(np.ones(7)) == pytest.approx(7.0)


def test_floors(tmp_path):
    policy = policy_file(
        tmp_path,
        BASE.replace("absolute = 0.0", "absolute = 0.1").replace(
            "relative = 0.0", "relative = 0.05"
        ),
    )
    points = frame(
        [
            ("a", "v", "L", "A", 10.0, 0.0),
            ("a", "v", "L", "A", 1.0, 0.0),
            ("a", "v", "L", "A", 1.0, 0.3),
        ]
    )
    weighted, _ = weights.apply_policy(points, policy)
    np.testing.assert_allclose(weighted["sd"], [0.5, 0.1, 0.3])


def test_the_absolute_floor_leaves_relative_data_alone(tmp_path):
    # an absolute floor of 0.5 (nM, say) must not swamp an a.u. series whose sd is 0.001
    policy = policy_file(tmp_path, BASE.replace("absolute = 0.0", "absolute = 0.5"))
    points = frame([("abs", "v", "L", "A", 10.0, 0.1), ("rel", "v", "L", "A", 0.01, 0.001)])
    points["relative"] = [False, True]
    weighted, _ = weights.apply_policy(points, policy)
    assert weighted["sd"].tolist() == [0.5, 0.001]


def test_zero_sd_without_floor_is_refused(tmp_path):
    policy = policy_file(tmp_path, BASE)
    with pytest.raises(InputError, match="infinite weight"):
        weights.apply_policy(frame([("a", "v", "L", "A", 1.0, 0.0)]), policy)


def test_zero_sd_at_a_zero_value_names_the_point_and_the_floor_that_helps():
    # the shipped relative floor (1% of |y|) is 0 where y = 0: only an absolute floor helps there
    points = frame([("a", "v", "L", "A", 0.0, 0.0), ("a", "v", "L", "A", 5.0, 0.5)])
    points["time"] = [0.0, 60.0]
    points["unit"] = "nanomolar"
    with pytest.raises(InputError) as caught:
        weights.apply_policy(points, load_policy())
    message = str(caught.value)
    assert "sd 0 at time 0 s" in message and "its value is 0" in message
    assert "set floors.absolute (in nM)" in message


def test_equal_and_sqrt_balancing(tmp_path):
    points = frame([("a", "v", "L1", "A", 1.0, 1.0)] * 4 + [("b", "v", "L2", "A", 1.0, 1.0)] * 16)
    equal, summary = weights.apply_policy(
        points, policy_file(tmp_path, BASE + '[balance]\nmode = "equal"\n')
    )
    totals = equal.groupby("dataset_id")["weight"].sum()
    assert totals["a"] == pytest.approx(totals["b"])
    assert totals.sum() == pytest.approx(20.0)  # total weight unchanged
    assert not summary.likelihood and any("no longer a likelihood" in w for w in summary.warnings)
    sqrt, _ = weights.apply_policy(
        points, policy_file(tmp_path, BASE + '[balance]\nmode = "sqrt"\n', "q.toml")
    )
    totals = sqrt.groupby("dataset_id")["weight"].sum()
    assert totals["b"] / totals["a"] == pytest.approx(np.sqrt(16) / np.sqrt(4))


def test_lab_cap(tmp_path):
    points = frame(
        [("a", "v", "L1", "A", 1.0, 0.1)] * 10
        + [("b", "v", "L2", "A", 1.0, 1.0)] * 10
        + [("c", "v", "L3", "A", 1.0, 1.0)] * 10
    )
    _, summary = weights.apply_policy(
        points, policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.4\n")
    )
    assert summary.lab_shares["v"]["L1"] == pytest.approx(0.4)
    assert summary.lab_shares["v"]["L2"] == pytest.approx(0.3)
    with pytest.raises(InputError, match="is too small for .* labs"):
        weights.apply_policy(
            points, policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.2\n", "r.toml")
        )


def test_shares_warnings_and_n_eff(tmp_path):
    points = frame(
        [("big", "v", "L1", "A", 1.0, 0.01)] * 5 + [("small", "v", "L2", "A", 1.0, 20.0)] * 5
    )
    _, summary = weights.apply_policy(points, policy_file(tmp_path, BASE))
    shares = {d.id: d.share for d in summary.datasets}
    assert shares["big"] > 0.99 and sum(shares.values()) == pytest.approx(1.0)
    assert any("carries 100% of the v weight" in w for w in summary.warnings)
    assert any("span a factor of" in w for w in summary.warnings)  # (20/0.01)^2 = 4e6
    assert summary.n_eff["v"] == pytest.approx(
        weights.kish_n_eff(np.array([1e4] * 5 + [1 / 400] * 5))
    )


GRADE_ORDER = ["A", "B", "C", "D"]


@settings(max_examples=200, deadline=None)
@given(
    factors=st.lists(st.floats(1.0, 100.0), min_size=4, max_size=4).map(sorted),
    sd=st.floats(1e-3, 1e3),
    better=st.integers(0, 3),
    worse=st.integers(0, 3),
)
def test_a_worse_grade_never_raises_a_weight(tmp_path_factory, factors, sd, better, worse):
    if worse < better:
        better, worse = worse, better
    body = "[inflation]\n" + "\n".join(
        f"{g} = {f}" for g, f in zip(GRADE_ORDER, factors, strict=True)
    )
    path = tmp_path_factory.mktemp("p") / "p.toml"
    path.write_text(body + "\n[floors]\nrelative = 0.0\n")
    policy = load_policy(path)
    points = frame(
        [
            ("a", "v", "L", GRADE_ORDER[better], 1.0, sd),
            ("b", "v", "L", GRADE_ORDER[worse], 1.0, sd),
        ]
    )
    weighted, _ = weights.apply_policy(points, policy)
    assert weighted["weight"].iloc[1] <= weighted["weight"].iloc[0]


def test_policy_hash_ignores_comments_and_layout(tmp_path):
    one = policy_file(tmp_path, BASE, "one.toml")
    two = policy_file(
        tmp_path, "# a comment\n" + BASE.replace("A = 1.0", "A = 1.0   # best"), "two.toml"
    )
    three = policy_file(tmp_path, BASE.replace("B = 2.0", "B = 3.0"), "three.toml")
    assert one.sha256 == two.sha256 != three.sha256


def test_a_policy_leaving_out_floors_keeps_the_shipped_ones(tmp_path):
    # a copy of the shipped policy that changes one line must not lose the shipped noise floor
    shipped = load_policy()
    partial = policy_file(tmp_path, 'ungraded = "D"\n[inflation]\nA = 1\nB = 2\nC = 4\nD = 10\n')
    assert shipped.relative_floor == 0.01
    assert partial.relative_floor == shipped.relative_floor
    assert partial.absolute_floor == shipped.absolute_floor
    assert partial.unknown_noise == shipped.unknown_noise
    assert (partial.balance, partial.lab_cap) == (shipped.balance, shipped.lab_cap)


def test_default_policy():
    policy = load_policy()
    assert policy.inflation == {"A": 1.0, "B": 2.0, "C": 4.0, "D": 10.0}
    assert policy.exclude == ("X",) and policy.is_likelihood


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("[inflation]\nA = 1\nB = 2\nC = 4\nQ = 5\n", "field 'inflation.Q': unknown grade"),
        ("[inflation]\nA = 1\nB = -2\nC = 4\nD = 5\n", "field 'inflation.B': -2 is not allowed"),
        ("[inflation]\nA = 1\nB = 0\nC = 4\nD = 5\n", "expected a number > 0"),
        ("[inflation]\nA = 1\nB = 2\nC = 4\n", "no factor for grade D"),
        ("[inflation]\nA = 1\nB = 2\nC = 4\nX = 9\n", "X is never fitted"),
        (BASE + '[balance]\nmode = "fair"\n', "field 'balance.mode'"),
        (BASE + "[balance]\nlab_cap = 1.5\n", "field 'balance.lab_cap'"),
        ("colour = 1\n" + BASE, "field 'colour': unknown"),
        (BASE + "colour = 1\n", "field 'floors.colour': unknown"),
        ("[inflation\n", "not valid TOML"),
        (BASE.replace('ungraded = "C"', 'ungraded = "Z"'), "field 'ungraded'"),
    ],
)
def test_bad_policies(tmp_path, body, message):
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        policy_file(tmp_path, body)


def test_two_labs_capped_at_half_split_evenly_and_no_dataset_is_called_dominant(tmp_path):
    # README: the warning names a dataset carrying "more than half" of its observable's weight.
    # A cap of 0.5 over two labs gives 0.5 and 0.5000000000000001 in floating point: not more.
    points = frame([("a", "v", "L1", "A", 1.0, 0.1)] * 7 + [("b", "v", "L2", "B", 1.0, 0.1)] * 3)
    _, summary = weights.apply_policy(
        points, policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.5\n")
    )
    assert summary.lab_shares["v"]["L1"] == pytest.approx(0.5, abs=1e-12)
    assert summary.lab_shares["v"]["L2"] == pytest.approx(0.5, abs=1e-12)
    assert not any("mostly this one dataset" in w for w in summary.warnings)
    # just above half still warns
    points = frame([("a", "v", "L1", "A", 1.0, 0.1)] * 51 + [("b", "v", "L2", "A", 1.0, 0.1)] * 49)
    _, summary = weights.apply_policy(points, policy_file(tmp_path, BASE, "q.toml"))
    assert any("dataset a carries 51% of the v weight" in w for w in summary.warnings)


def mixed(scale=1000.0, relative_times=None, relative_values=None):
    """Give one observable with an absolute dataset (60 points, sd 0.5, grade A, lab L1) and a
    relative one (10 points reading ``scale`` x the truth, sd ``scale`` x 1, grade C, lab L2)."""
    minutes = np.arange(60.0)
    truth = 20.0 * (1 - np.exp(-minutes / 15.0))
    times = minutes[::6] if relative_times is None else relative_times
    values = (
        scale * 20.0 * (1 - np.exp(-times / 15.0)) if relative_values is None else relative_values
    )
    rows = [("abs", "v", "L1", "A", y, 0.5, t, False) for t, y in zip(minutes, truth, strict=True)]
    rows += [
        ("rel", "v", "L2", "C", y, scale * 1.0, t, True) for t, y in zip(times, values, strict=True)
    ]
    return pd.DataFrame(
        rows,
        columns=["dataset_id", "observable", "lab", "grade", "value", "sd", "time", "relative"],
    )


@pytest.mark.parametrize("scale", [1e-3, 1.0, 1000.0])
def test_relative_data_share_weight_on_the_absolute_scale(tmp_path, scale):
    # the relative dataset put on the absolute scale with its consensus scale factor
    # s = sum w y h / sum w h^2 (h: the absolute data at its times) weighs 1 / (sd/s)^2 / v_C
    # = 1 / (1^2 * 4) per point; the absolute one 1 / (0.5^2 * 1) = 4 per point
    _, summary = weights.apply_policy(mixed(scale), policy_file(tmp_path, BASE))
    rows = {d.id: d for d in summary.datasets}
    assert rows["rel"].scale == pytest.approx(scale, rel=1e-12)
    assert rows["rel"].footing == "consensus" and rows["abs"].footing == "absolute"
    assert rows["abs"].scale is None
    assert rows["rel"].share == pytest.approx(10 * 0.25 / (60 * 4 + 10 * 0.25), rel=1e-12)
    assert summary.lab_shares["v"]["L1"] == pytest.approx(240 / 242.5, rel=1e-12)
    assert any("dataset abs carries 99%" in w for w in summary.warnings)


def test_a_low_grade_absolute_level_barely_moves_the_relative_scale(tmp_path):
    # a grade-D absolute dataset 1.5x too high (same sd) beside the grade-A one: the reference
    # the relative data are scaled against weighs each by its trust (D inflates by 10 here)
    points = mixed()
    high = points[points["dataset_id"] == "abs"].copy()
    high["dataset_id"], high["lab"], high["grade"] = "high", "L3", "D"
    high["value"] *= 1.5
    _, summary = weights.apply_policy(pd.concat([points, high]), policy_file(tmp_path, BASE))
    rel = next(d for d in summary.datasets if d.id == "rel")
    # reference = (1 x truth + 1.5 x truth / 10) / (1 + 1/10): s = 1000 / that factor
    expected = 1000.0 / ((1 + 1.5 / 10) / (1 + 1 / 10))
    assert rel.scale == pytest.approx(expected, rel=1e-9)


def test_lab_cap_acts_on_the_same_footing(tmp_path):
    # capped at 0.5, the absolute lab comes down to the relative lab's 2.5 units: 50/50
    weighted, summary = weights.apply_policy(
        mixed(), policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.5\n")
    )
    assert summary.lab_shares["v"] == {
        "L1": pytest.approx(0.5, abs=1e-12),
        "L2": pytest.approx(0.5, abs=1e-12),
    }
    balance = weighted.groupby("dataset_id")["balance"].first()
    assert balance["abs"] == pytest.approx(2.5 / 240, rel=1e-12)
    assert balance["rel"] == pytest.approx(1.0, rel=1e-12)


def test_relative_data_without_time_overlap_use_the_ratio_of_medians(tmp_path):
    late = np.arange(100.0, 110.0)
    frame_ = mixed(relative_times=late, relative_values=np.full(10, 5000.0))
    _, summary = weights.apply_policy(frame_, policy_file(tmp_path, BASE))
    rel = next(d for d in summary.datasets if d.id == "rel")
    absolute = frame_.loc[frame_["dataset_id"] == "abs", "value"]
    assert rel.footing == "median ratio"
    assert rel.scale == pytest.approx(5000.0 / np.median(np.abs(absolute)), rel=1e-12)


def test_relative_data_use_the_absolute_data_under_their_own_conditions(tmp_path):
    # dose 1 reads half the dose 10 level; the relative dataset at dose 1 is scaled against
    # the dose 1 absolute data only
    frame_ = mixed()
    frame_["dose"] = 1.0
    other = frame_[frame_["dataset_id"] == "abs"].assign(dataset_id="abs10", lab="L3", dose=10.0)
    other["value"] = 2 * other["value"]
    frame_ = pd.concat([frame_, other], ignore_index=True)
    _, summary = weights.apply_policy(frame_, policy_file(tmp_path, BASE), conditions=["dose"])
    rel = next(d for d in summary.datasets if d.id == "rel")
    assert rel.scale == pytest.approx(1000.0, rel=1e-12)


def test_relative_only_observable_keeps_the_scale_free_footing(tmp_path):
    # two relative datasets in units 1000x apart, same relative noise: equal shares
    times = np.arange(10.0)
    rows = [("r1", "g", "L1", "A", 1.0 + t, 0.1 * (1.0 + t), t, True) for t in times]
    rows += [("r2", "g", "L2", "A", 1000 * (1.0 + t), 100 * (1.0 + t), t, True) for t in times]
    points = pd.DataFrame(
        rows,
        columns=["dataset_id", "observable", "lab", "grade", "value", "sd", "time", "relative"],
    )
    _, summary = weights.apply_policy(points, policy_file(tmp_path, BASE))
    assert [d.footing for d in summary.datasets] == ["scale-free", "scale-free"]
    assert [d.share for d in summary.datasets] == [pytest.approx(0.5), pytest.approx(0.5)]


def test_catalog_weights_of_a_mixed_observable(catalog):
    from conftest import MIXED_SCALE, add_mixed_observable

    absolute, relative = add_mixed_observable(catalog)
    summary = catalog.weights()
    rows = {d.id: d for d in summary.datasets}
    # default policy: A inflates by 1, C by 4; sd floors (1% of |y|) stay below both sds
    assert rows[relative].share == pytest.approx(2.5 / 242.5, rel=1e-9)
    assert rows[relative].scale == pytest.approx(MIXED_SCALE, rel=1e-9)
    assert rows[absolute].share == pytest.approx(240 / 242.5, rel=1e-9)


def test_consensus_scale_factor_is_the_weighted_regression_through_the_origin(tmp_path):
    # reference: statsmodels WLS of the relative values on the absolute data at their times,
    # without an intercept, weights 1/sd^2: its one coefficient is s = sum w y h / sum w h^2
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(21)
    times = np.arange(0.0, 60.0, 6.0)
    truth = 20.0 * (1 - np.exp(-times / 15.0))
    values = 300.0 * truth + rng.normal(0, 300.0, len(times))
    points = mixed(scale=300.0, relative_values=values)
    weighted, summary = weights.apply_policy(points, policy_file(tmp_path, BASE))
    rel = weighted[weighted["dataset_id"] == "rel"]
    # the absolute data sit exactly on the truth at these times (no interpolation needed)
    reference = sm.WLS(rel["value"].to_numpy(), truth, weights=1 / rel["sd"].to_numpy() ** 2)
    expected = reference.fit().params[0]
    assert next(d for d in summary.datasets if d.id == "rel").scale == pytest.approx(
        expected, rel=1e-12
    )


def test_a_lab_cap_says_where_it_cannot_act_and_names_its_file_when_too_small(tmp_path):
    one_lab = frame([("a", "v", "L1", "A", 1.0, 0.1), ("b", "v", "L1", "A", 1.0, 0.1)])
    _, summary = weights.apply_policy(
        one_lab, policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.5\n")
    )
    assert (
        "the lab cap (0.5) cannot act on v: all its data come from one lab (L1)" in summary.warnings
    )
    three = frame([(k, "v", f"L{k}", "A", 1.0, 0.1) for k in "abc"])
    tiny = policy_file(tmp_path, BASE + "[balance]\nlab_cap = 0.01\n", "tiny.toml")
    with pytest.raises(
        InputError, match=r"tiny\.toml, field 'balance.lab_cap': 0.01 is too small for 3 labs"
    ):
        weights.apply_policy(three, tiny)
