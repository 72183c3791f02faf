"""Holdout splitters over groups, with scikit-learn's protocol (no scikit-learn import).

``split(X, y=None, groups=None)`` yields ``(train_index, test_index)``; ``get_n_splits``
says how many. Constructors only store arguments; data are checked in ``split``. So these
work wherever scikit-learn's group splitters do, and theirs work in our sensitivity runner.
Every splitter derives from :class:`GroupSplitter`, which checks the groups once; a new one
implements ``get_n_splits`` and ``_split(labels)``.

- :class:`LeaveOneGroupOut`: one fold per group (dataset, lab or condition value), in sorted
  group order, as scikit-learn's LeaveOneGroupOut.
- :class:`GroupKFold`: k folds of whole groups. Without a seed it assigns groups exactly as
  scikit-learn's GroupKFold (largest group first, each to the fold with the fewest samples);
  with a seed the order of groups is shuffled first (deterministic for a given seed).

Which rows form a group (the ``--by`` forms) is decided beside this, in
:mod:`curate.weighting.groupings`.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from curate.errors import InputError

__all__ = ["FoldGap", "GroupKFold", "GroupSplitter", "LeaveOneGroupOut", "training_gaps"]


class GroupSplitter:
    """The scikit-learn group-splitter protocol: ``split`` checks the groups, subclasses split."""

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        """Give the number of folds."""
        raise NotImplementedError

    def split(
        self, X: Any, y: Any = None, groups: Any = None
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield (train, test) index arrays, one pair per fold."""
        if groups is None:
            raise InputError("a group splitter needs groups (one label per row)")
        labels = np.asarray(groups)
        if len(labels) != len(X):
            raise InputError(f"groups has {len(labels)} labels for {len(X)} rows")
        yield from self._split(labels)

    def _split(self, labels: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        raise NotImplementedError


class LeaveOneGroupOut(GroupSplitter):
    """Hold out each group once."""

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        """Give the number of folds: the number of distinct groups."""
        if groups is None:
            raise InputError("a group splitter needs groups (one label per row)")
        return len(np.unique(np.asarray(groups)))

    def _split(self, labels: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        unique = np.unique(labels)
        if len(unique) < 2:
            raise InputError(f"leave-one-group-out needs at least 2 groups; got {len(unique)}")
        index = np.arange(len(labels))
        for label in unique:
            test = labels == label
            yield index[~test], index[test]


@dataclass
class GroupKFold(GroupSplitter):
    """K folds of whole groups; balanced by size, optionally shuffled by a seed."""

    n_splits: int = 5
    seed: int | None = None

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        """Give the number of folds."""
        return self.n_splits

    def _split(self, labels: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        if not isinstance(self.n_splits, int) or self.n_splits < 2:
            raise InputError(f"k-fold needs n_splits >= 2; got {self.n_splits}")
        unique, group_index = np.unique(labels, return_inverse=True)
        if self.n_splits > len(unique):
            raise InputError(
                f"Cannot have n_splits={self.n_splits} greater than the number of groups: {len(unique)}."
            )
        sizes = np.bincount(group_index)
        if self.seed is None:
            order = np.argsort(sizes)[::-1]  # as scikit-learn: largest group first
        else:
            rng = np.random.default_rng(self.seed)
            order = rng.permutation(len(unique))
        per_fold = np.zeros(self.n_splits)
        fold_of_group = np.zeros(len(unique), dtype=int)
        for g in order:
            lightest = int(np.argmin(per_fold))
            per_fold[lightest] += sizes[g]
            fold_of_group[g] = lightest
        fold_of_row = fold_of_group[group_index]
        index = np.arange(len(labels))
        for fold in range(self.n_splits):
            test = fold_of_row == fold
            yield index[~test], index[test]


@dataclass(frozen=True)
class FoldGap:
    """Something only the held-out side covers: its parameters are unidentifiable in training.

    Kinds: ``observable`` (measured only in the held-out data), ``condition`` (a value only
    the held-out data have), ``single`` (a condition that varies in the data but keeps one
    value in training, so how the response depends on it cannot be learned there) and
    ``relative`` (an observable's relative-unit data are all held out, so their scale factors
    cannot be learned in training).
    """

    kind: str
    name: str
    value: Any

    def text(self) -> str:
        """Give the gap in words."""
        if self.kind == "observable":
            return f"observable {self.name} is measured only in the held-out data"
        if self.kind == "single":
            return (
                f"condition {self.name} keeps one value ({self.value}) in training: how the "
                f"response depends on {self.name} cannot be identified there"
            )
        if self.kind == "relative":
            return (
                f"the relative-unit data of {self.name} are all held out: their scale factors "
                "cannot be learned in training"
            )
        return f"condition {self.name} = {self.value} occurs only in the held-out data"


def training_gaps(train: Any, test: Any, *, condition_columns: list[str]) -> list[FoldGap]:
    """Give what the held-out rows cover that the training rows do not (pandas frames in)."""
    gaps = []
    if "observable" in train and "observable" in test:
        train_observables = set(train["observable"])
        for observable in sorted(set(test["observable"]) - train_observables):
            gaps.append(FoldGap("observable", str(observable), None))
        if "relative" in train and "relative" in test:
            relative_train = set(train.loc[train["relative"].astype(bool), "observable"])
            relative_test = set(test.loc[test["relative"].astype(bool), "observable"])
            for observable in sorted((relative_test - relative_train) & train_observables):
                gaps.append(FoldGap("relative", str(observable), None))
    for column in condition_columns:
        seen = set(train[column].dropna().astype(str))
        held = set(test[column].dropna().astype(str))
        for value in sorted(held - seen):
            gaps.append(FoldGap("condition", column, value))
        if len(seen) == 1 and held - seen:
            gaps.append(FoldGap("single", column, next(iter(seen))))
    return gaps
