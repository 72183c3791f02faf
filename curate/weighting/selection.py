"""Selections: which dataset versions go into a weighted table, an export, a fold set or a fit.

One pass over the ledger's current versions applies every filter (observable, lab, condition,
grade, id, pinned version, retired) and the policy's exclusions.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from curate.errors import InputError
from curate.ingest import parse_condition
from curate.ledger import Ledger
from curate.ledger.catalog import check_condition_filters, condition_matches
from curate.records import DatasetVersion, normalise_grade
from curate.weighting.policy import Policy

__all__ = ["Selection", "nothing_selected", "select"]


@dataclass(frozen=True)
class Selection:
    """Which datasets go into an export. Empty filters match everything."""

    observables: tuple[str, ...] = ()
    labs: tuple[str, ...] = ()
    conditions: tuple[tuple[str, str], ...] = ()
    grades: tuple[str, ...] = ()
    ids: tuple[str, ...] = ()
    versions: tuple[tuple[str, int], ...] = ()  # pinned (id, version) pairs
    include_retired: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Give the selection as plain data (recorded in every manifest)."""
        return {
            "observables": list(self.observables),
            "labs": list(self.labs),
            "conditions": dict(self.conditions),
            "grades": list(self.grades),
            "ids": list(self.ids),
            "versions": {k: v for k, v in self.versions},
            "include_retired": self.include_retired,
        }

    def describe(self) -> str:
        """Give the selection in words: 'lab Nobody; grade B or C' ('every dataset' if empty)."""

        def either(word: str, values: list[str]) -> str:
            return f"{word} {' or '.join(values)}"

        parts = []
        if self.observables:
            parts.append(either("observable", list(self.observables)))
        if self.labs:
            parts.append(either("lab", [f"'{lab}'" for lab in self.labs]))
        parts += [f"condition {key} = {value}" for key, value in self.conditions]
        if self.grades:
            parts.append(either("grade", list(self.grades)))
        if self.ids:
            parts.append(either("dataset", list(self.ids)))
        parts += [f"{ident} at version {number}" for ident, number in self.versions]
        if self.include_retired:
            parts.append("retired ones included")
        return "; ".join(parts) if parts else "every current dataset"


def select(catalog: Ledger, selection: Selection, policy: Policy) -> list[DatasetVersion]:
    """Give the dataset versions a selection names: current, not retired, not excluded by default.

    A pinned version (``versions``) is taken as pinned, retired or not; every other filter
    applies to the version that is taken.
    """
    pinned = dict(selection.versions)
    for ident in (*selection.ids, *pinned):
        catalog.show(ident)  # NotFoundError names an unknown id
    parsed = {
        key: parse_condition(key, raw, origin="--condition") for key, raw in selection.conditions
    }
    current = catalog.list(include_retired=True)
    check_condition_filters(parsed, current)
    wanted = {key: value.value for key, value in parsed.items()}
    wanted_grades = {normalise_grade(g) for g in selection.grades}  # 'b' is B
    chosen: list[DatasetVersion] = []
    for version in current:
        if selection.ids and version.id not in selection.ids and version.id not in pinned:
            continue
        if version.id in pinned:
            version = catalog.show(version.id, pinned[version.id])
        elif version.record.retired and not selection.include_retired:
            continue
        record = version.record
        if selection.observables and record.observable.id not in selection.observables:
            continue
        if selection.labs and record.source.lab not in selection.labs:
            continue
        if not all(condition_matches(record.conditions.get(k), v) for k, v in wanted.items()):
            continue
        grade = version.grade or policy.ungraded
        if (
            wanted_grades
            and (version.grade or "none") not in wanted_grades
            and grade not in wanted_grades
        ):
            continue
        if grade in policy.exclude:
            continue
        chosen.append(version)
    if not chosen:
        raise nothing_selected(selection, policy)
    return chosen


def nothing_selected(selection: Selection, policy: Policy) -> InputError:
    """Give the error of a selection that matches no dataset the policy lets into a fit."""
    excluded = " or ".join(policy.exclude)
    return InputError(
        f"the selection matches no dataset that the policy lets into a fit ({selection.describe()}; "
        f"the policy leaves out grade {excluded}); widen it, or see `curate list`"
    )
