"""The ledger: versioned, hash-chained datasets in one SQLite file.

Log, list, inspect, revise, retire and verify datasets; append events that write no version
(suggestions, checklist answers, runs). Every method that changes the catalog plans first (a
value saying what will be written), then applies the plan in one transaction that also appends
the sealed event. Nothing here knows about noise, weights, exports or fits: those rooms sit
above and call these methods (see ``curate.api`` for the catalog that has them all).
"""

from __future__ import annotations

import builtins
import dataclasses
import datetime as dt
import getpass
import os
import re
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError, NotFoundError
from curate.ingest.corrections import Correction
from curate.ingest.files import Draft, build_draft, draft_from_arrays, parse_condition
from curate.ingest.petab import PetabImport, read_petab_import
from curate.ingest.plausibility import check_against_others
from curate.ledger.amend import Amendments
from curate.ledger.context import (
    ActionContext,
    check_condition_filters,
    version_from_row,
)
from curate.ledger.problems import (
    ProblemOutcome,
    ProblemSummary,
    StoredProblem,
    read_problem,
    read_problems,
    store_problem,
    summarise_problems,
)
from curate.ledger.provenance import (
    BATCH_EVENT,
    BATCH_FIELDS,
    ChainHead,
    batch_entries,
    head_problem,
    text_sha256,
)
from curate.ledger.store import Store, VersionRow
from curate.ledger.verify import VerifyReport, verify_store
from curate.records import (
    CENSORED_WORDS,
    GRADES,
    DatasetRecord,
    DatasetVersion,
    SeriesArrays,
    canonical_json,
    jsonable,
    masked_points,
    normalise_grade,
    record_hash,
)

__all__ = [
    "DEFAULT_CATALOG",
    "AddPlan",
    "AddResult",
    "HistoryEntry",
    "Ledger",
    "check_condition_filters",
    "condition_matches",
    "default_actor",
    "describe_changes",
    "version_from_row",
]

DEFAULT_CATALOG = "curate.db"


def default_actor() -> str:
    """Give who is acting: $CURATE_USER, else the login name."""
    name = os.environ.get("CURATE_USER")
    if name:
        return name
    try:
        return getpass.getuser()
    except Exception:  # no login name in some containers
        return "unknown"


@dataclass(frozen=True)
class AddPlan:
    """What logging one draft will write: a new dataset, or nothing (a duplicate)."""

    draft: Draft
    dataset_id: str
    duplicate_of: DatasetVersion | None
    record: DatasetRecord  # with the catalog-level warnings added

    def to_dict(self) -> dict[str, Any]:
        """Give the plan as plain data (what ``--dry-run`` prints)."""
        return {
            "action": "none (duplicate)" if self.duplicate_of else "add",
            "id": self.duplicate_of.id if self.duplicate_of else self.dataset_id,
            "version": self.duplicate_of.version if self.duplicate_of else 1,
            "origin": self.draft.origin,
            "n_points": self.record.n_points,
            "content_hash": self.record.content_hash,
            "warnings": [w.model_dump() for w in self.record.warnings],
        }


@dataclass(frozen=True)
class AddResult:
    """The outcome of logging one draft."""

    id: str
    version: int
    added: bool
    duplicate_of: str | None
    origin: str
    warnings: tuple[str, ...]
    # a PEtab import: the stored problem it stored or recognised (None for other logs)
    problem: ProblemOutcome | None = None

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {
            "id": self.id,
            "version": self.version,
            "added": self.added,
            "duplicate_of": self.duplicate_of,
            "origin": self.origin,
            "warnings": list(self.warnings),
            "problem": None if self.problem is None else self.problem.to_dict(),
        }


@dataclass(frozen=True)
class HistoryEntry:
    """One change in a dataset's life."""

    seq: int
    at: str
    actor: str
    kind: str
    version: int | None
    changes: tuple[str, ...]
    reason: str | None

    def to_dict(self) -> dict[str, Any]:
        """Give the entry as plain data."""
        return {
            "seq": self.seq,
            "at": self.at,
            "actor": self.actor,
            "kind": self.kind,
            "version": self.version,
            "changes": list(self.changes),
            "reason": self.reason,
        }


def _slug(text: str, limit: int) -> str:
    slug = re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")[:limit].strip("_")
    return slug or "x"


