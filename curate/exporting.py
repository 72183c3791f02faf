"""Selections, the weighted long table, exports, holdout folds, trace and impact: API glue.

Reads the catalog, calls the pure :mod:`curate.weights` and :mod:`curate.folds`, hands frames
to the writers in :mod:`curate.export`, and records each export as an event so that
``impact`` can later name the exports a corrected dataset touched.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from curate import __version__, folds, noise, weights
from curate.assess import measured_sd
from curate.errors import InputError, NotFoundError
from curate.export import common
from curate.records import DatasetVersion, canonical_json

if TYPE_CHECKING:
    from curate.catalog import Catalog

__all__ = [
    "FORMATS",
    "ExportResult",
    "FoldSet",
    "ImpactEntry",
    "Selection",
    "TraceReport",
    "export",
    "impact",
    "record_run",
    "select",
    "trace",
    "weighted_table",
    "write_folds",
]

FORMATS = ("table", "petab", "datapackage", "prov")
_STANDARD_COLUMNS = (
    "dataset_id", "version", "observable", "unit", "unit_ucum", "relative", "lab", "grade",
    "grade_used", "time", "value", "sd", "sd_source", "inflation", "balance", "sigma", "weight",
    "replicate", "calibration_group",
)  # fmt: skip


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


def select(catalog: Catalog, selection: Selection, policy: weights.Policy) -> list[DatasetVersion]:
    """Give the dataset versions a selection names: current, not retired, not excluded by default."""
    pinned = dict(selection.versions)
    chosen: list[DatasetVersion] = []
    wanted_conditions = dict(selection.conditions)
    candidates = catalog.list(
        include_retired=selection.include_retired or bool(pinned), conditions=wanted_conditions
    )
    for ident in (*selection.ids, *pinned):
        catalog.show(ident)  # NotFoundError names an unknown id
    for version in candidates:
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
        grade = version.grade or policy.ungraded
        if (
            selection.grades
            and (version.grade or "none") not in selection.grades
            and grade not in selection.grades
        ):
            continue
        if grade in policy.exclude:
            continue
        chosen.append(version)
    if not chosen:
        raise InputError(
            "the selection matches no dataset that the policy lets into a fit: "
            + canonical_json(selection.to_dict())
        )
    return chosen


def _condition_column(key: str) -> str:
    return f"condition_{key}" if key in _STANDARD_COLUMNS else key


def _sd_of(
    catalog: Catalog, version: DatasetVersion, arrays: Any, policy: weights.Policy
) -> tuple[np.ndarray, str]:
    """Give each point's measured SD and where it came from, the policy deciding when unknown."""
    record = version.record
    try:
        sd = measured_sd(version, arrays)
        if record.uncertainty is not None and arrays.sd is not None:
            return sd, "reported"
        return sd, f"noise estimate ({record.noise.method if record.noise else '?'})"
    except InputError:
        if policy.unknown_noise == "refuse":
            raise InputError(
                f"dataset {version.id}: no uncertainty is known and the policy refuses to guess; run `curate noise {version.id}`"
            ) from None
        if policy.unknown_noise == "default":
            return policy.default_relative_sd * np.abs(
                arrays.value
            ), f"policy default ({policy.default_relative_sd:g} of |y|)"
        result = noise.choose_and_estimate(
            arrays.time, arrays.value, replicate=arrays.replicate, origin=f"dataset {version.id}"
        )
        return np.full(len(arrays), result.sd), f"estimated at export ({result.method})"


