"""The catalog API: log, list, inspect, revise, retire and verify datasets.

Every method that changes the catalog plans first (a value saying what will be written), then
applies the plan in one transaction that also appends the sealed event. The CLI calls these
methods and prints; notebooks and tests call them directly.
"""

from __future__ import annotations

import bisect
import builtins
import datetime as dt
import getpass
import json
import os
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate import assess
from curate.errors import InputError, IntegrityError, NotFoundError
from curate.ingest.files import Draft, build_draft, draft_from_arrays, parse_condition
from curate.ingest.inbox import IntakeReport, intake_folder
from curate.ingest.petab import read_petab_problem
from curate.plausibility import Neighbour, check_against_others, typical_magnitude
from curate.provenance import verify_chain
from curate.records import (
    GRADES,
    DatasetRecord,
    DatasetVersion,
    SeriesArrays,
    canonical_json,
    content_hash,
    jsonable,
    record_hash,
)
from curate.store import Store, VersionRow

__all__ = [
    "AddPlan",
    "AddResult",
    "Catalog",
    "HistoryEntry",
    "VerifyReport",
    "default_actor",
    "open_catalog",
    "restore_catalog",
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


def restore_catalog(
    backup: str | Path, catalog_path: str | Path | None = None
) -> tuple[Path, Path | None]:
    """Put a verified backup in place of the catalog; give (catalog, where the old one went).

    The current catalog is kept beside it as ``NAME.before-restore-TIMESTAMP``; nothing is
    deleted. Stop other writers first.
    """
    source = Path(backup)
    if not source.is_file():
        raise InputError(f"{source}: no such backup file")
    with Catalog(source) as candidate:
        report = candidate.verify()
    if not report.ok:
        raise IntegrityError(
            f"{source}: the backup does not verify ({report.problems[0] if report.problems else report.sqlite}); nothing restored"
        )
    target = Path(catalog_path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG)
    staged = target.with_name(target.name + ".restoring")
    import shutil

    shutil.copyfile(source, staged)
    kept = None
    if target.exists():
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
        kept = target.with_name(f"{target.name}.before-restore-{stamp}")
        with Catalog(target) as old:  # fold the write-ahead log into the file before moving it
            old.store.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        os.replace(target, kept)
        for suffix in ("-wal", "-shm"):
            Path(str(target) + suffix).unlink(missing_ok=True)
    os.replace(staged, target)
    return target, kept


def open_catalog(path: str | Path | None = None, *, actor: str | None = None) -> Catalog:
    """Give the catalog at ``path`` ($CURATE_CATALOG, else ./curate.db), creating it if new."""
    chosen = path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG
    return Catalog(chosen, actor=actor)


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

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {
            "id": self.id,
            "version": self.version,
            "added": self.added,
            "duplicate_of": self.duplicate_of,
            "origin": self.origin,
            "warnings": list(self.warnings),
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


@dataclass
class VerifyReport:
    """What ``verify`` recomputed and the first thing that did not hold."""

    datasets: int = 0
    versions: int = 0
    events: int = 0
    series: int = 0
    sqlite: str = "ok"
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """Tell whether everything held."""
        return not self.problems and self.sqlite == "ok"

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {
            "ok": self.ok,
            "datasets": self.datasets,
            "versions": self.versions,
            "events": self.events,
            "series": self.series,
            "sqlite": self.sqlite,
            "problems": self.problems,
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


class _ActionContext:
    """What one user action knows about the catalog while it writes (built once per action).

    Indexed so that logging N datasets costs O(N log N), not O(N^2): datasets by content hash,
    ids, and per observable and unit a sorted list of typical values for the median.
    """

    def __init__(self, store: Store) -> None:
        self.by_hash: dict[str, list[Neighbour]] = {}
        self.by_key: dict[tuple[str, str, str, str], DatasetVersion] = {}
        self.levels: dict[tuple[str, str], list[float]] = {}
        self.ids: set[str] = set()
        self.next_number: dict[str, int] = {}
        for row in store.latest_versions():
            self._remember(_version_from_row(row))

    def _remember(self, version: DatasetVersion) -> None:
        rec = version.record
        conditions = canonical_json({k: v.model_dump() for k, v in rec.conditions.items()})
        magnitude = float(rec.annotations.get("typical_magnitude", 0.0))
        neighbour = Neighbour(
            dataset_id=version.id, observable=rec.observable.id, unit=rec.observable.unit,
            conditions=conditions, lab=rec.source.lab, content_hash=rec.content_hash, magnitude=magnitude,
        )  # fmt: skip
        self.by_hash.setdefault(rec.content_hash, []).append(neighbour)
        if magnitude > 0:
            bisect.insort(
                self.levels.setdefault((rec.observable.id, rec.observable.unit), []), magnitude
            )
        self.by_key[(rec.content_hash, rec.observable.id, conditions, rec.source.lab)] = version
        self.ids.add(version.id)

    def level(self, observable: str, unit: str) -> float | None:
        """Give the median typical value of the datasets of one observable and unit."""
        values = self.levels.get((observable, unit))
        if not values:
            return None
        middle = len(values) // 2
        return values[middle] if len(values) % 2 else 0.5 * (values[middle - 1] + values[middle])


def _version_from_row(row: VersionRow) -> DatasetVersion:
    record = DatasetRecord.model_validate_json(row.record_json)
    return DatasetVersion(
        id=row.dataset_id,
        version=row.version,
        created_at=dt.datetime.fromisoformat(row.created_at),
        record=record,
        record_hash=row.record_hash,
    )


class Catalog:
    """A catalog of measured datasets in one SQLite file."""

    def __init__(self, path: str | Path, *, actor: str | None = None) -> None:
        self.path = str(path)
        self.actor = actor or default_actor()
        self._store = Store(path)

    def close(self) -> None:
        """Close the catalog file."""
        self._store.close()

    def __enter__(self) -> Catalog:
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
        **metadata: Any,
    ) -> Draft:
        """Give the validated draft of arrays in memory (the other fields as in a sidecar)."""
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
            actor=self.actor,
        )

    def plan_add(self, draft: Draft, context: _ActionContext | None = None) -> AddPlan:
        """Give what logging ``draft`` would write, against the catalog as it is now."""
        context = context or _ActionContext(self._store)
        rec = draft.record
        conditions = canonical_json({k: v.model_dump() for k, v in rec.conditions.items()})
        duplicate = context.by_key.get(
            (rec.content_hash, rec.observable.id, conditions, rec.source.lab)
        )
        magnitude = typical_magnitude(draft.arrays.value)
        extra = check_against_others(
            observable=rec.observable.id, unit=rec.observable.unit, relative=rec.observable.relative,
            conditions=conditions, content_hash=rec.content_hash, magnitude=magnitude,
            same_content=context.by_hash.get(rec.content_hash, []),
            others_level=context.level(rec.observable.id, rec.observable.unit),
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

    def _new_id(self, rec: DatasetRecord, context: _ActionContext) -> str:
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
    ) -> DatasetVersion:
        created = dt.datetime.now(dt.UTC)
        record_json = canonical_json(record.model_dump(mode="json"))
        sealed = record_hash(dataset_id, version, record_json)
        if arrays is not None:
            self._store.put_series(record.content_hash, arrays)
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

    def apply(self, plan: AddPlan, context: _ActionContext | None = None) -> AddResult:
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
        version = self._write_version(
            plan.dataset_id, 1, plan.record, kind="add", payload=payload, arrays=plan.draft.arrays
        )
        if context is not None:
            context._remember(version)
        return AddResult(
            id=plan.dataset_id,
            version=1,
            added=True,
            duplicate_of=None,
            origin=plan.draft.origin,
            warnings=tuple(w.message for w in plan.record.warnings),
        )

    def add_drafts(self, drafts: Iterable[Draft]) -> builtins.list[AddResult]:
        """Log many drafts as one action: one transaction, all or nothing."""
        with self._store.transaction():
            context = _ActionContext(self._store)
            results = []
            for draft in drafts:
                results.append(self.apply(self.plan_add(draft, context), context))
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

    def intake(
        self,
        folder: str | Path,
        *,
        quarantine: str | Path | None = None,
        progress: Callable[[int, int, str], None] | None = None,
    ) -> IntakeReport:
        """Log every data file of a folder; quarantine each bad one with its reason."""
        return intake_folder(self, folder, quarantine=quarantine, progress=progress)

    def import_petab(
        self, problem: str | Path, *, lab: str | None = None, time_unit: str = "s", unit: str = "1"
    ) -> builtins.list[AddResult]:
        """Log a PEtab problem's measurements, one dataset per observable/condition/datasetId."""
        drafts = read_petab_problem(
            problem, lab=lab, time_unit=time_unit, unit=unit, actor=self.actor
        )
        return self.add_drafts(drafts)

    # -- new versions ----------------------------------------------------------------------

    def new_version(
        self,
        dataset_id: str,
        *,
        kind: str,
        reason: str | None,
        update: dict[str, Any],
        payload: dict[str, Any] | None = None,
    ) -> DatasetVersion:
        """Write a new version of a dataset with some record fields replaced."""
        with self._store.transaction():
            current = self.show(dataset_id)
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
                arrays=None,
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

    # -- judgement (noise, trust, consistency; see curate.assess) ------------------------

    def estimate_noise(
        self, dataset_ids: builtins.list[str] | None = None, *, method: str = "auto"
    ) -> builtins.list[tuple[DatasetVersion, Any]]:
        """Estimate and store the noise of the named datasets (all current ones if None)."""
        ids = dataset_ids if dataset_ids is not None else [v.id for v in self.list()]
        return assess.estimate_noise(self, ids, method=method)

    def grade(self, dataset_id: str, grade: str, *, reason: str) -> DatasetVersion:
        """Record a person's trust grade with its reason (a new version)."""
        return assess.set_grade(self, dataset_id, grade, reason=reason)

    def grade_from_checklist(
        self,
        dataset_id: str,
        *,
        answers: dict[str, bool | None] | None = None,
        answers_file: str | Path | None = None,
        checklist_file: str | Path | None = None,
        accept: bool = False,
    ) -> tuple[Any, DatasetVersion | None]:
        """Suggest a grade from checklist answers (recorded as an event); grade if ``accept``."""
        return assess.grade_from_checklist(
            self,
            dataset_id,
            answers=answers,
            answers_file=answers_file,
            checklist_file=checklist_file,
            accept=accept,
        )

    def accept_suggestion(self, dataset_id: str) -> DatasetVersion:
        """Take the newest grade suggestion for a dataset as its grade."""
        return assess.accept_suggestion(self, dataset_id)

    def consistency(
        self,
        *,
        observable: str | None = None,
        tolerance: float = 0.01,
        at: float | None = None,
        alpha: float = 0.05,
        record: bool = True,
    ) -> assess.ConsistencyReport:
        """Compare datasets of one observable under matching conditions; record grade suggestions."""
        return assess.check_consistency(
            self, observable=observable, tolerance=tolerance, at=at, alpha=alpha, record=record
        )

    # -- weights, exports, folds (see curate.exporting) -----------------------------------

    def weighted_table(
        self, *, policy: str | Path | None = None, selection: Any = None
    ) -> pd.DataFrame:
        """Give the weighted long table of a selection as a DataFrame (no files written)."""
        from curate import exporting, weights

        table, _, _ = exporting.weighted_table(
            self, policy=weights.load_policy(policy), selection=selection
        )
        return table

    def weights(self, *, policy: str | Path | None = None, selection: Any = None) -> Any:
        """Give each dataset's share of the total weight, Kish n_eff and warnings."""
        from curate import exporting, weights

        _, summary, _ = exporting.weighted_table(
            self, policy=weights.load_policy(policy), selection=selection
        )
        return summary

    def export(self, fmt: str, outdir: str | Path, *, policy: str | Path | None = None, selection: Any = None,
               force: bool = False) -> Any:  # fmt: skip
        """Write an export (table, petab, datapackage, prov) with its README and manifest."""
        from curate import exporting, weights

        return exporting.export(
            self, fmt, outdir, policy=weights.load_policy(policy), selection=selection, force=force
        )

    def folds(self, by: str, outdir: str | Path, *, policy: str | Path | None = None, selection: Any = None,
              force: bool = False) -> Any:  # fmt: skip
        """Write holdout folds (one folder per fold) with a manifest."""
        from curate import exporting, weights

        return exporting.write_folds(
            self, by, outdir, policy=weights.load_policy(policy), selection=selection, force=force
        )

    def trace(self, outdir: str | Path) -> Any:
        """Tell whether the catalog still holds exactly the data an export used."""
        from curate import exporting

        return exporting.trace(self, outdir)

    def impact(self, dataset_id: str) -> Any:
        """List the exports that used a since-corrected or retired version of a dataset."""
        from curate import exporting

        return exporting.impact(self, dataset_id)

    # -- fits and sensitivity (see curate.analysis) ---------------------------------------

    def fit(self, model: str, params: str | Path, *, policy: str | Path | None = None, selection: Any = None,
            options: Any = None) -> Any:  # fmt: skip
        """Fit a Python model (module:function or file.py:function) to the weighted selection."""
        from curate import analysis, weights

        return analysis.run_fit(
            self,
            model,
            params,
            policy=weights.load_policy(policy),
            selection=selection,
            options=options,
        )

    def sensitivity(self, *, by: str = "dataset", model: str | None = None, params: str | Path | None = None,
                    fitter_cmd: str | None = None, method: str = "exact", policy: str | Path | None = None,
                    selection: Any = None, options: Any = None, workers: int = 1, dask: str | None = None,
                    threshold: float = 2.0, policies: Sequence[str | Path] | None = None,
                    timeout: float = 600.0, workdir: str | Path | None = None,
                    progress: Callable[[int, int], None] | None = None) -> Any:  # fmt: skip
        """Leave each group out in turn and refit; give shifts, Cook distances, jackknife SEs."""
        from curate import analysis, weights

        return analysis.run_sensitivity(
            self, by=by, model_ref=model, spec_path=params, fitter_cmd=fitter_cmd, method=method,
            policy=weights.load_policy(policy), selection=selection, options=options, workers=workers, dask=dask,
            threshold=threshold, alternative_policies=[weights.load_policy(p) for p in policies or []],
            timeout=timeout, workdir=workdir, progress=progress,
        )  # fmt: skip

    def backup(self, destination: str | Path, *, force: bool = False) -> VerifyReport:
        """Write a verified copy of the catalog to ``destination`` (while others may write)."""
        target = Path(destination)
        if target.exists() and not force:
            raise InputError(f"{target}: exists; choose a new file name or pass --force")
        if not target.parent.is_dir():
            raise InputError(f"{target.parent}: no such folder")
        partial = target.with_name(target.name + ".part")
        partial.unlink(missing_ok=True)
        try:
            self._store.backup_to(partial)
            with Catalog(partial, actor=self.actor) as copy:
                report = copy.verify()
            if not report.ok:
                raise IntegrityError(
                    f"{target}: the copy does not verify ({report.problems[0] if report.problems else report.sqlite}); nothing written"
                )
            os.replace(partial, target)
        finally:
            partial.unlink(missing_ok=True)
        return report

    def report(self, path: str | Path, *, policy: str | Path | None = None) -> str:
        """Write the self-contained HTML report of the catalog; give its sha256."""
        from curate import report_html

        return report_html.write_report(self, path, policy=policy)

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
    ) -> DatasetVersion:
        """Correct a dataset's metadata as a new version (the data never change)."""
        if not reason.strip():
            raise InputError("revise: a reason is required (--reason)")
        current = self.show(dataset_id).record
        update: dict[str, Any] = {}
        if label is not None:
            update["observable"] = current.observable.model_copy(update={"label": label})
        if conditions:
            merged = dict(current.conditions)
            for key, raw in conditions.items():
                if raw is None or raw == "":
                    merged.pop(key, None)
                else:
                    merged[key] = parse_condition(key, raw, origin=f"dataset {dataset_id}")
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
        return self.new_version(dataset_id, kind="revise", reason=reason, update=update)

    # -- reading ---------------------------------------------------------------------------

    def show(self, dataset_id: str, version: int | None = None) -> DatasetVersion:
        """Give one dataset version (the newest unless ``version`` is named)."""
        rows = self._store.versions_of(dataset_id)
        if not rows:
            raise NotFoundError(
                f"no dataset '{dataset_id}' in {self.path}; `curate list` shows the ids"
            )
        if version is None:
            return _version_from_row(rows[-1])
        for row in rows:
            if row.version == version:
                return _version_from_row(row)
        raise NotFoundError(
            f"dataset '{dataset_id}' has versions 1 to {rows[-1].version}, not {version}"
        )

    def versions(self, dataset_id: str) -> builtins.list[DatasetVersion]:
        """Give every version of a dataset, oldest first."""
        self.show(dataset_id)
        return [_version_from_row(r) for r in self._store.versions_of(dataset_id)]

    def arrays(self, dataset_id: str, version: int | None = None) -> SeriesArrays:
        """Give the measured arrays of a dataset version (canonical units)."""
        return self._store.series(self.show(dataset_id, version).record.content_hash)

    def points(self, dataset_id: str, version: int | None = None) -> pd.DataFrame:
        """Give a dataset version's points as a DataFrame (canonical units, time-sorted)."""
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
        if grade is not None and grade not in GRADES and grade != "none":
            raise InputError(
                f"unknown grade '{grade}'; expected one of {', '.join(GRADES)} or 'none'"
            )
        wanted = {
            k: parse_condition(k, v, origin="--condition").value
            for k, v in (conditions or {}).items()
        }
        found = []
        for row in self._store.latest_versions():
            if observable is not None and row.observable != observable:
                continue
            if lab is not None and row.lab != lab:
                continue
            if grade is not None and (row.grade or "none") != grade:
                continue
            if row.retired and not include_retired:
                continue
            version = _version_from_row(row)
            if any(
                _condition_matches(version.record.conditions.get(k), v) is False
                for k, v in wanted.items()
            ):
                continue
            found.append(version)
        return found

    def history(self, dataset_id: str) -> builtins.list[HistoryEntry]:
        """Give every change of a dataset, oldest first, with what changed and why."""
        self.show(dataset_id)
        entries = []
        for event in self._store.events(dataset_id):
            payload = event.payload
            entries.append(
                HistoryEntry(
                    seq=event.seq,
                    at=event.at,
                    actor=event.actor,
                    kind=event.kind,
                    version=event.version,
                    changes=tuple(payload.get("changes", ())),
                    reason=payload.get("reason"),
                )
            )
        return entries

    def events(self) -> builtins.list[dict[str, Any]]:
        """Give the whole event log as plain dicts, oldest first."""
        return [e.to_dict() for e in self._store.events()]

    # -- verification ----------------------------------------------------------------------

    def verify(self) -> VerifyReport:
        """Give the result of recomputing every content hash, record hash and the event chain."""
        store = self._store
        report = VerifyReport(sqlite=store.integrity_check())
        rows = store.all_versions()
        report.versions = len(rows)
        report.datasets = len({r.dataset_id for r in rows})
        sealed_by_version: dict[tuple[str, int], str] = {}
        checked: dict[tuple[str, str], bool] = {}
        for row in rows:
            name = f"dataset {row.dataset_id} version {row.version}"
            if record_hash(row.dataset_id, row.version, row.record_json) != row.record_hash:
                report.problems.append(
                    f"{name}: its metadata no longer match their record hash (edited in the file)"
                )
                continue
            try:
                record = DatasetRecord.model_validate_json(row.record_json)
            except Exception as err:
                report.problems.append(f"{name}: its record does not validate ({err})")
                continue
            if (
                record.content_hash != row.content_hash
                or record.observable.id != row.observable
                or record.source.lab != row.lab
                or bool(record.retired) != row.retired
                or (record.trust.grade if record.trust else None) != row.grade
            ):
                report.problems.append(
                    f"{name}: the searchable columns disagree with its record (edited in the file)"
                )
                continue
            key = (row.content_hash, record.observable.unit)
            if key not in checked:
                try:
                    arrays = store.series(row.content_hash)
                    checked[key] = (
                        content_hash(arrays, value_unit=record.observable.unit) == row.content_hash
                        and len(arrays) == record.n_points
                    )
                except Exception:
                    checked[key] = False
            if not checked[key]:
                report.problems.append(
                    f"{name}: its measured values no longer match content hash "
                    f"{row.content_hash[:12]} (a value was changed or removed)"
                )
            sealed_by_version[(row.dataset_id, row.version)] = row.record_hash
        report.series = len({k[0] for k in checked})
        events = store.events()
        report.events = len(events)
        problem = verify_chain(events)
        if problem is not None:
            report.problems.append(f"event log: {problem.message}")
        logged: dict[tuple[str, int], str] = {}
        for event in events:
            if event.dataset_id is not None and event.version is not None:
                logged[(event.dataset_id, event.version)] = str(event.payload.get("record_hash"))
        for version_key, sealed in sealed_by_version.items():
            if logged.get(version_key) != sealed:
                report.problems.append(
                    f"dataset {version_key[0]} version {version_key[1]}: no event in the log "
                    "records this version as written"
                )
        for logged_key in logged:
            if logged_key not in sealed_by_version and not any(
                p.startswith(f"dataset {logged_key[0]} version {logged_key[1]}:")
                for p in report.problems
            ):
                report.problems.append(
                    f"dataset {logged_key[0]} version {logged_key[1]}: logged as written "
                    "but missing from the file (deleted?)"
                )
        return report


def _condition_matches(stored: Any, wanted: Any) -> bool:
    if stored is None:
        return False
    value = stored.value
    if isinstance(value, float) and isinstance(wanted, float):
        return bool(np.isclose(value, wanted, rtol=1e-9, atol=0.0))
    return bool(value == wanted) or str(value) == str(wanted)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return str(value)


def to_json(value: Any) -> str:
    """Give indented JSON of plain data (numpy scalars allowed)."""
    return json.dumps(value, indent=2, default=_json_default, ensure_ascii=False)
