"""Does an export still match the catalog (``trace``), and which runs did a correction touch (``impact``).

An export's manifest records the event-chain head it was made at; ``trace`` also tells a
catalog that no longer extends that head (cut back, or replaced by an older copy), and
:func:`recorded_head` gives that head (or a backup's) to ``verify --against``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from curate.errors import InputError, NotFoundError
from curate.export.files import sha256_file
from curate.export.manifest import MANIFEST, read_manifest
from curate.ledger import Ledger
from curate.ledger.backup import backup_head, is_catalog_file
from curate.ledger.provenance import ChainHead

__all__ = ["ImpactEntry", "TraceReport", "impact", "recorded_head", "trace"]


@dataclass
class TraceReport:
    """Whether the catalog still holds exactly the data an export used."""

    outdir: str
    format: str
    created_at: str
    same: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    files_changed: list[str] = field(default_factory=list)
    # the catalog went back behind the export: it no longer extends the head the export recorded
    chain_changed: list[str] = field(default_factory=list)

    @property
    def intact(self) -> bool:
        """Tell whether every dataset version and file is exactly as exported, and the catalog
        still extends the chain head the export recorded."""
        return not self.changed and not self.files_changed and not self.chain_changed

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {"outdir": self.outdir, "format": self.format, "created_at": self.created_at, "intact": self.intact,
                "same": self.same, "changed": self.changed, "files_changed": self.files_changed,
                "chain_changed": self.chain_changed}  # fmt: skip


def _manifest_head(manifest: dict[str, Any], path: Path, source: str) -> ChainHead:
    recorded: Any = manifest.get("event_chain_head")
    try:
        return ChainHead(int(recorded["seq"]), str(recorded["hash"]), source=source)
    except (TypeError, KeyError, ValueError):
        raise InputError(f"{path}: the manifest records no event-chain head") from None


def _same_catalog(catalog: Ledger, path: Path, catalog_id: str, what: str) -> None:
    if catalog_id != catalog.catalog_id:
        raise InputError(
            f"{path}: {what} {catalog_id}, not {catalog.path} ({catalog.catalog_id}); open the right one with --catalog"
        )


def recorded_head(catalog: Ledger, source: str | Path) -> ChainHead:
    """Give the chain head an export (its folder or manifest.json) or a backup file recorded.

    The export or backup must come from this catalog (InputError otherwise).
    """
    path = Path(source)
    if not path.exists():
        raise InputError(f"{path}: no such export folder, manifest or backup file")
    if is_catalog_file(path):
        catalog_id, head = backup_head(path)
        _same_catalog(catalog, path, catalog_id, "a backup of catalog")
        return head
    manifest = read_manifest(path)
    _same_catalog(catalog, path, manifest["catalog_id"], "exported from catalog")
    where = path / MANIFEST if path.is_dir() else path
    return _manifest_head(manifest, where, f"export manifest {where}")


def trace(catalog: Ledger, outdir: str | Path) -> TraceReport:
    """Re-read an export's manifest and compare every dataset version and file with the catalog."""
    folder = Path(outdir)
    manifest = read_manifest(folder)
    _same_catalog(catalog, folder, manifest["catalog_id"], "exported from catalog")
    report = TraceReport(
        outdir=str(folder), format=manifest["format"], created_at=manifest["created_at"]
    )
    head = _manifest_head(manifest, folder, "this export")
    behind = catalog.head_problem(head)
    if behind is not None:
        report.chain_changed.append(behind)
    elif not any(
        e["payload"].get("manifest_sha256") == manifest["manifest_sha256"] for e in catalog.events()
    ):
        report.chain_changed.append(
            "the catalog holds no event of this export (cut off, or an older copy was put back)"
        )
    base = folder if folder.is_dir() else folder.parent
    for name, digest in manifest["files"].items():
        path = base / name
        if not path.is_file():
            report.files_changed.append(f"{name}: missing")
        elif sha256_file(path) != digest:
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
        if current.record.superseded_by is not None:
            what = f"superseded by {current.record.superseded_by}"
        report.changed.append(
            f"{ident} version {number}: {what} ({', '.join(kinds)} since the export)"
        )
    return report


@dataclass(frozen=True)
class ImpactEntry:
    """An export, fold set, fit or sensitivity run that used a since-changed dataset version."""

    seq: int
    at: str
    format: str
    outdir: str  # "" for fits and sensitivity runs: they write no folder
    used_version: int
    current_version: int
    retired: bool
    changes: tuple[str, ...]
    kind: str = "export"  # export, folds (a fold set), fit or sensitivity
    # the run used an older dataset this one supersedes (None: it used this dataset itself)
    superseded: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Give the entry as plain data."""
        return {"event": self.seq, "at": self.at, "kind": self.kind, "format": self.format, "outdir": self.outdir,
                "used_version": self.used_version, "current_version": self.current_version,
                "retired": self.retired, "changes": list(self.changes), "superseded": self.superseded}  # fmt: skip


def _run_kind(event_kind: str, fmt: str) -> str:
    if event_kind == "export" and fmt.startswith("folds"):
        return "folds"
    return event_kind


def _predecessors(catalog: Ledger, dataset_id: str) -> list[str]:
    """Give the datasets ``dataset_id`` supersedes, directly or through others, newest first."""
    chain: list[str] = []
    older = catalog.show(dataset_id).record.supersedes
    while older is not None and older not in chain and older != dataset_id:
        chain.append(older)
        older = catalog.show(older).record.supersedes
    return chain


def impact(catalog: Ledger, dataset_id: str) -> list[ImpactEntry]:
    """Give every export, fold set, fit and sensitivity run that used a since-corrected or retired
    version of a dataset, or any version of a dataset it supersedes."""
    current = catalog.show(dataset_id)
    history = catalog.history(dataset_id)
    older = _predecessors(catalog, dataset_id)
    found = []
    for event in catalog.events():
        if event["kind"] not in ("export", "fit", "sensitivity", "profile", "ensemble"):
            continue
        replaced = [(ident, v) for ident, v in event["payload"]["datasets"] if ident in older]
        if replaced and not any(i == dataset_id for i, _ in event["payload"]["datasets"]):
            ident, number = replaced[0]
            fmt = event["payload"]["format"]
            found.append(ImpactEntry(
                seq=event["seq"], at=event["at"], format=fmt, outdir=event["payload"]["outdir"],
                used_version=number, current_version=current.version, retired=current.record.retired,
                changes=(f"superseded by {dataset_id}",), kind=_run_kind(event["kind"], fmt), superseded=ident,
            ))  # fmt: skip
            continue
        used = [v for ident, v in event["payload"]["datasets"] if ident == dataset_id]
        if not used or used[0] >= current.version:
            continue
        kinds = tuple(h.kind for h in history if h.version is not None and h.version > used[0])
        fmt = event["payload"]["format"]
        found.append(ImpactEntry(
            seq=event["seq"], at=event["at"], format=fmt, outdir=event["payload"]["outdir"],
            used_version=used[0], current_version=current.version, retired=current.record.retired, changes=kinds,
            kind=_run_kind(event["kind"], fmt),
        ))  # fmt: skip
    return found