def points_table(
    catalog: Catalog, versions: list[DatasetVersion], policy: weights.Policy
) -> pd.DataFrame:
    """Give one row per point of the versions (before weighting), built column-wise in one go."""
    per_point: dict[str, list[np.ndarray]] = {"time": [], "value": [], "sd": [], "replicate": []}
    per_dataset: dict[str, list[Any]] = {name: [] for name in (
        "dataset_id", "version", "observable", "unit", "unit_ucum", "relative", "lab", "grade", "sd_source", "calibration_group")}  # fmt: skip
    conditions: dict[str, list[Any]] = {}
    lengths = []
    stored = catalog.store.series_many([v.record.content_hash for v in versions])
    for position, version in enumerate(versions):
        record = version.record
        arrays = stored[record.content_hash]
        sd, source = _sd_of(catalog, version, arrays, policy)
        labels = np.array(record.replicate_labels, dtype=object)
        per_point["time"].append(arrays.time)
        per_point["value"].append(arrays.value)
        per_point["sd"].append(np.asarray(sd, dtype=float))
        per_point["replicate"].append(labels[arrays.replicate] if (arrays.replicate is not None and len(labels))
                                      else np.full(len(arrays), None, dtype=object))  # fmt: skip
        for name, value in (("dataset_id", version.id), ("version", version.version), ("observable", record.observable.id),
                            ("unit", record.observable.unit), ("unit_ucum", record.observable.ucum or ""),
                            ("relative", record.observable.relative), ("lab", record.source.lab), ("grade", version.grade),
                            ("sd_source", source), ("calibration_group", record.protocol.calibration_group or version.id)):  # fmt: skip
            per_dataset[name].append(value)
        for key, condition in record.conditions.items():
            conditions.setdefault(_condition_column(key), [None] * position).append(condition.value)
        for values in conditions.values():
            if len(values) == position:
                values.append(None)
        lengths.append(len(arrays))
    counts = np.asarray(lengths)
    columns: dict[str, Any] = {}
    for name in (
        "dataset_id",
        "version",
        "observable",
        "unit",
        "unit_ucum",
        "relative",
        "lab",
        "grade",
    ):
        columns[name] = np.repeat(
            np.asarray(per_dataset[name], dtype=object if name != "version" else np.int64), counts
        )
    columns["relative"] = columns["relative"].astype(bool)
    for name in ("time", "value", "sd"):
        columns[name] = np.concatenate(per_point[name])
    columns["sd_source"] = np.repeat(np.asarray(per_dataset["sd_source"], dtype=object), counts)
    columns["replicate"] = np.concatenate(per_point["replicate"])
    columns["calibration_group"] = np.repeat(
        np.asarray(per_dataset["calibration_group"], dtype=object), counts
    )
    for column, values in conditions.items():
        kinds = {type(v) for v in values if v is not None}
        if kinds == {float}:
            data = np.array([np.nan if v is None else v for v in values], dtype=float)
        elif len(kinds) > 1:  # a key numeric in one dataset, text in another: keep it as text
            data = np.array([None if v is None else str(v) for v in values], dtype=object)
        else:
            data = np.array(values, dtype=object)
        columns[column] = np.repeat(data, counts)
    for name in (
        "dataset_id",
        "observable",
        "unit",
        "unit_ucum",
        "lab",
        "sd_source",
        "calibration_group",
    ):
        # repeated labels as categories: a fraction of the memory, dictionary-encoded in Parquet
        columns[name] = pd.Categorical(
            np.repeat(np.asarray(per_dataset[name], dtype=object), counts).astype(str)
        )
    return pd.DataFrame(columns)


def weighted_table(catalog: Catalog, *, policy: weights.Policy | None = None,
                   selection: Selection | None = None) -> tuple[pd.DataFrame, weights.WeightSummary, list[DatasetVersion]]:  # fmt: skip
    """Give the weighted long table (one row per point), the weight summary and the versions used."""
    policy = policy or weights.load_policy()
    versions = select(catalog, selection or Selection(), policy)
    points = points_table(catalog, versions, policy)
    weighted, summary = weights.apply_policy(points, policy)
    condition_columns = [c for c in weighted.columns if c not in _STANDARD_COLUMNS]
    ordered = [c for c in _STANDARD_COLUMNS if c in weighted.columns] + sorted(condition_columns)
    return weighted[ordered], summary, versions


@dataclass
class ExportResult:
    """What an export wrote."""

    format: str
    outdir: Path
    files: dict[str, str]
    manifest: dict[str, Any]
    summary: weights.WeightSummary

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {"format": self.format, "outdir": str(self.outdir), "files": self.files,
                "manifest_sha256": self.manifest["manifest_sha256"], "weights": self.summary.to_dict()}  # fmt: skip


def _dataset_facts(versions: list[DatasetVersion]) -> dict[str, dict[str, Any]]:
    from curate.report import condition_text

    facts = {}
    for version in versions:
        record = version.record
        facts[version.id] = {
            "conditions": {k: c.value for k, c in record.conditions.items()},
            "conditions_text": ", ".join(
                f"{k}={condition_text(c)}" for k, c in record.conditions.items()
            ),
            "label": record.observable.label,
            "relative": record.observable.relative,
            "calibration_group": record.protocol.calibration_group,
            "petab": record.annotations.get("petab"),
            "petab_rows": record.annotations.get("petab_rows"),
        }
    return facts


