"""Corrections a ledger writes as new versions: how a dataset's numbers read (unit, time unit,
uncertainty, relative flag, normalisation), point masks, and one dataset replacing another.

Nothing is edited: each is a new version sealed in the event chain, with its reason. A
correction of the reading reconverts the numbers as the file gave them (``ingest.corrections``);
a mask keeps every point and says which ones stay out of weights, exports, fits and checks.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from curate.errors import InputError, NotFoundError
from curate.ingest.corrections import Correction, correct
from curate.ingest.masks import mask_times
from curate.ingest.plausibility import check_against_others, typical_magnitude
from curate.ledger.context import ActionContext
from curate.records import DatasetVersion, SeriesArrays, canonical_json, masked_points
from curate.units import to_unit

if TYPE_CHECKING:
    from curate.ledger.store import Store

__all__ = ["AGAINST_OTHERS", "Amendments"]

# warnings judged against the other datasets: recomputed when a correction changes the values
AGAINST_OTHERS = frozenset({"identical_to_other", "magnitude_vs_others", "looks_log_transformed"})


class Amendments:
    """The ledger's corrections (mixed into :class:`curate.ledger.Ledger`)."""

    _store: Store
    actor: str

    if TYPE_CHECKING:

        def show(self, dataset_id: str, version: int | None = None) -> DatasetVersion: ...

        def new_version(
            self,
            dataset_id: str,
            *,
            kind: str,
            reason: str | None,
            update: dict[str, Any],
            payload: dict[str, Any] | None = None,
            arrays: SeriesArrays | None = None,
            given: SeriesArrays | None = None,
            expected: int | None = None,
        ) -> DatasetVersion: ...

        def _write_version(
            self,
            dataset_id: str,
            version: int,
            record: Any,
            *,
            kind: str,
            payload: dict[str, Any],
            arrays: SeriesArrays | None,
            given: SeriesArrays | None = None,
        ) -> DatasetVersion: ...

    def numbers_kept(self, version: DatasetVersion) -> SeriesArrays | None:
        """Give the numbers as the file gave them where they are kept apart from the arrays."""
        given = version.record.as_given
        if given is None or given == version.record.content_hash:
            return None
        return self._store.series(given)

    def correction_update(
        self, dataset_id: str, correction: Correction
    ) -> tuple[dict[str, Any], SeriesArrays | None, SeriesArrays | None, bool]:
        """Give what a correction of the reading changes: record fields, new arrays, the
        numbers as given to keep, and whether they had to be recovered from stored values."""
        current = self.show(dataset_id)
        origin = f"dataset {dataset_id}"
        stored = self._store.series(current.record.content_hash)
        fixed = correct(
            current.record, stored, self.numbers_kept(current), correction, origin=origin
        )
        record = current.record.model_copy(update=fixed.update)
        context = ActionContext(self._store)
        context.forget(current)
        context.check_unit(record, origin)
        if fixed.arrays is not None:
            values = fixed.arrays.value
            magnitude = typical_magnitude(values)
            conditions = canonical_json({k: v.model_dump() for k, v in record.conditions.items()})
            same = [
                n
                for n in context.by_hash.get(record.content_hash, [])
                if n.dataset_id != dataset_id
            ]
            again = check_against_others(
                observable=record.observable.id, unit=record.observable.unit,
                relative=record.observable.relative, conditions=conditions,
                content_hash=record.content_hash, magnitude=magnitude, same_content=same,
                others_level=context.level(record.observable.id, record.observable.unit),
                lab=record.source.lab,
            )  # fmt: skip
            kept = tuple(w for w in record.warnings if w.code not in AGAINST_OTHERS)
            fixed.update["warnings"] = kept + tuple(again)
            fixed.update["annotations"] = {
                **current.record.annotations,
                "typical_magnitude": magnitude,
            }
        return fixed.update, fixed.arrays, fixed.as_given, fixed.recovered

    def mask(
        self,
        dataset_id: str,
        times: Sequence[str | float],
        *,
        reason: str,
        replicate: str | None = None,
        unmask: bool = False,
    ) -> DatasetVersion:
        """Set the points at ``times`` aside (or back, with ``unmask``) as a new version.

        A bare number is in the unit the dataset's times were logged in; '30 min' names its
        own. The points stay in the catalog; weights, exports, fits and checks leave them out.
        """
        if unmask and not reason.strip():
            raise InputError("unmask: a reason is required (--reason)")
        current = self.show(dataset_id)
        arrays = self._store.series(current.record.content_hash)
        masks = mask_times(
            current.record,
            arrays,
            [str(t) for t in times],
            replicate=replicate,
            reason=reason,
            actor=self.actor,
            unmask=unmask,
            origin=f"dataset {dataset_id}",
        )
        if masked_points(current.record.model_copy(update={"masks": masks}), arrays).all():
            raise InputError(
                f"dataset {dataset_id}: the masks would set aside every point; retire the "
                f"dataset instead (`curate retire {dataset_id} --reason ...`)"
            )
        unit = current.record.time_unit_original
        before, after = set(current.record.masks), set(masks)
        lines = [
            f"{'unmasked' if m in before - after else 'masked'} the points at "
            f"{to_unit(m.time, 'second', unit):g} {unit}"
            + (f" (replicate {m.replicate})" if m.replicate else "")
            for m in sorted(before ^ after, key=lambda m: (m.time, m.replicate or ""))
        ]
        return self.new_version(
            dataset_id,
            kind="unmask" if unmask else "mask",
            reason=reason,
            update={"masks": masks},
            payload={"times": [str(t) for t in times], "replicate": replicate, "changes": lines},
            expected=current.version,
        )

    def _check_supersedes(self, old: str, origin: str, new_id: str | None) -> None:
        """Refuse to replace a dataset that does not exist, is replaced already, or is itself."""
        try:
            found = self.show(old)
        except NotFoundError:
            raise InputError(
                f"{origin}: --supersedes {old}: no such dataset; `curate list --retired` shows the ids"
            ) from None
        if new_id is not None and new_id == old:
            raise InputError(f"{origin}: a dataset cannot supersede itself ({old})")
        if found.record.superseded_by is not None:
            raise InputError(
                f"{origin}: dataset {old} is superseded already by {found.record.superseded_by}; "
                f"supersede {found.record.superseded_by} instead"
            )

    def _mark_superseded(self, old: str, *, by: str) -> DatasetVersion:
        """Write the version of ``old`` that says ``by`` replaces it (and retires it)."""
        current = self.show(old)
        reason = f"superseded by {by}"
        record = current.record.model_copy(
            update={"superseded_by": by, "retired": True, "retired_reason": reason}
        )
        return self._write_version(
            old,
            current.version + 1,
            record,
            kind="supersede",
            payload={"reason": reason, "superseded_by": by,
                     "changes": [f"superseded_by: None -> {by!r}", "retired: -> True"]},
            arrays=None,
        )  # fmt: skip
