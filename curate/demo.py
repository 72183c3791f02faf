"""The whole job, so far, on the bundled invented scenario (``curate demo``)."""

from __future__ import annotations

import os
import runpy
import shutil
from dataclasses import dataclass, field
from pathlib import Path

from curate.api import Catalog
from curate.errors import InputError
from curate.fit import FitResult
from curate.fit.sensitivity import SensitivityResult
from curate.ledger import IntakeReport, VerifyReport
from curate.quality.actions import ConsistencyReport
from curate.records import DatasetVersion
from curate.weighting import WeightSummary, load_policy

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
    accepted: list[str] = field(default_factory=list)
    before: SensitivityResult | None = None  # by dataset, before the suggestions were accepted
    fit: FitResult | None = None
    sensitivity: dict[str, SensitivityResult] = field(default_factory=dict)
    truth: dict[str, float] = field(default_factory=dict)
    report: Path | None = None
    verify: VerifyReport | None = None


def run_demo(
    outdir: Path, *, examples: Path | None = None, force: bool = False, actor: str = "curate-demo"
) -> DemoResult:
    """Run the whole job on the example data in a fresh catalog in ``outdir``; give what was found.

    Intake, noise, grades from the checklists, consistency (its suggestions accepted, as a
    reviewer would after looking), weights, every export and fold set, the fit, sensitivity
    by dataset and by lab, and the HTML report.
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
        policy_file = source / "policy.toml"
        policy = load_policy(policy_file if policy_file.is_file() else None)
        model, params = source / "model.py", source / "params.toml"
        reference = f"{model.resolve()}:predict"
        has_model = model.is_file() and params.is_file()
        workers = max(1, min(os.cpu_count() or 1, 4))
        before = None
        if (
            has_model
        ):  # with the grades as the checklists set them: does the fit hinge on one dataset?
            before = catalog.sensitivity(
                by="dataset", model=reference, params=params, policy=policy, workers=workers
            )
        # the demo stands in for the person who reviews each finding and accepts its suggestion
        accepted = []
        for suggestion in consistency.suggestions:
            catalog.accept_suggestion(suggestion.dataset_id)
            accepted.append(suggestion.dataset_id)
        exports = {}
        for fmt in ("table", "petab", "datapackage", "prov"):
            exports[fmt] = catalog.export(fmt, outdir / "exports" / fmt, policy=policy).outdir
        for by in ("dataset", "lab"):
            exports[f"folds by {by}"] = catalog.folds(
                by, outdir / "folds" / by, policy=policy
            ).outdir
        summary = catalog.weights(policy=policy)
        fitted = None
        sensitivity: dict[str, SensitivityResult] = {}
        truth: dict[str, float] = {}
        if has_model:
            fitted = catalog.fit(reference, params, policy=policy)
            for by in ("dataset", "lab"):
                sensitivity[by] = catalog.sensitivity(
                    by=by, model=reference, params=params, policy=policy, workers=workers
                )
            truth = dict(runpy.run_path(str(model)).get("TRUTH", {}))
        report = outdir / "report.html"
        catalog.report(report, policy=policy)
        datasets = catalog.list(include_retired=True)
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
        accepted=accepted,
        before=before,
        fit=fitted,
        sensitivity=sensitivity,
        truth=truth,
        report=report,
        verify=verify,
    )