def _manifest(catalog: Catalog, fmt: str, policy: weights.Policy, selection: Selection, versions: list[DatasetVersion],
              files: dict[str, str], extra: dict[str, Any] | None = None) -> dict[str, Any]:  # fmt: skip
    seq, head = catalog.store.head()
    manifest = {
        "tool": "curate",
        "tool_version": __version__,
        "format": fmt,
        "created_at": common.now_utc(),
        "catalog_id": catalog.catalog_id,
        "catalog_path": str(Path(catalog.path).resolve())
        if catalog.path != ":memory:"
        else ":memory:",
        "event_chain_head": {"seq": seq, "hash": head},
        "policy": {
            "name": policy.name,
            "sha256": policy.sha256,
            "origin": policy.origin,
            "settings": policy.to_dict(),
        },
        "selection": selection.to_dict(),
        "datasets": [
            {
                "id": v.id,
                "version": v.version,
                "content_hash": v.record.content_hash,
                "record_hash": v.record_hash,
            }
            for v in versions
        ],
        "files": dict(sorted(files.items())),
        **(extra or {}),
    }
    return common.seal_manifest(manifest)


def _readme(catalog: Catalog, policy: weights.Policy, outdir: Path) -> str:
    likelihood = ("No balancing: the weighted sum of squares is a Gaussian likelihood in which the grades inflate each dataset's variance."
                  if policy.is_likelihood else
                  "Balancing or a lab cap is on: the weighted sum of squares is NOT a likelihood; chi2 and standard errors lose their usual meaning.")  # fmt: skip
    return common.FITTER_README.format(
        version=__version__, date=common.now_utc(), catalog_id=catalog.catalog_id, policy_name=policy.name,
        policy_sha256=policy.sha256, likelihood=likelihood, outdir_name=outdir.name,
    )  # fmt: skip


def _version_facts(catalog: Catalog, versions: list[DatasetVersion]) -> list[dict[str, Any]]:
    events = {
        (e["dataset_id"], e["version"]): e for e in catalog.events() if e["version"] is not None
    }
    return [
        {
            "id": v.id, "version": v.version, "content_hash": v.record.content_hash, "record_hash": v.record_hash,
            "lab": v.record.source.lab, "created_at": v.created_at.isoformat(),
            "actor": events.get((v.id, v.version), {}).get("actor", "unknown"),
            "raw_file_name": v.record.source.raw_file_name, "raw_file_sha256": v.record.source.raw_file_sha256,
            "grade": v.grade, "observable": v.record.observable.id,
        }
        for v in versions
    ]  # fmt: skip


def export(catalog: Catalog, fmt: str, outdir: str | Path, *, policy: weights.Policy | None = None,
           selection: Selection | None = None, force: bool = False) -> ExportResult:  # fmt: skip
    """Write one export format (table, petab, datapackage or prov) with README and manifest."""
    if fmt not in FORMATS:
        raise InputError(f"unknown export format '{fmt}'; expected one of {', '.join(FORMATS)}")
    from curate import export as writers

    policy = policy or weights.load_policy()
    selection = selection or Selection()
    folder = Path(outdir)
    table, summary, versions = weighted_table(catalog, policy=policy, selection=selection)
    common.prepare_folder(folder, force=force)
    files: dict[str, str] = {}
    if fmt == "table":
        files.update(writers.write_table(table, folder))
    elif fmt == "petab":
        files.update(writers.write_petab(table, _dataset_facts(versions), folder))
    elif fmt == "datapackage":
        datasets = pd.DataFrame([
            {"dataset_id": v.id, "version": v.version, "observable": v.record.observable.id, "unit": v.record.observable.unit,
             "unit_ucum": v.record.observable.ucum or "", "relative": v.record.observable.relative, "lab": v.record.source.lab,
             "grade": v.grade or "", "content_hash": v.record.content_hash}
            for v in versions
        ])  # fmt: skip
        condition_units = {}
        for v in versions:
            for key, c in v.record.conditions.items():
                if c.unit:
                    condition_units[_condition_column(key)] = _ucum_or_none(c.unit)
        files.update(
            writers.write_datapackage(
                table, datasets, folder, name="curate-export", condition_units=condition_units
            )
        )
    files["README.txt"] = common.write_text(folder / "README.txt", _readme(catalog, policy, folder))
    if fmt == "prov":
        draft = _manifest(catalog, fmt, policy, selection, versions, files)
        files.update(
            writers.write_prov(
                draft, _version_facts(catalog, versions), folder, tool_version=__version__
            )
        )
    manifest = _manifest(
        catalog, fmt, policy, selection, versions, files, {"weights": summary.to_dict()}
    )
    record_run(catalog, "export", policy, versions, manifest, folder=folder)
    return ExportResult(format=fmt, outdir=folder, files=files, manifest=manifest, summary=summary)


