"""What one user action knows of the catalog while it writes, and the kinds conditions keep.

Built once per action (an add of many files, a correction) and indexed so that N writes cost
O(N log N): datasets by content hash and by what makes two logs one dataset, ids, typical values
per observable and unit, the units of each observable and the kinds of each condition key.
"""

from __future__ import annotations

import bisect
import datetime as dt
from collections.abc import Iterable

from curate import units
from curate.errors import InputError
from curate.ingest.plausibility import Neighbour
from curate.ledger.store import Store, VersionRow
from curate.records import ConditionValue, DatasetRecord, DatasetVersion, canonical_json

__all__ = ["ActionContext", "check_condition_filters", "condition_kind", "version_from_row"]


def condition_kind(value: ConditionValue) -> str:
    """Give the kind a condition key keeps across the catalog: 'text', 'true/false', 'number'
    (no unit, or a dimensionless one) or the canonical unit of a quantity."""
    if isinstance(value.value, bool):
        return "true/false"
    if isinstance(value.value, str):
        return "text"
    return value.unit if value.unit not in (None, "dimensionless") else "number"


def check_condition_filters(
    wanted: dict[str, ConditionValue], versions: Iterable[DatasetVersion]
) -> None:
    """Refuse a condition filter of another kind than the catalog stores for its key.

    ``--condition dose=10`` against doses stored as quantities (nM) would match nothing in
    silence: the filter must carry a unit then (and a text filter cannot match a number).
    """
    if not wanted:
        return
    stored: dict[str, set[str]] = {key: set() for key in wanted}
    for version in versions:
        for key, held in stored.items():
            value = version.record.conditions.get(key)
            if value is not None:
                held.add(condition_kind(value))
    for key, value in wanted.items():
        kinds = stored[key]
        if kinds and condition_kind(value) not in kinds:
            shown = sorted(kinds)[0]
            hint = (
                f"; give it with its unit, e.g. {key}={value.value:g}{units.short_unit(shown)}"
                if condition_kind(value) == "number"
                and shown not in ("number", "text", "true/false")
                else ""
            )
            raise InputError(
                f"--condition {key}: the catalog holds {key} as {_kind_text(shown)}, "
                f"not {_kind_text(condition_kind(value))}{hint}"
            )


def _kind_text(kind: str) -> str:
    if kind in ("text", "true/false"):
        return kind
    if kind == "number":
        return "a plain number"
    return f"a quantity in {units.short_unit(kind)} ({units.dimension_of(kind)})"


def _kind_example(kind: str) -> str:
    examples = {"text": "text", "true/false": "true or false", "number": "a plain number"}
    return examples.get(kind, f"a value with a unit such as '10 {units.short_unit(kind)}'")


def _neighbour_order(neighbour: Neighbour) -> str:
    return neighbour.dataset_id


def _unit_text(unit: str) -> str:
    return f"{units.short_unit(unit)} ({units.dimension_of(unit)})"


