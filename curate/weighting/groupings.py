"""Which rows form a group: the ``--by`` forms of folds and sensitivity checks.

``dataset``, ``lab``, ``condition:KEY`` (one group per value of a condition) and
``kfold:K[:SEED]`` (K folds of whole datasets). Each form is a small class that labels the rows
of a weighted table and names its splitter; :func:`parse_grouping` turns the text into one.
Adding a grouping is one class here and one entry in ``_FORMS``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.weighting.splitters import GroupKFold, GroupSplitter, LeaveOneGroupOut
from curate.weighting.table import condition_column

__all__ = ["Grouping", "fold_groups", "parse_grouping"]


@dataclass(frozen=True)
class Grouping:
    """A way of grouping the rows of a weighted table, as given on the command line."""

    by: str
    leaves_one_out: ClassVar[bool] = True  # one fold per group (what sensitivity checks need)

    def labels(self, table: pd.DataFrame) -> np.ndarray:
        """Give each row's group label."""
        raise NotImplementedError

    def splitter(self) -> GroupSplitter:
        """Give the splitter that turns the labels into folds."""
        return LeaveOneGroupOut()


@dataclass(frozen=True)
class ByDataset(Grouping):
    """One group per dataset."""

    def labels(self, table: pd.DataFrame) -> np.ndarray:
        """Give each row's dataset id."""
        return np.asarray(table["dataset_id"].to_numpy())


@dataclass(frozen=True)
class ByLab(Grouping):
    """One group per source lab."""

    def labels(self, table: pd.DataFrame) -> np.ndarray:
        """Give each row's lab."""
        return np.asarray(table["lab"].to_numpy())


@dataclass(frozen=True)
class ByCondition(Grouping):
    """One group per value of one condition ('(none)' where a dataset lacks it)."""

    key: str = ""

    def labels(self, table: pd.DataFrame) -> np.ndarray:
        """Give each row's condition value as text (numbers in %g)."""
        column = condition_column(self.key)
        if column not in table.columns:
            raise InputError(
                f"--by {self.by}: no dataset in the selection has condition '{self.key}'"
            )
        return np.asarray(table[column].map(_value_label).to_numpy())


@dataclass(frozen=True)
class KFoldByDataset(Grouping):
    """K folds of whole datasets, balanced by size, shuffled by a seed."""

    k: int = 5
    seed: int = 0
    leaves_one_out: ClassVar[bool] = False

    def labels(self, table: pd.DataFrame) -> np.ndarray:
        """Give each row's dataset id (whole datasets go to one fold)."""
        return np.asarray(table["dataset_id"].to_numpy())

    def splitter(self) -> GroupSplitter:
        """Give the seeded group k-fold splitter."""
        return GroupKFold(n_splits=self.k, seed=self.seed)


def _value_label(value: object) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "(none)"
    return f"{value:g}" if isinstance(value, float) else str(value)


def _condition(by: str, argument: str | None) -> Grouping:
    return ByCondition(by, key=argument or "")


def _kfold(by: str, argument: str | None) -> Grouping:
    parts = (argument or "").split(":")
    try:
        k = int(parts[0])
        seed = int(parts[1]) if len(parts) > 1 else 0
    except (ValueError, IndexError):
        raise InputError(
            f"--by {by}: expected kfold:K or kfold:K:SEED with whole numbers"
        ) from None
    return KFoldByDataset(by, k=k, seed=seed)


@dataclass(frozen=True)
class _Form:
    """One ``--by`` form: how it is written, whether it takes ``:ARGUMENT``, how to build it."""

    shown: str
    takes_argument: bool
    build: Callable[[str, str | None], Grouping]
    leaves_one_out: bool = True


_FORMS: dict[str, _Form] = {
    "dataset": _Form("dataset", False, lambda by, _: ByDataset(by)),
    "lab": _Form("lab", False, lambda by, _: ByLab(by)),
    "condition": _Form("condition:KEY", True, _condition),
    "kfold": _Form("kfold:K", True, _kfold, leaves_one_out=False),
}


def _expected(forms: list[_Form]) -> str:
    shown = [form.shown for form in forms]
    return ", ".join(shown[:-1]) + " or " + shown[-1]


def parse_grouping(by: str, *, leave_one_out: bool = False) -> Grouping:
    """Give the grouping a ``--by`` text names: dataset, lab, condition:KEY or kfold:K[:SEED].

    With ``leave_one_out`` only the forms that hold out one group per fold are accepted (and
    named in the message): what a sensitivity check needs.
    """
    allowed = [f for f in _FORMS.values() if f.leaves_one_out or not leave_one_out]
    name, sep, argument = by.partition(":")
    form = _FORMS.get(name)
    if form is not None and form not in allowed:
        raise InputError(
            f"--by {by}: expected {_expected(allowed)} ({form.shown} makes holdout folds "
            "with `curate folds`, not one fold per group)"
        )
    if form is None or form.takes_argument != bool(sep):
        raise InputError(f"--by {by}: expected {_expected(allowed)}")
    return form.build(by, argument if sep else None)


def fold_groups(table: pd.DataFrame, by: str) -> tuple[np.ndarray, GroupSplitter]:
    """Give (group label per row, splitter) of a ``--by`` text for a weighted table."""
    grouping = parse_grouping(by)
    return grouping.labels(table), grouping.splitter()