def record_run(catalog: Catalog, kind: str, policy: weights.Policy, versions: list[DatasetVersion],
               manifest: dict[str, Any], *, folder: Path | None = None, extra: dict[str, Any] | None = None) -> None:  # fmt: skip
    """Store the policy, write the manifest (if a folder is given) and append the run's event,
    in one transaction: what ``trace`` and ``impact`` later read."""
    with catalog.store.transaction():
        catalog.store.put_policy(policy.sha256, policy.name, policy.origin, policy.text)
        if folder is not None:
            common.write_text(
                folder / common.MANIFEST, json.dumps(manifest, indent=2, sort_keys=True) + "\n"
            )
        catalog.record_event(kind, {
            "format": manifest["format"], "outdir": str(folder.resolve()) if folder is not None else "",
            "manifest_sha256": manifest["manifest_sha256"], "policy_sha256": policy.sha256,
            "datasets": [[v.id, v.version] for v in versions], **(extra or {}),
        })  # fmt: skip


def _ucum_or_none(unit: str) -> str | None:
    from curate.units import ucum_code

    return ucum_code(unit)


@dataclass
class FoldSet:
    """The holdout folds written to a folder."""

    by: str
    outdir: Path
    folds: list[dict[str, Any]]
    manifest: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """Give the fold set as plain data."""
        return {
            "by": self.by,
            "outdir": str(self.outdir),
            "folds": self.folds,
            "manifest_sha256": self.manifest["manifest_sha256"],
        }


def fold_groups(table: pd.DataFrame, by: str) -> tuple[np.ndarray, Any]:
    """Give (group label per row, splitter) for ``dataset``, ``lab``, ``condition:KEY`` or ``kfold:K[:SEED]``."""
    if by == "dataset":
        return table["dataset_id"].to_numpy(), folds.LeaveOneGroupOut()
    if by == "lab":
        return table["lab"].to_numpy(), folds.LeaveOneGroupOut()
    if by.startswith("condition:"):
        key = by.split(":", 1)[1]
        column = _condition_column(key)
        if column not in table.columns:
            raise InputError(f"--by {by}: no dataset in the selection has condition '{key}'")
        labels = table[column].map(
            lambda v: (
                "(none)"
                if v is None or (isinstance(v, float) and np.isnan(v))
                else f"{v:g}"
                if isinstance(v, float)
                else str(v)
            )
        )
        return labels.to_numpy(), folds.LeaveOneGroupOut()
    if by.startswith("kfold:"):
        parts = by.split(":")
        try:
            k = int(parts[1])
            seed = int(parts[2]) if len(parts) > 2 else 0
        except (ValueError, IndexError):
            raise InputError(
                f"--by {by}: expected kfold:K or kfold:K:SEED with whole numbers"
            ) from None
        return table["dataset_id"].to_numpy(), folds.GroupKFold(n_splits=k, seed=seed)
    raise InputError(f"--by {by}: expected dataset, lab, condition:KEY or kfold:K")


def write_folds(catalog: Catalog, by: str, outdir: str | Path, *, policy: weights.Policy | None = None,
                selection: Selection | None = None, force: bool = False) -> FoldSet:  # fmt: skip
    """Write one folder per fold (train and test tables, fold.json) and a manifest."""
    from curate import export as writers

    policy = policy or weights.load_policy()
    selection = selection or Selection()
    folder = Path(outdir)
    table, _, versions = weighted_table(catalog, policy=policy, selection=selection)
    groups, splitter = fold_groups(table, by)
    condition_columns = [c for c in table.columns if c not in _STANDARD_COLUMNS]
    splits = list(splitter.split(table, groups=groups))
    common.prepare_folder(folder, force=force)
    files: dict[str, str] = {}
    described = []
    width = max(2, len(str(len(splits))))
    for number, (train, test) in enumerate(splits, start=1):
        name = f"fold_{number:0{width}d}"
        train_frame, test_frame = table.iloc[train], table.iloc[test]
        gaps = folds.training_gaps(train_frame, test_frame, condition_columns=condition_columns)
        fold_files = {
            f"{name}/{k}": v
            for k, v in writers.write_table(train_frame, folder / name, "train").items()
        }
        fold_files.update(
            {
                f"{name}/{k}": v
                for k, v in writers.write_table(test_frame, folder / name, "test").items()
            }
        )
        info = {
            "fold": number,
            "name": name,
            "held_out_groups": sorted({str(g) for g in groups[test]}),
            "held_out_datasets": sorted(set(test_frame["dataset_id"])),
            "train_points": len(train),
            "test_points": len(test),
            "training_lacks": [g.text() for g in gaps],
        }
        fold_files[f"{name}/fold.json"] = common.write_text(
            folder / name / "fold.json", json.dumps(info, indent=2) + "\n"
        )
        files.update(fold_files)
        described.append(info)
    files["README.txt"] = common.write_text(folder / "README.txt", _readme(catalog, policy, folder))
    manifest = _manifest(
        catalog, f"folds:{by}", policy, selection, versions, files, {"folds": described}
    )
    record_run(catalog, "export", policy, versions, manifest, folder=folder)
    return FoldSet(by=by, outdir=folder, folds=described, manifest=manifest)