class ActionContext:
    """What one user action knows about the catalog while it writes (built once per action).

    Indexed so that logging N datasets costs O(N log N), not O(N^2): datasets by content hash,
    ids, per observable and unit a sorted list of typical values for the median, the units of
    each observable's absolute datasets and the kinds of each condition key (with the datasets
    holding them, so that an action can name one).
    """

    def __init__(self, store: Store) -> None:
        self.by_hash: dict[str, list[Neighbour]] = {}
        self.by_key: dict[tuple[str, str, str, str], DatasetVersion] = {}
        # revised datasets by what they were first logged as: a file logged again after its
        # dataset was corrected is that dataset, not a new one
        self.logged_as: dict[tuple[str, str, str, str], str] = {}
        self.levels: dict[tuple[str, str], list[float]] = {}
        self.ids: set[str] = set()
        self.next_number: dict[str, int] = {}
        self.units: dict[str, dict[str, list[str]]] = {}  # observable -> absolute unit -> ids
        self.kinds: dict[str, dict[str, list[str]]] = {}  # condition key -> kind -> ids
        latest = {row.dataset_id: row for row in store.latest_versions()}
        for row in latest.values():
            self.remember(version_from_row(row))
        for row in store.first_versions_of_revised():
            first = version_from_row(row)
            key = self.logged_key(first.record, first.record.content_hash)
            self.logged_as[key] = row.dataset_id

    def remember(self, version: DatasetVersion) -> None:
        """Add a version written during this action to the indexes."""
        rec = version.record
        conditions = canonical_json({k: v.model_dump() for k, v in rec.conditions.items()})
        magnitude = float(rec.annotations.get("typical_magnitude", 0.0))
        neighbour = Neighbour(
            dataset_id=version.id, observable=rec.observable.id, unit=rec.observable.unit,
            conditions=conditions, lab=rec.source.lab, content_hash=rec.content_hash, magnitude=magnitude,
        )  # fmt: skip
        # in id order, as a fresh build reads them, so a kept index warns as a fresh one would
        bisect.insort(
            self.by_hash.setdefault(rec.content_hash, []), neighbour, key=_neighbour_order
        )
        if magnitude > 0:
            bisect.insort(
                self.levels.setdefault((rec.observable.id, rec.observable.unit), []), magnitude
            )
        self.by_key[(rec.content_hash, rec.observable.id, conditions, rec.source.lab)] = version
        self.ids.add(version.id)
        if not rec.observable.relative:
            held = self.units.setdefault(rec.observable.id, {})
            held.setdefault(rec.observable.unit, []).append(version.id)
        for key, value in rec.conditions.items():
            kinds = self.kinds.setdefault(key, {})
            kinds.setdefault(condition_kind(value), []).append(version.id)

    def forget(self, version: DatasetVersion) -> None:
        """Take a dataset out of the indexes (a correction judges it against the others)."""
        rec = version.record
        self.by_hash[rec.content_hash] = [
            n for n in self.by_hash.get(rec.content_hash, []) if n.dataset_id != version.id
        ]
        self.by_key = {k: v for k, v in self.by_key.items() if v.id != version.id}
        magnitude = float(rec.annotations.get("typical_magnitude", 0.0))
        levels = self.levels.get((rec.observable.id, rec.observable.unit), [])
        if magnitude > 0 and magnitude in levels:
            levels.remove(magnitude)
        for held in self.units.get(rec.observable.id, {}).values():
            while version.id in held:
                held.remove(version.id)
        for kinds in self.kinds.values():
            for ids in kinds.values():
                while version.id in ids:
                    ids.remove(version.id)

    @staticmethod
    def logged_key(rec: DatasetRecord, content: str) -> tuple[str, str, str, str]:
        """Give (content hash, observable, conditions, lab): what makes two logs one dataset."""
        conditions = canonical_json({k: v.model_dump() for k, v in rec.conditions.items()})
        return (content, rec.observable.id, conditions, rec.source.lab)

    def check_unit(self, rec: DatasetRecord, origin: str) -> None:
        """Refuse absolute data whose unit has another dimension than the observable's
        absolute datasets (relative data join any observable: a scale factor carries them)."""
        if rec.observable.relative:
            return
        held = self.units.get(rec.observable.id, {})
        others = [(u, ids) for u, ids in held.items() if u != rec.observable.unit and ids]
        if others:
            # the unit of the earliest id, as in an index built afresh (kept ones grow in
            # another order)
            unit, ids = min(others, key=lambda other: min(other[1]))
            raise InputError(
                f"{origin}: unit '{rec.observable.unit_original}' "
                f"({units.dimension_of(rec.observable.unit)}) does not fit observable "
                f"'{rec.observable.id}', whose datasets are in {_unit_text(unit)}, e.g. "
                f"{min(ids)}; one observable keeps one dimension: give a unit of that dimension, "
                "mark relative data as relative, or log it under another observable id"
            )

    def check_conditions(
        self, conditions: dict[str, ConditionValue], origin: str, *, dataset_id: str | None = None
    ) -> None:
        """Refuse a condition whose kind (text, true/false, number, quantity of a dimension)
        differs from what the catalog's other datasets hold under the same key."""
        for key, value in conditions.items():
            kind = condition_kind(value)
            # only the other kinds are looked through (the dataset's own kind may be held by
            # every dataset); the one named is that of the earliest id, as a fresh index gives
            clashes = [
                (min(holders), other)
                for other, ids in self.kinds.get(key, {}).items()
                if other != kind and (holders := [i for i in ids if i != dataset_id])
            ]
            if clashes:
                holder, other = min(clashes)
                raise InputError(
                    f"{origin}, condition '{key}': '{units.condition_text(value)}' is "
                    f"{_kind_text(kind)}, but other datasets hold '{key}' as "
                    f"{_kind_text(other)}, e.g. {holder}; a condition key keeps one "
                    f"kind across the catalog: give {_kind_example(other)}, or use "
                    "another key"
                )

    def level(self, observable: str, unit: str) -> float | None:
        """Give the median typical value of the datasets of one observable and unit."""
        values = self.levels.get((observable, unit))
        if not values:
            return None
        middle = len(values) // 2
        return values[middle] if len(values) % 2 else 0.5 * (values[middle - 1] + values[middle])


def version_from_row(row: VersionRow) -> DatasetVersion:
    """Give the parsed dataset version of a stored row."""
    record = DatasetRecord.model_validate_json(row.record_json)
    return DatasetVersion(
        id=row.dataset_id,
        version=row.version,
        created_at=dt.datetime.fromisoformat(row.created_at),
        record=record,
        record_hash=row.record_hash,
    )
