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


def test_zero_sd_without_floor_is_refused(tmp_path):
    policy = policy_file(tmp_path, BASE)
    with pytest.raises(InputError, match="infinite weight"):
        weights.apply_policy(frame([("a", "v", "L", "A", 1.0, 0.0)]), policy)


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
    with pytest.raises(InputError, match="cannot each stay below it"):
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