@dataclass
class TraceReport:
    """Whether the catalog still holds exactly the data an export used."""

    outdir: str
    format: str
    created_at: str
    same: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    files_changed: list[str] = field(default_factory=list)

    @property
    def intact(self) -> bool:
        """Tell whether every dataset version and file is exactly as exported."""
        return not self.changed and not self.files_changed

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {"outdir": self.outdir, "format": self.format, "created_at": self.created_at, "intact": self.intact,
                "same": self.same, "changed": self.changed, "files_changed": self.files_changed}  # fmt: skip


def trace(catalog: Catalog, outdir: str | Path) -> TraceReport:
    """Re-read an export's manifest and compare every dataset version and file with the catalog."""
    folder = Path(outdir)
    manifest = common.read_manifest(folder)
    if manifest["catalog_id"] != catalog.catalog_id:
        raise InputError(
            f"{folder}: exported from catalog {manifest['catalog_id']}, not from {catalog.path} ({catalog.catalog_id}); open the right one with --catalog"
        )
    report = TraceReport(
        outdir=str(folder), format=manifest["format"], created_at=manifest["created_at"]
    )
    base = folder if folder.is_dir() else folder.parent
    for name, digest in manifest["files"].items():
        path = base / name
        if not path.is_file():
            report.files_changed.append(f"{name}: missing")
        elif common.sha256_file(path) != digest:
            report.files_changed.append(f"{name}: edited since the export")
    for entry in manifest["datasets"]:
        ident, number = entry["id"], entry["version"]
        try:
            then = catalog.show(ident, number)
        except NotFoundError:
            report.changed.append(f"{ident} version {number}: no longer in the catalog")
            continue
        if (
            then.record.content_hash != entry["content_hash"]
            or then.record_hash != entry["record_hash"]
        ):
            report.changed.append(
                f"{ident} version {number}: stored data differ from the export (run `curate verify`)"
            )
            continue
        later = [v for v in catalog.versions(ident) if v.version > number]
        if not later:
            report.same.append(f"{ident} version {number}")
            continue
        kinds = [
            h.kind for h in catalog.history(ident) if h.version is not None and h.version > number
        ]
        current = later[-1]
        what = "retired" if current.record.retired else f"now version {current.version}"
        report.changed.append(
            f"{ident} version {number}: {what} ({', '.join(kinds)} since the export)"
        )
    return report


@dataclass(frozen=True)
class ImpactEntry:
    """An export that used a version of a dataset that has since changed."""

    seq: int
    at: str
    format: str
    outdir: str
    used_version: int
    current_version: int
    retired: bool
    changes: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """Give the entry as plain data."""
        return {"event": self.seq, "at": self.at, "format": self.format, "outdir": self.outdir,
                "used_version": self.used_version, "current_version": self.current_version,
                "retired": self.retired, "changes": list(self.changes)}  # fmt: skip


def impact(catalog: Catalog, dataset_id: str) -> list[ImpactEntry]:
    """Give every export, fold set, fit and sensitivity run that used a since-corrected or retired
    version of a dataset."""
    current = catalog.show(dataset_id)
    history = catalog.history(dataset_id)
    found = []
    for event in catalog.events():
        if event["kind"] not in ("export", "fit", "sensitivity"):
            continue
        used = [v for ident, v in event["payload"]["datasets"] if ident == dataset_id]
        if not used or used[0] >= current.version:
            continue
        kinds = tuple(h.kind for h in history if h.version is not None and h.version > used[0])
        found.append(ImpactEntry(
            seq=event["seq"], at=event["at"], format=event["payload"]["format"], outdir=event["payload"]["outdir"],
            used_version=used[0], current_version=current.version, retired=current.record.retired, changes=kinds,
        ))  # fmt: skip
    return found