def _flatten(value: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(value, dict):
        out: dict[str, Any] = {}
        for key, item in value.items():
            out.update(_flatten(item, f"{prefix}.{key}" if prefix else str(key)))
        return out
    return {prefix: value}


def describe_changes(before: dict[str, Any], after: dict[str, Any]) -> tuple[str, ...]:
    """Give 'field: old -> new' lines between two record dicts (flattened)."""
    a, b = _flatten(before), _flatten(after)
    lines = []
    for key in sorted(set(a) | set(b)):
        if a.get(key) != b.get(key) and key != "content_hash":
            lines.append(f"{key}: {a.get(key)!r} -> {b.get(key)!r}")
    return tuple(lines)


class Ledger(Amendments):
    """The versioned, hash-chained datasets of one catalog file."""

    def __init__(self, path: str | Path, *, actor: str | None = None) -> None:
        self.path = str(path)
        self.actor = actor or default_actor()
        self._store = Store(path)

    def close(self) -> None:
        """Close the catalog file."""
        self._store.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def catalog_id(self) -> str:
        """Give the catalog's unique id (made when the file was created)."""
        return self._store.meta("catalog_id")

    @property
    def store(self) -> Store:
        """Give the storage layer (for tools and tests that inspect the file)."""
        return self._store

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """Group several changes into one all-or-nothing action (nests: inner ones join)."""
        with self._store.transaction():
            yield

    def head(self) -> tuple[int, str]:
        """Give the event chain's head: (sequence number, hash) of the newest event."""
        return self._store.head()

    def store_policy(self, sha256: str, name: str, origin: str, text: str) -> str:
        """Keep a weighting policy's text under its hash (once), so runs can name it; give the
        sha256 of the exact text the catalog holds for it, for the run's event to seal.

        The first text stored under a hash stays: a later copy with other comments has the
        same settings hash, and its run seals the text already held.
        """
        self._store.put_policy(sha256, name, origin, text)
        held = self._store.policy_text(sha256)
        return text_sha256(text if held is None else held)

    def series_many(self, content_hashes: builtins.list[str]) -> dict[str, SeriesArrays]:
        """Give the arrays of many content hashes in one read."""
        return self._store.series_many(content_hashes)

    def series_bytes(self, content_hashes: builtins.list[str]) -> dict[str, tuple[Any, ...]]:
        """Give the stored bytes of many content hashes: (time, value, sd, replicate, n,
        censored), little-endian float64 / int64 / int8, None where a column is empty."""
        return self._store.series_bytes(content_hashes)

    def latest_fields(
        self, paths: tuple[str, ...]
    ) -> Iterator[tuple[str, int, str, str, builtins.list[Any]]]:
        """Give (id, version, record hash, content hash, [the record's value at each JSON
        path]) of every dataset's newest version, ordered by id, one at a time, without parsing
        whole records (a path such as ``$.observable.unit``; a missing one gives None). A
        number, text or null comes as itself (true and false as 1 and 0), an object or array
        as its JSON text, for the caller to read only where it needs to."""
        for row in self._store.latest_version_fields(paths):
            yield str(row[0]), int(row[1]), str(row[2]), str(row[3]), list(row[4:])

    def verify(self, head: ChainHead | tuple[int, str] | None = None) -> VerifyReport:
        """Give the result of recomputing every content hash, record hash, policy text and the
        event chain; with ``head`` (kept outside the catalog), also whether it still extends it."""
        return verify_store(self._store, None if head is None else _chain_head(head))

    def head_problem(self, head: ChainHead | tuple[int, str]) -> str | None:
        """Give why the catalog no longer extends a head kept elsewhere, or None if it does."""
        return head_problem(self._store.events(), _chain_head(head))

    # -- logging ---------------------------------------------------------------------------

    def read_file(
        self,
        path: str | Path,
        *,
        sidecar: str | Path | None = None,
        options: dict[str, Any] | None = None,
    ) -> Draft:
        """Give the validated draft of a data file without logging it."""
        return build_draft(path, sidecar=sidecar, options=options, actor=self.actor)

    def draft(
        self,
        time: Sequence[float] | np.ndarray,
        value: Sequence[float] | np.ndarray,
        *,
        observable: str,
        unit: str,
        time_unit: str,
        lab: str,
        sd: Sequence[float] | np.ndarray | None = None,
        replicate: Sequence[int] | np.ndarray | None = None,
        conditions: dict[str, Any] | None = None,
        censored: Sequence[str | int] | np.ndarray | None = None,
        **metadata: Any,
    ) -> Draft:
        """Give the validated draft of arrays in memory (the other fields as in a sidecar).

        ``censored``: per point '' (observed), 'below' or 'above' its limit, which is then the
        point's ``value``.
        """
        meta: dict[str, Any] = {
            "observable": {"id": observable, "unit": unit, **metadata.pop("observable", {})},
            "time": {"unit": time_unit},
            "source": {"lab": lab, **metadata.pop("source", {})},
            "conditions": conditions or {},
            **metadata,
        }
        rep = None if replicate is None else np.asarray(replicate, dtype=np.int64)
        labels: tuple[str, ...] = ()
        if rep is not None:
            labels = tuple(str(x) for x in np.unique(rep))
            rep = np.searchsorted(np.unique(rep), rep)
        return draft_from_arrays(
            np.asarray(time),
            np.asarray(value),
            metadata=meta,
            sd=None if sd is None else np.asarray(sd),
            replicate=rep,
            replicate_labels=labels,
            censored=None if censored is None else np.asarray(censored, dtype=object),
            actor=self.actor,
        )

    def plan_add(self, draft: Draft, context: ActionContext | None = None) -> AddPlan:
        """Give what logging ``draft`` would write, against the catalog as it is now."""
        context = context or ActionContext(self._store)
        rec = draft.record
        conditions = canonical_json({k: v.model_dump() for k, v in rec.conditions.items()})
        duplicate = context.by_key.get(
            (rec.content_hash, rec.observable.id, conditions, rec.source.lab)
        )
        if duplicate is None and draft.legacy_hash is not None:
            # logged before converted values were rounded to 15 digits: the same data
            duplicate = context.by_key.get(
                (draft.legacy_hash, rec.observable.id, conditions, rec.source.lab)
            )
        for content in (rec.content_hash, draft.legacy_hash):
            if duplicate is None and content is not None and context.logged_as:
                # logged before as exactly this, and corrected since: a rerun of an intake must
                # not undo the correction by logging the file again
                revised = context.logged_as.get(context.logged_key(rec, content))
                if revised is not None:
                    duplicate = self.show(revised)
        if duplicate is None:
            context.check_unit(rec, draft.origin)
            context.check_conditions(rec.conditions, draft.origin)
            if rec.supersedes is not None:
                self._check_supersedes(rec.supersedes, draft.origin, draft.requested_id)
        magnitude = draft.magnitude  # of the observed points: a limit is no value
        extra = check_against_others(
            observable=rec.observable.id, unit=rec.observable.unit, relative=rec.observable.relative,
            conditions=conditions, content_hash=rec.content_hash, magnitude=magnitude,
            same_content=context.by_hash.get(rec.content_hash, []),
            others_level=context.level(rec.observable.id, rec.observable.unit), lab=rec.source.lab,
        )  # fmt: skip
        annotations = {**rec.annotations, "typical_magnitude": magnitude}
        record = rec.model_copy(
            update={"warnings": rec.warnings + tuple(extra), "annotations": annotations}
        )
        dataset_id = draft.requested_id or self._new_id(rec, context)
        if draft.requested_id and duplicate is None and draft.requested_id in context.ids:
            raise InputError(
                f"{draft.origin}: dataset id '{draft.requested_id}' is taken; choose "
                "another id or leave it out to get one generated"
            )
        return AddPlan(draft=draft, dataset_id=dataset_id, duplicate_of=duplicate, record=record)

    def _new_id(self, rec: DatasetRecord, context: ActionContext) -> str:
        prefix = f"{_slug(rec.source.lab, 40).split('_')[0][:16]}_{_slug(rec.observable.id, 24)}_"
        if not prefix[0].isalpha():
            prefix = "d_" + prefix
        number = context.next_number.get(prefix, 1)  # numbers below it are known to be taken
        while f"{prefix}{number:02d}" in context.ids:
            number += 1
        context.next_number[prefix] = number
        return f"{prefix}{number:02d}"

    def _write_version(
        self,
        dataset_id: str,
        version: int,
        record: DatasetRecord,
        *,
        kind: str,
        payload: dict[str, Any],
        arrays: SeriesArrays | None,
        given: SeriesArrays | None = None,
    ) -> DatasetVersion:
        created = dt.datetime.now(dt.UTC)
        record_json = canonical_json(record.model_dump(mode="json"))
        sealed = record_hash(dataset_id, version, record_json)
        if arrays is not None:
            self._store.put_series(record.content_hash, arrays)
        if given is not None and record.as_given is not None:
            self._store.put_series(record.as_given, given)
        self._store.put_version(
            VersionRow(
                dataset_id=dataset_id,
                version=version,
                created_at=created.isoformat(),
                record_json=record_json,
                record_hash=sealed,
                content_hash=record.content_hash,
                observable=record.observable.id,
                lab=record.source.lab,
                grade=record.trust.grade if record.trust else None,
                retired=record.retired,
            )
        )
        self._store.append_event(
            kind,
            {**payload, "record_hash": sealed, "content_hash": record.content_hash},
            actor=self.actor,
            dataset_id=dataset_id,
            version=version,
        )
        return DatasetVersion(
            id=dataset_id, version=version, created_at=created, record=record, record_hash=sealed
        )

    def apply(self, plan: AddPlan, context: ActionContext | None = None) -> AddResult:
        """Write a plan (call inside a transaction when batching; otherwise opens one)."""
        if plan.duplicate_of is not None:
            dup = plan.duplicate_of
            return AddResult(
                id=dup.id,
                version=dup.version,
                added=False,
                duplicate_of=dup.id,
                origin=plan.draft.origin,
                warnings=(),
            )
        payload = {
            "origin": plan.draft.origin,
            "raw_file_sha256": plan.record.source.raw_file_sha256,
        }
        if plan.record.supersedes is not None:
            payload["supersedes"] = plan.record.supersedes
        version = self._write_version(
            plan.dataset_id,
            1,
            plan.record,
            kind="add",
            payload=payload,
            arrays=plan.draft.arrays,
            given=plan.draft.as_given,
        )
        if plan.record.supersedes is not None:
            self._mark_superseded(plan.record.supersedes, by=plan.dataset_id)
        if context is not None:
            context.remember(version)
        return AddResult(
            id=plan.dataset_id,
            version=1,
            added=True,
            duplicate_of=None,
            origin=plan.draft.origin,
            warnings=tuple(w.message for w in plan.record.warnings),
        )

    def add_drafts(
        self, drafts: Iterable[Draft], *, batch: bool = False
    ) -> builtins.list[AddResult]:
        """Log many drafts as one action: one transaction, all or nothing.

        With ``batch`` the new datasets are written with a few multi-row statements and sealed
        by one ``add_batch`` event that names each dataset with its version, record hash and
        content hash (so ``verify`` still names a single broken record); without it each
        dataset gets its own ``add`` event, as a single add does. A draft that supersedes
        another dataset is always written on its own (it writes a version of that one too).
        """
        with self._store.transaction():
            context = ActionContext(self._store)
            if not batch:
                return [self.apply(self.plan_add(draft, context), context) for draft in drafts]
            return self._add_batch(drafts, context)

    def _add_batch(
        self, drafts: Iterable[Draft], context: ActionContext
    ) -> builtins.list[AddResult]:
        created = dt.datetime.now(dt.UTC)
        stamp = created.isoformat()
        results: builtins.list[AddResult] = []
        series: dict[str, SeriesArrays] = {}
        rows: builtins.list[VersionRow] = []
        sealed: builtins.list[builtins.list[Any]] = []
        for draft in drafts:
            plan = self.plan_add(draft, context)
            if plan.duplicate_of is not None or plan.record.supersedes is not None:
                results.append(self.apply(plan, context))
                continue
            record = plan.record
            record_json = canonical_json(record.model_dump(mode="json"))
            digest = record_hash(plan.dataset_id, 1, record_json)
            series.setdefault(record.content_hash, draft.arrays)
            if draft.as_given is not None and record.as_given is not None:
                series.setdefault(record.as_given, draft.as_given)
            rows.append(
                VersionRow(
                    dataset_id=plan.dataset_id, version=1, created_at=stamp,
                    record_json=record_json, record_hash=digest,
                    content_hash=record.content_hash, observable=record.observable.id,
                    lab=record.source.lab, grade=record.trust.grade if record.trust else None,
                    retired=record.retired,
                )
            )  # fmt: skip
            sealed.append(
                [plan.dataset_id, 1, digest, record.content_hash, draft.origin,
                 record.source.raw_file_sha256]
            )  # fmt: skip
            context.remember(
                DatasetVersion.model_construct(
                    id=plan.dataset_id, version=1, created_at=created, record=record,
                    record_hash=digest,
                )
            )  # fmt: skip
            results.append(
                AddResult(
                    id=plan.dataset_id, version=1, added=True, duplicate_of=None,
                    origin=draft.origin, warnings=tuple(w.message for w in record.warnings),
                )
            )  # fmt: skip
        if rows:
            self._store.put_series_many(series)
            self._store.put_versions(rows)
            self._store.append_event(
                BATCH_EVENT,
                {"datasets": sealed, "fields": list(BATCH_FIELDS)},
                actor=self.actor,
            )
        return results

    def add(
        self,
        path: str | Path,
        *,
        sidecar: str | Path | None = None,
        options: dict[str, Any] | None = None,
        dry_run: bool = False,
    ) -> AddResult | AddPlan:
        """Log one data file (with its sidecar and option overrides); give the result.

        With ``dry_run`` nothing is written and the plan is given instead.
        """
        draft = self.read_file(path, sidecar=sidecar, options=options)
        if dry_run:
            return self.plan_add(draft)
        return self.add_drafts([draft])[0]

    def import_petab(
        self, problem: str | Path, *, lab: str | None = None, time_unit: str = "s", unit: str = "1"
    ) -> builtins.list[AddResult]:
        """Store a PEtab problem (its files byte for byte) and log its measurements, one
        dataset per observable/condition/datasetId, each linked to the stored problem."""
        imported = read_petab_import(
            problem, lab=lab, time_unit=time_unit, unit=unit, actor=self.actor
        )
        return self.add_petab(imported)

    def add_petab(self, imported: PetabImport) -> builtins.list[AddResult]:
        """Store a PEtab problem already read and log its drafts: one transaction.

        A problem whose content is stored already is recognised (nothing written for it);
        new datasets carry ``annotations['petab_problem'] = {'id', 'version'}``.
        """
        with self._store.transaction():
            outcome = store_problem(self._store, imported.problem, actor=self.actor)
            link = {"id": outcome.id, "version": outcome.version}
            context = ActionContext(self._store)
            results = []
            for draft in imported.drafts:
                record = draft.record
                linked = dataclasses.replace(
                    draft,
                    record=record.model_copy(
                        update={"annotations": {**record.annotations, "petab_problem": link}}
                    ),
                )
                result = self.apply(self.plan_add(linked, context), context)
                results.append(dataclasses.replace(result, problem=outcome))
        return results

    # -- stored problems -------------------------------------------------------------------

    def problems(self) -> builtins.list[StoredProblem]:
        """Give the newest version of every stored PEtab problem, ordered by id."""
        return read_problems(self._store)

    def problem(self, problem_id: str, version: int | None = None) -> StoredProblem:
        """Give one stored PEtab problem (the newest version unless ``version`` is named)."""
        return read_problem(self._store, problem_id, version)

    def models(self) -> builtins.list[ProblemSummary]:
        """Give what ``curate models`` lists: each stored problem with its ids and datasets."""
        return summarise_problems(self._store)

    # -- new versions ----------------------------------------------------------------------

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
    ) -> DatasetVersion:
        """Write a new version of a dataset with some record fields replaced (and, for a
        correction of how its numbers read, its new arrays and the numbers as given).

        ``expected`` is the version the update was computed from: a writer that got in between
        makes this one refuse instead of silently overwriting its change.
        """
        with self._store.transaction():
            current = self.show(dataset_id)
            if expected is not None and current.version != expected:
                raise InputError(
                    f"dataset {dataset_id} changed while this change was prepared (now version "
                    f"{current.version}); run the command again"
                )
            merged = current.record.model_dump()
            merged.update(update)
            record = DatasetRecord.model_validate(merged)
            if record == current.record:
                raise InputError(f"dataset {dataset_id}: nothing would change")
            changes = describe_changes(
                current.record.model_dump(mode="json"), record.model_dump(mode="json")
            )
            return self._write_version(
                dataset_id,
                current.version + 1,
                record,
                kind=kind,
                arrays=arrays,
                given=given,
                payload={"reason": reason, "changes": list(changes), **(payload or {})},
            )

    def record_event(
        self, kind: str, payload: dict[str, Any], *, dataset_id: str | None = None
    ) -> None:
        """Append an event that writes no version (checklist answers, suggestions)."""
        with self._store.transaction():
            self._store.append_event(
                kind, jsonable(payload), actor=self.actor, dataset_id=dataset_id
            )

    def latest_event(self, dataset_id: str, kind: str) -> dict[str, Any] | None:
        """Give the newest event of ``kind`` for a dataset, or None."""
        found = [e for e in self._store.events(dataset_id) if e.kind == kind]
        return found[-1].to_dict() if found else None

    def retire(self, dataset_id: str, *, reason: str) -> DatasetVersion:
        """Hide a dataset from later selections (a new version; nothing is deleted)."""
        if not reason.strip():
            raise InputError("retire: a reason is required (--reason)")
        if self.show(dataset_id).record.retired:
            raise InputError(f"dataset {dataset_id} is already retired")
        return self.new_version(
            dataset_id,
            kind="retire",
            reason=reason,
            update={"retired": True, "retired_reason": reason},
        )

    def revise(
        self,
        dataset_id: str,
        *,
        reason: str,
        label: str | None = None,
        conditions: dict[str, Any] | None = None,
        lab: str | None = None,
        reference: str | None = None,
        calibration_group: str | None = None,
        unretire: bool = False,
        correction: Correction | None = None,
    ) -> DatasetVersion:
        """Correct a dataset's metadata as a new version; with a ``correction`` of how its
        numbers read (unit, time unit, uncertainty, relative, normalisation), its values are
        reconverted from the numbers as the file gave them, in the same version."""
        if not reason.strip():
            raise InputError("revise: a reason is required (--reason)")
        current_version = self.show(dataset_id)
        fixed = None
        if correction is not None and correction.given():
            fixed = self.correction_update(dataset_id, correction)
        update: dict[str, Any] = dict(fixed[0]) if fixed else {}
        current = current_version.record.model_copy(update=update)
        if label is not None:
            update["observable"] = current.observable.model_copy(update={"label": label})
        if conditions:
            merged = dict(current.conditions)
            for key, raw in conditions.items():
                if raw is None or raw == "":
                    merged.pop(key, None)
                else:
                    merged[key] = parse_condition(key, raw, origin=f"dataset {dataset_id}")
            ActionContext(self._store).check_conditions(
                {k: v for k, v in merged.items() if k in conditions},
                f"dataset {dataset_id}",
                dataset_id=dataset_id,
            )
            update["conditions"] = merged
        if lab is not None or reference is not None:
            update["source"] = current.source.model_copy(
                update={k: v for k, v in (("lab", lab), ("reference", reference)) if v is not None}
            )
        if calibration_group is not None:
            update["protocol"] = current.protocol.model_copy(
                update={"calibration_group": calibration_group}
            )
        if unretire:
            update.update({"retired": False, "retired_reason": None})
        if fixed is None:
            return self.new_version(
                dataset_id, kind="revise", reason=reason, update=update,
                expected=current_version.version,
            )  # fmt: skip
        assert correction is not None
        payload: dict[str, Any] = {"correction": correction.words()}
        if fixed[3]:
            payload["numbers_as_given"] = (
                "recovered from the stored values (logged before the numbers as given were kept)"
            )
        return self.new_version(
            dataset_id, kind="correct", reason=reason, update=update, payload=payload,
            arrays=fixed[1], given=fixed[2], expected=current_version.version,
        )  # fmt: skip

    # -- reading ---------------------------------------------------------------------------

    def show(self, dataset_id: str, version: int | None = None) -> DatasetVersion:
        """Give one dataset version (the newest unless ``version`` is named)."""
        rows = self._store.versions_of(dataset_id)
        if not rows:
            raise NotFoundError(
                f"no dataset '{dataset_id}' in {self.path}; `curate list` shows the ids"
            )
        if version is None:
            return version_from_row(rows[-1])
        for row in rows:
            if row.version == version:
                return version_from_row(row)
        raise NotFoundError(
            f"dataset '{dataset_id}' has versions 1 to {rows[-1].version}, not {version}"
        )

    def versions(self, dataset_id: str) -> builtins.list[DatasetVersion]:
        """Give every version of a dataset, oldest first."""
        self.show(dataset_id)
        return [version_from_row(r) for r in self._store.versions_of(dataset_id)]

    def arrays(self, dataset_id: str, version: int | None = None) -> SeriesArrays:
        """Give the measured arrays of a dataset version (canonical units)."""
        return self._store.series(self.show(dataset_id, version).record.content_hash)

    def points(self, dataset_id: str, version: int | None = None) -> pd.DataFrame:
        """Give a dataset version's points as a DataFrame (canonical units, time-sorted; a
        ``censored`` column when some point is censored: 'below' or 'above' the limit in value)."""
        found = self.show(dataset_id, version)
        arrays = self._store.series(found.record.content_hash)
        frame = pd.DataFrame({"time": arrays.time, "value": arrays.value})
        if arrays.sd is not None:
            frame["sd"] = arrays.sd
        if arrays.replicate is not None:
            labels = np.array(found.record.replicate_labels, dtype=object)
            frame["replicate"] = labels[arrays.replicate] if len(labels) else arrays.replicate
        if arrays.n is not None:
            frame["n"] = arrays.n
        if found.record.masks:  # every point stays; the mask says which ones fits leave out
            frame["masked"] = masked_points(found.record, arrays)
        if arrays.censored is not None and arrays.censored.any():
            # 'below' / 'above': value is the limit, not a measurement
            frame["censored"] = [CENSORED_WORDS[int(code)] for code in arrays.censored]
        frame.attrs.update(
            {
                "dataset_id": found.id,
                "version": found.version,
                "time_unit": "second",
                "unit": found.record.observable.unit,
            }
        )
        return frame

    def list(
        self,
        *,
        observable: str | None = None,
        lab: str | None = None,
        conditions: dict[str, str] | None = None,
        grade: str | None = None,
        include_retired: bool = False,
    ) -> builtins.list[DatasetVersion]:
        """Give the newest version of each dataset that matches every filter given."""
        grade = normalise_grade(grade)
        if grade is not None and grade not in GRADES and grade != "none":
            raise InputError(
                f"unknown grade '{grade}'; expected one of {', '.join(GRADES)} or 'none'"
            )
        wanted = {
            k: parse_condition(k, v, origin="--condition") for k, v in (conditions or {}).items()
        }
        candidates = []
        for row in self._store.latest_versions():
            if observable is not None and row.observable != observable:
                continue
            if lab is not None and row.lab != lab:
                continue
            if grade is not None and (row.grade or "none") != grade:
                continue
            if row.retired and not include_retired:
                continue
            candidates.append(version_from_row(row))
        check_condition_filters(wanted, candidates)
        return [
            version
            for version in candidates
            if all(
                condition_matches(version.record.conditions.get(k), v.value)
                for k, v in wanted.items()
            )
        ]

    def history(self, dataset_id: str) -> builtins.list[HistoryEntry]:
        """Give every change of a dataset, oldest first, with what changed and why."""
        self.show(dataset_id)
        entries = []
        for event in self._store.events(dataset_id):
            payload = event.payload
            if event.kind == BATCH_EVENT:  # one event for many datasets: this one's entry
                entry = next(e for e in batch_entries(event) if e["dataset_id"] == dataset_id)
                entries.append(
                    HistoryEntry(
                        seq=event.seq, at=event.at, actor=event.actor, kind="add",
                        version=entry.get("version"), changes=(), reason=None,
                    )
                )  # fmt: skip
                continue
            changes = tuple(payload.get("changes", ()))
            if payload.get("supersedes"):
                changes += (f"supersedes {payload['supersedes']} (retired by this log)",)
            entries.append(
                HistoryEntry(
                    seq=event.seq,
                    at=event.at,
                    actor=event.actor,
                    kind=event.kind,
                    version=event.version,
                    changes=changes,
                    reason=payload.get("reason"),
                )
            )
        return entries

    def events(self) -> builtins.list[dict[str, Any]]:
        """Give the whole event log as plain dicts, oldest first."""
        return [e.to_dict() for e in self._store.events()]


def _chain_head(head: ChainHead | tuple[int, str]) -> ChainHead:
    return head if isinstance(head, ChainHead) else ChainHead(int(head[0]), str(head[1]))


def condition_matches(stored: Any, wanted: Any) -> bool:
    """Tell whether a stored condition value matches a wanted one (floats within 1e-9)."""
    if stored is None:
        return False
    value = stored.value
    if isinstance(value, float) and isinstance(wanted, float):
        return bool(np.isclose(value, wanted, rtol=1e-9, atol=0.0))
    return bool(value == wanted) or str(value) == str(wanted)
