"""Holdout splitters: the same partitions as scikit-learn's group splitters, and invariants."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from curate.errors import InputError
from curate.weighting import splitters as folds

sklearn_model_selection = pytest.importorskip("sklearn.model_selection")


def partitions(splits):
    return [tuple(sorted(map(int, test))) for _, test in splits]


def group_labels(seed=0):
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 30, 11)
    return np.repeat([f"g{k}" for k in range(11)], sizes)


def test_leave_one_group_out_matches_scikit_learn():
    groups = group_labels()
    X = np.zeros((len(groups), 1))
    ours = list(folds.LeaveOneGroupOut().split(X, groups=groups))
    theirs = list(sklearn_model_selection.LeaveOneGroupOut().split(X, groups=groups))
    assert partitions(ours) == partitions(theirs)
    assert folds.LeaveOneGroupOut().get_n_splits(groups=groups) == 11


@pytest.mark.parametrize("k", [2, 3, 5])
def test_group_kfold_without_seed_matches_scikit_learn(k):
    groups = group_labels(seed=k)
    X = np.zeros((len(groups), 1))
    ours = list(folds.GroupKFold(n_splits=k).split(X, groups=groups))
    theirs = list(sklearn_model_selection.GroupKFold(n_splits=k).split(X, groups=groups))
    assert sorted(partitions(ours)) == sorted(partitions(theirs))


@pytest.mark.parametrize(
    "splitter", [folds.LeaveOneGroupOut(), folds.GroupKFold(3), folds.GroupKFold(4, seed=7)]
)
def test_invariants(splitter):
    groups = group_labels(seed=3)
    everything = set(range(len(groups)))
    seen = []
    for train, test in splitter.split(groups, groups=groups):
        assert set(train).isdisjoint(test) and set(train) | set(test) == everything
        assert set(groups[test]).isdisjoint(groups[train])  # groups are never split
        seen += list(test)
    assert sorted(seen) == sorted(everything)  # every row is held out exactly once


def test_seeded_kfold_is_deterministic_and_seed_dependent():
    groups = group_labels(seed=5)
    one = partitions(folds.GroupKFold(3, seed=11).split(groups, groups=groups))
    two = partitions(folds.GroupKFold(3, seed=11).split(groups, groups=groups))
    other = partitions(folds.GroupKFold(3, seed=12).split(groups, groups=groups))
    assert one == two and one != other


def test_relabelling_groups_changes_nothing():
    groups = group_labels(seed=8)
    mapping = {g: f"renamed_{g}" for g in np.unique(groups)}
    renamed = np.array([mapping[g] for g in groups])
    a = sorted(partitions(folds.LeaveOneGroupOut().split(groups, groups=groups)))
    b = sorted(partitions(folds.LeaveOneGroupOut().split(renamed, groups=renamed)))
    assert a == b


def test_errors_state_the_rule():
    groups = np.array(["a", "a", "b"])
    with pytest.raises(
        InputError, match="Cannot have n_splits=5 greater than the number of groups: 2."
    ):
        list(folds.GroupKFold(5).split(groups, groups=groups))
    with pytest.raises(InputError, match="at least 2 groups"):
        list(folds.LeaveOneGroupOut().split(groups[:2], groups=groups[:2]))
    with pytest.raises(InputError, match="needs groups"):
        list(folds.LeaveOneGroupOut().split(groups))


def test_training_gaps():
    train = pd.DataFrame({"observable": ["v", "v"], "temperature": [37.0, 37.0]})
    test = pd.DataFrame({"observable": ["v", "g"], "temperature": [25.0, 37.0]})
    gaps = [g.text() for g in folds.training_gaps(train, test, condition_columns=["temperature"])]
    assert gaps == [
        "observable g is measured only in the held-out data",
        "condition temperature = 25.0 occurs only in the held-out data",
        "condition temperature keeps one value (37.0) in training: how the response depends on "
        "temperature cannot be identified there",
    ]


def test_sensitivity_names_only_the_forms_it_accepts():
    from curate.fit.runs import sensitivity_grouping
    from curate.weighting.groupings import parse_grouping

    for by in ("color", "condition"):
        with pytest.raises(InputError) as refused:
            sensitivity_grouping(by)
        assert str(refused.value) == f"--by {by}: expected dataset, lab or condition:KEY"
    with pytest.raises(InputError) as refused:
        sensitivity_grouping("kfold:3")
    assert str(refused.value) == (
        "--by kfold:3: expected dataset, lab or condition:KEY (kfold:K makes holdout folds "
        "with `curate folds`, not one fold per group)"
    )
    # folds accept every form and say so
    with pytest.raises(InputError, match="expected dataset, lab, condition:KEY or kfold:K$"):
        parse_grouping("color")
    assert parse_grouping("kfold:3:7").splitter().get_n_splits() == 3


def test_training_gaps_name_a_held_out_relative_lab_and_a_single_dose():
    frame = pd.DataFrame({
        "observable": ["x"] * 6,
        "relative": [False, False, False, False, True, True],
        "lab": ["A", "A", "B", "B", "C", "C"],
        "dose": [10.0, 100.0, 10.0, 100.0, 10.0, 100.0],
    })  # fmt: skip
    held = frame["lab"] == "C"
    gaps = folds.training_gaps(frame[~held], frame[held], condition_columns=["dose"])
    assert [g.text() for g in gaps] == [
        "the relative-unit data of x are all held out: their scale factors cannot be learned "
        "in training"
    ]
    one_dose = frame["dose"] == 100.0
    gaps = folds.training_gaps(frame[~one_dose], frame[one_dose], condition_columns=["dose"])
    assert [g.text() for g in gaps] == [
        "condition dose = 100.0 occurs only in the held-out data",
        "condition dose keeps one value (10.0) in training: how the response depends on dose "
        "cannot be identified there",
    ]
    # a lab that is one of several absolute ones leaves nothing unlearnable
    lab_a = frame["lab"] == "A"
    assert folds.training_gaps(frame[~lab_a], frame[lab_a], condition_columns=["dose"]) == []
