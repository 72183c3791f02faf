"""The whole job, so far, on the bundled invented scenario (``curate demo``)."""

from __future__ import annotations

import shutil
from dataclasses import dataclass, field
from pathlib import Path

from curate.assess import ConsistencyReport
from curate.catalog import Catalog, VerifyReport
from curate.errors import InputError
from curate.ingest.inbox import IntakeReport
from curate.records import DatasetVersion
from curate.weights import WeightSummary

__all__ = ["DemoResult", "default_examples", "run_demo"]


def default_examples() -> Path:
    """Give the example_datasets/ folder of this checkout."""
    return Path(__file__).resolve().parent.parent / "example_datasets"


@dataclass
class DemoResult:
    """What the demo did and found."""

    catalog_path: Path
    intake: IntakeReport
    noise_methods: dict[str, str]
    grades: dict[str, str]
    consistency: ConsistencyReport
    datasets: list[DatasetVersion] = field(default_factory=list)
    exports: dict[str, Path] = field(default_factory=dict)
    weights: WeightSummary | None = None
    verify: VerifyReport | None = None


def run_demo(
    outdir: Path, *, examples: Path | None = None, force: bool = False, actor: str = "curate-demo"
) -> DemoResult:
    """Log the example data into a fresh catalog in ``outdir``, estimate noise, grade from the
    checklists, check consistency, write every export and the folds; give what was found.
    """
    source = examples or default_examples()
    if not (source / "data").is_dir():
        raise InputError(
            f"{source}: no example data found (expected a data/ folder); pass --examples"
        )
    if outdir.exists() and any(outdir.iterdir()) and not force:
        raise InputError(
            f"{outdir}: the folder exists and is not empty; choose another or pass --force"
        )
    outdir.mkdir(parents=True, exist_ok=True)
    catalog_path = outdir / "curate.db"
    for stale in (catalog_path, outdir / "curate.db-wal", outdir / "curate.db-shm"):
        stale.unlink(missing_ok=True)
    for ours in ("exports", "folds"):  # only the demo's own output folders are replaced
        if (outdir / ours).is_dir() and force:
            shutil.rmtree(outdir / ours)
    inbox = outdir / "inbox"
    if inbox.exists():
        shutil.rmtree(inbox)
    shutil.copytree(source / "data", inbox)
    with Catalog(catalog_path, actor=actor) as catalog:
        intake = catalog.intake(inbox)
        noise_methods = {v.id: r.method for v, r in catalog.estimate_noise()}
        grades: dict[str, str] = {}
        by_file = {v.record.source.raw_file_name: v.id for v in catalog.list()}
        for answers in sorted((source / "checklists").glob("*.toml")):
            dataset_id = next(
                (i for name, i in by_file.items() if name and Path(name).stem == answers.stem), None
            )
            if dataset_id is None:
                continue
            _, graded = catalog.grade_from_checklist(dataset_id, answers_file=answers, accept=True)
            if graded is not None and graded.grade is not None:
                grades[dataset_id] = graded.grade
        consistency = catalog.consistency()
        datasets = catalog.list(include_retired=True)
        exports = {}
        for fmt in ("table", "petab", "datapackage", "prov"):
            exports[fmt] = catalog.export(fmt, outdir / "exports" / fmt).outdir
        for by in ("dataset", "lab"):
            exports[f"folds by {by}"] = catalog.folds(by, outdir / "folds" / by).outdir
        summary = catalog.weights()
        verify = catalog.verify()
    return DemoResult(
        catalog_path=catalog_path,
        intake=intake,
        noise_methods=noise_methods,
        grades=grades,
        consistency=consistency,
        datasets=datasets,
        exports=exports,
        weights=summary,
        verify=verify,
    )
