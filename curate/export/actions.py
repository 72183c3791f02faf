"""Exports and fold sets of a weighted selection: write the files, the README and the manifest.

Each run builds the weighted table once, hands it to a writer from
:data:`curate.export.formats.FORMATS` (or splits it into holdout folds), and records the run
as an event so that ``trace`` and ``impact`` can later tell what it used.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.export.files import prepare_folder, write_json, write_text
from curate.export.formats import FORMATS, PREPARE, STREAMED, ExportInput, Prepared
from curate.export.manifest import (
    build_manifest,
    censoring_readme,
    censoring_text,
    readme_text,
    record_run,
)
from curate.export.table import write_table
from curate.ledger import Ledger
from curate.weighting import Policy, Selection, WeightedTable, WeightSummary, weighted_table
from curate.weighting.groupings import fold_groups
from curate.weighting.splitters import training_gaps
from curate.weighting.stream import WeightedStream, weighted_stream
from curate.weighting.table import STANDARD_COLUMNS

__all__ = ["ExportResult", "FoldSet", "export", "write_folds"]


@dataclass
class ExportResult:
    """What an export wrote."""

    format: str
    outdir: Path
    files: dict[str, str]
    manifest: dict[str, Any]
    summary: WeightSummary

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {"format": self.format, "outdir": str(self.outdir), "files": self.files,
                "manifest_sha256": self.manifest["manifest_sha256"], "weights": self.summary.to_dict()}  # fmt: skip


def export(catalog: Ledger, fmt: str, outdir: str | Path, *, policy: Policy, selection: Selection,
           force: bool = False) -> ExportResult:  # fmt: skip
    """Write one export format (see ``FORMATS``) with README and manifest."""
    writer = FORMATS.get(fmt)
    if writer is None:
        raise InputError(f"unknown export format '{fmt}'; expected one of {', '.join(FORMATS)}")
    folder = Path(outdir)
    weighted: WeightedTable | WeightedStream
    if fmt in STREAMED:  # the table never held whole: record batches into the writers
        weighted = weighted_stream(catalog, policy, selection)
        censoring = censoring_text(
            weighted.censored_counts["below"], weighted.censored_counts["above"], fmt
        )
        prepared = Prepared()
    else:
        weighted = weighted_table(catalog, policy, selection)
        censoring = censoring_readme(weighted.table, fmt)
        prepared = PREPARE[fmt](catalog, weighted) if fmt in PREPARE else Prepared()
    prepare_folder(folder, force=force)
    text = (
        readme_text(catalog, policy, folder)
        + censoring
        + prepared.readme
        + _masked_text(weighted, fmt)
    )
    readme = {"README.txt": write_text(folder / "README.txt", text)}
    written = writer(ExportInput(catalog, weighted, fmt, dict(readme), prepared), folder)
    files = {**written, **readme, **_write_masked(weighted, fmt, folder)}
    manifest = build_manifest(catalog, fmt, policy, selection, weighted.versions, files,
                              {"weights": weighted.summary.to_dict(), **prepared.manifest})  # fmt: skip
    record_run(catalog, "export", policy, weighted.versions, manifest, folder=folder)
    return ExportResult(fmt, folder, files, manifest, weighted.summary)


def _masked_name(fmt: str) -> str:
    return "masked_points.tsv" if fmt == "petab" else "masked_points.csv"


def _masked_text(weighted: WeightedTable | WeightedStream, fmt: str) -> str:
    """Give the README paragraph on points set aside by masks (empty when there are none)."""
    aside = weighted.aside.points
    if aside.empty:
        return ""
    datasets = aside["dataset_id"].nunique()
    return (
        f"\nMasked points: {len(aside)} point(s) of {datasets} dataset(s) were set aside by masks "
        f"(`curate mask`) and are not in the fitted table{' or the PEtab measurement table' if fmt == 'petab' else ''}; "
        f"{_masked_name(fmt)} lists them with masked = true and the reason (time in seconds, "
        "value and sd in the dataset's canonical unit). Do not fit them.\n"
    )


def _write_masked(
    weighted: WeightedTable | WeightedStream, fmt: str, folder: Path
) -> dict[str, str]:
    """Write the masked points beside the export (the annotation a fitter can read)."""
    aside = weighted.aside.points
    if aside.empty:
        return {}
    name = _masked_name(fmt)
    text = aside.to_csv(index=False, sep="\t" if fmt == "petab" else ",", lineterminator="\n")
    return {name: write_text(folder / name, text)}


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


def write_folds(catalog: Ledger, by: str, outdir: str | Path, *, policy: Policy, selection: Selection,
                force: bool = False) -> FoldSet:  # fmt: skip
    """Write one folder per fold (train and test tables, fold.json) and a manifest."""
    folder = Path(outdir)
    weighted = weighted_table(catalog, policy, selection)
    table = weighted.table
    groups, splitter = fold_groups(table, by)
    condition_columns = [c for c in table.columns if c not in STANDARD_COLUMNS]
    splits = list(splitter.split(table, groups=groups))
    prepare_folder(folder, force=force)
    files: dict[str, str] = {}
    described = []
    width = max(2, len(str(len(splits))))
    for number, (train, test) in enumerate(splits, start=1):
        name = f"fold_{number:0{width}d}"
        train_frame, test_frame = table.iloc[train], table.iloc[test]
        gaps = training_gaps(train_frame, test_frame, condition_columns=condition_columns)
        for side, frame in (("train", train_frame), ("test", test_frame)):
            for file, digest in write_table(frame, folder / name, side).items():
                files[f"{name}/{file}"] = digest
        info = {
            "fold": number,
            "name": name,
            "held_out_groups": sorted({str(g) for g in groups[test]}),
            "held_out_datasets": sorted(set(test_frame["dataset_id"])),
            "train_points": len(train),
            "test_points": len(test),
            "training_lacks": [g.text() for g in gaps],
        }
        files[f"{name}/fold.json"] = write_json(folder / name / "fold.json", info)
        described.append(info)
    files["README.txt"] = write_text(folder / "README.txt", readme_text(catalog, policy, folder))
    manifest = build_manifest(
        catalog, f"folds:{by}", policy, selection, weighted.versions, files, {"folds": described}
    )
    record_run(catalog, "export", policy, weighted.versions, manifest, folder=folder)
    return FoldSet(by=by, outdir=folder, folds=described, manifest=manifest)
