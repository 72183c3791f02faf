"""The public catalog: the ledger plus every action on it (noise, grades, consistency,
weights, exports, folds, trace, impact, fits, sensitivity, backup, report).

:class:`Catalog` adds no logic of its own: each method resolves the policy and selection once
and calls the module that owns the question. The command line is a thin shell over these
methods, with the same names.
"""

from __future__ import annotations

import builtins
import os
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from curate import export as exporting
from curate.errors import CatalogError, InputError
from curate.fit import runs
from curate.fit.backends import ModelBackend, PythonFunction
from curate.fit.engine import FitOptions, FitResult
from curate.fit.ensemble import DEFAULT_CUT, EnsembleResult
from curate.fit.predict import PredictionBand
from curate.fit.problem_runs import check_problem_model
from curate.fit.profile import ProfileResult
from curate.fit.sensitivity import DEFAULT_SHIFT_THRESHOLD, SensitivityResult
from curate.fit.spec import load_spec
from curate.ingest import PetabImport, read_petab_import
from curate.ledger import (
    DEFAULT_CATALOG,
    AddResult,
    IntakeReport,
    Ledger,
    VerifyReport,
    backup_catalog,
    intake_folder,
)
from curate.ledger.provenance import ChainHead
from curate.present.report import write_report
from curate.quality import actions as quality
from curate.quality.grading import GradeSuggestion
from curate.records import DatasetVersion
from curate.weighting import PolicyLike, Selection, WeightSummary, resolve_policy, weighted_table
from curate.weighting.stream import ROWS_PER_BATCH, weighted_stream

if TYPE_CHECKING:
    import pyarrow as pa

__all__ = ["Catalog", "open_catalog", "read_petab"]


def read_petab(problem: str | Path, *, lab: str | None, time_unit: str, unit: str,
               actor: str) -> PetabImport:  # fmt: skip
    """Give a PEtab problem read whole, its model checked to load and its formulas to resolve."""
    imported = read_petab_import(problem, lab=lab, time_unit=time_unit, unit=unit, actor=actor)
    if imported.problem.model_ids:  # a problem without a model is data only
        check_problem_model(imported.problem.files, imported.problem.source)
    return imported


def open_catalog(
    path: str | Path | None = None, *, actor: str | None = None, create: bool = True
) -> Catalog:
    """Give the catalog at ``path`` ($CURATE_CATALOG, else ./curate.db).

    By default (``create=True``, the Python API's behaviour) a missing file becomes a new,
    empty catalog. With ``create=False`` a missing file is refused with a
    :class:`~curate.errors.CatalogError` naming the path: the command line opens the catalog
    this way for every command that does not log data, so a mistyped ``--catalog`` is not
    silently a new, empty catalog.
    """
    chosen = path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG
    if not create and str(chosen) != ":memory:" and not Path(chosen).exists():
        raise CatalogError(
            f"{chosen}: the catalog file does not exist; check --catalog or $CURATE_CATALOG "
            "(only add, intake, import-petab, demo and restore create a catalog)"
        )
    return Catalog(chosen, actor=actor)


class Catalog(Ledger):
    """A catalog of measured datasets in one SQLite file, with every action on them.

    ``policy`` arguments take a loaded :class:`~curate.weighting.Policy`, a TOML path, or None
    for the policy that ships; ``selection`` a :class:`~curate.weighting.Selection` (None:
    every current, fitted dataset).
    """

    def __enter__(self) -> Catalog:
        return self

    def import_petab(
        self, problem: str | Path, *, lab: str | None = None, time_unit: str = "s", unit: str = "1"
    ) -> builtins.list[AddResult]:
        """Store a PEtab problem (its files byte for byte) and log its measurements, one
        dataset per observable/condition/datasetId, each linked to the stored problem.

        The model is checked first (:func:`read_petab`): nothing is stored for a problem whose
        SBML libroadrunner cannot load or whose formulas name unknown symbols.
        """
        return self.add_petab(read_petab(problem, lab=lab, time_unit=time_unit, unit=unit,
                                         actor=self.actor))  # fmt: skip

    # -- intake ----------------------------------------------------------------------------

    def intake(self, folder: str | Path, *, quarantine: str | Path | None = None, lab: str | None = None,
               progress: Callable[[int, int, str], None] | None = None) -> IntakeReport:  # fmt: skip
        """Log every data file of a folder; quarantine each bad one with its reason.

        ``lab`` is the source lab of files whose sidecar names none.
        """
        return intake_folder(self, folder, quarantine=quarantine, lab=lab, progress=progress)

    # -- judgement (noise, trust, consistency) --------------------------------------------

    def estimate_noise(
        self, dataset_ids: builtins.list[str] | None = None, *, method: str = "auto"
    ) -> builtins.list[quality.NoiseOutcome]:
        """Estimate and store the noise of the named datasets (all current ones if None).

        Each outcome unpacks as (version, result); ``changed`` is False where the same
        estimate was already stored (then nothing is written).
        """
        ids = dataset_ids if dataset_ids is not None else [v.id for v in self.list()]
        return quality.estimate_noise(self, ids, method=method)

    def grade(self, dataset_id: str, grade: str, *, reason: str) -> DatasetVersion:
        """Record a person's trust grade with its reason (a new version)."""
        return quality.set_grade(self, dataset_id, grade, reason=reason)

    def grade_from_checklist(self, dataset_id: str, *, answers: dict[str, bool | None] | None = None,
                             answers_file: str | Path | None = None, checklist_file: str | Path | None = None,
                             accept: bool = False) -> tuple[GradeSuggestion, DatasetVersion | None]:  # fmt: skip
        """Suggest a grade from checklist answers (recorded as an event); grade if ``accept``."""
        return quality.grade_from_checklist(self, dataset_id, answers=answers, answers_file=answers_file,
                                            checklist_file=checklist_file, accept=accept)  # fmt: skip

    def accept_suggestion(self, dataset_id: str, *, reason: str | None = None) -> DatasetVersion:
        """Take the newest grade suggestion for a dataset as its grade (with the person's reason)."""
        return quality.accept_suggestion(self, dataset_id, reason=reason)

    def consistency(self, *, observable: str | None = None, tolerance: float = 0.01, at: float | None = None,
                    alpha: float = 0.05, record: bool = True) -> quality.ConsistencyReport:  # fmt: skip
        """Compare datasets of one observable under matching conditions; record grade suggestions."""
        return quality.check_consistency(self, observable=observable, tolerance=tolerance, at=at,
                                         alpha=alpha, record=record)  # fmt: skip

    # -- weights, exports, folds -----------------------------------------------------------

    def weighted_table(
        self, *, policy: PolicyLike = None, selection: Selection | None = None
    ) -> pd.DataFrame:
        """Give the weighted long table of a selection as a DataFrame (no files written)."""
        return weighted_table(self, resolve_policy(policy), selection or Selection()).table

    def weighted_batches(
        self, *, policy: PolicyLike = None, selection: Selection | None = None,
        rows_per_batch: int = ROWS_PER_BATCH,
    ) -> Iterator[pa.RecordBatch]:  # fmt: skip
        """Give the weighted long table as Arrow record batches, never held whole: the columns
        and values of :meth:`weighted_table` (``pa.Table.from_batches(...).to_pandas()`` is that
        frame), about ``rows_per_batch`` rows each. The weights are worked out before the first
        batch (a bad selection or policy is refused then)."""
        stream = weighted_stream(self, resolve_policy(policy), selection or Selection(),
                                 rows_per_batch=rows_per_batch)  # fmt: skip
        return stream.batches(unit_symbols=False)

    def weights(
        self, *, policy: PolicyLike = None, selection: Selection | None = None
    ) -> WeightSummary:
        """Give each dataset's share of the total weight, Kish n_eff and warnings."""
        # the first pass of the streamed table: the summary without building the table
        return weighted_stream(self, resolve_policy(policy), selection or Selection()).summary

    def export(self, fmt: str, outdir: str | Path, *, policy: PolicyLike = None,
               selection: Selection | None = None, force: bool = False) -> exporting.ExportResult:  # fmt: skip
        """Write an export (table, petab, datapackage, prov) with its README and manifest."""
        return exporting.export(self, fmt, outdir, policy=resolve_policy(policy),
                                selection=selection or Selection(), force=force)  # fmt: skip

    def folds(self, by: str, outdir: str | Path, *, policy: PolicyLike = None,
              selection: Selection | None = None, force: bool = False) -> exporting.FoldSet:  # fmt: skip
        """Write holdout folds (one folder per fold) with a manifest."""
        return exporting.write_folds(self, by, outdir, policy=resolve_policy(policy),
                                     selection=selection or Selection(), force=force)  # fmt: skip

    def verify(self, head: ChainHead | tuple[int, str] | None = None, *,
               against: str | Path | None = None) -> VerifyReport:  # fmt: skip
        """Recompute every hash, policy text and the event chain; with ``head`` (SEQ, HASH) or
        ``against`` (an export folder, its manifest.json, or a backup file), also tell whether
        the catalog still extends the chain head kept there."""
        if head is not None and against is not None:
            raise InputError("verify: give a head or a file to check against, not both")
        if against is not None:
            head = exporting.recorded_head(self, against)
        return super().verify(head)

    def trace(self, outdir: str | Path) -> exporting.TraceReport:
        """Tell whether the catalog still holds exactly the data an export used."""
        return exporting.trace(self, outdir)

    def impact(self, dataset_id: str) -> builtins.list[exporting.ImpactEntry]:
        """List the exports and runs that used a since-corrected or retired version of a dataset."""
        return exporting.impact(self, dataset_id)

    # -- fits and sensitivity ----------------------------------------------------------------

    def fit(self, model: str | ModelBackend | None = None, params: str | Path | None = None, *,
            problem: str | None = None, policy: PolicyLike = None,
            selection: Selection | None = None, options: FitOptions | None = None,
            evaluate: bool = False, simulations: str | Path | None = None,
            tolerances: dict[str, float] | None = None,
            progress: Callable[[int, int, str], None] | None = None) -> FitResult:  # fmt: skip
        """Fit a model (module:function, file.py:function or a backend) to the weighted selection,
        or a stored PEtab problem's own model (``problem``) to its datasets in the selection.

        With ``problem``: ``params`` overrides the parameter table, ``evaluate`` computes the
        objective at the start without optimising, ``simulations`` names a PEtab simulation
        table to write, ``tolerances`` sets the solver's (``relative``, ``absolute``).
        """
        chosen = resolve_policy(policy)
        if problem is not None:
            if model is not None:
                raise InputError("fit: give --problem or --model, not both")
            return runs.run_problem_fit(
                self, problem, policy=chosen, selection=selection or Selection(),
                spec=load_spec(params, overrides=True) if params is not None else None, options=options,
                evaluate=evaluate, simulations=simulations, tolerances=tolerances, progress=progress,
            )  # fmt: skip
        if evaluate or simulations is not None:
            raise InputError("fit: --evaluate and --simulations go with --problem ID")
        if model is None or params is None:
            raise InputError("fit: give --model with --params, or --problem ID")
        spec = load_spec(params)
        backend = model if isinstance(model, ModelBackend) else PythonFunction.from_reference(model)
        return runs.run_fit(self, backend, spec, policy=chosen, selection=selection or Selection(),
                            options=options, progress=progress)  # fmt: skip

    def ensemble(self, model: str | ModelBackend | None = None, params: str | Path | None = None, *,
                 problem: str | None = None, options: FitOptions | None = None,
                 threshold: float | None = None, cut: float = DEFAULT_CUT, policy: PolicyLike = None,
                 selection: Selection | None = None, tolerances: dict[str, float] | None = None,
                 workers: int = 1, dask: str | None = None,
                 progress: Callable[[int, int, str], None] | None = None) -> EnsembleResult:  # fmt: skip
        """Fit from many starts (``options.starts``, Latin hypercube, ``options.seed``); keep every
        fit within ``threshold`` (chi2 units; default chi2(0.95, p)) of the best; cluster them."""
        chosen = resolve_policy(policy)
        options = options or FitOptions(starts=100)
        if problem is not None:
            if model is not None:
                raise InputError("ensemble: give --problem or --model, not both")
            spec = load_spec(params, overrides=True) if params is not None else None
            return runs.run_ensemble(self, problem_id=problem, spec=spec, policy=chosen,
                                     selection=selection or Selection(), options=options,
                                     threshold=threshold, cut=cut, tolerances=tolerances, workers=workers,
                                     progress=progress, dask=dask)  # fmt: skip
        if model is None or params is None:
            raise InputError("ensemble: give --model with --params, or --problem ID")
        backend = model if isinstance(model, ModelBackend) else PythonFunction.from_reference(model)
        return runs.run_ensemble(self, backend=backend, spec=load_spec(params), policy=chosen,
                                 selection=selection or Selection(), options=options,
                                 threshold=threshold, cut=cut, workers=workers, progress=progress,
                                 dask=dask)  # fmt: skip

    def predict(self, model: str | ModelBackend | None = None, params: str | Path | None = None, *,
                conditions: dict[str, str], times: Sequence[float], time_unit: str = "s",
                observable: str | None = None, by: str | None = "dataset",
                problem: str | None = None, options: FitOptions | None = None,
                threshold: float | None = None, cut: float = DEFAULT_CUT, policy: PolicyLike = None,
                selection: Selection | None = None, workers: int = 1,
                progress: Callable[[int, int, str], None] | None = None) -> PredictionBand:  # fmt: skip
        """Give the band of an ensemble's kept fits at new conditions and times (``time_unit``),
        and which left-out group (``by``; None: none) widens it most."""
        chosen = resolve_policy(policy)
        options = options or FitOptions(starts=100)
        backend: ModelBackend | None = None
        spec = None
        if problem is None:
            if model is None or params is None:
                raise InputError("predict: give --model with --params")
            backend = (
                model if isinstance(model, ModelBackend) else PythonFunction.from_reference(model)
            )
            spec = load_spec(params)
        return runs.run_predict(self, backend=backend, spec=spec, problem_id=problem, policy=chosen,
                                selection=selection or Selection(), conditions=conditions, times=times,
                                time_unit=time_unit, observable=observable, by=by, options=options,
                                threshold=threshold, cut=cut, workers=workers, progress=progress)  # fmt: skip

    def profile(self, model: str | ModelBackend | None = None, params: str | Path | None = None, *,
                problem: str | None = None, parameters: Sequence[str] = (), level: float = 0.95,
                policy: PolicyLike = None, selection: Selection | None = None,
                options: FitOptions | None = None, tolerances: dict[str, float] | None = None,
                progress: Callable[[int, int, str], None] | None = None) -> ProfileResult:  # fmt: skip
        """Fit, then give the profile likelihood of each named parameter (default: all free):
        its confidence interval at ``level`` and its identifiability verdict (Raue et al. 2009)."""
        chosen = resolve_policy(policy)
        if problem is not None:
            if model is not None:
                raise InputError("profile: give --problem or --model, not both")
            spec = load_spec(params, overrides=True) if params is not None else None
            return runs.run_profile(self, problem_id=problem, spec=spec, policy=chosen,
                                    selection=selection or Selection(), names=parameters, level=level,
                                    options=options, tolerances=tolerances, progress=progress)  # fmt: skip
        if model is None or params is None:
            raise InputError("profile: give --model with --params, or --problem ID")
        backend = model if isinstance(model, ModelBackend) else PythonFunction.from_reference(model)
        return runs.run_profile(self, backend=backend, spec=load_spec(params), policy=chosen,
                                selection=selection or Selection(), names=parameters, level=level,
                                options=options, progress=progress)  # fmt: skip

    def sensitivity(self, *, by: str = "dataset", model: str | None = None, params: str | Path | None = None,
                    fitter_cmd: str | None = None, problem: str | None = None, method: str = "exact",
                    policy: PolicyLike = None,
                    selection: Selection | None = None, options: FitOptions | None = None, workers: int = 1,
                    dask: str | None = None, threshold: float = DEFAULT_SHIFT_THRESHOLD,
                    policies: Sequence[PolicyLike] = (), timeout: float = 600.0,
                    workdir: str | Path | None = None, tolerances: dict[str, float] | None = None,
                    profiles: bool = False, profile_parameters: Sequence[str] = (),
                    ensemble: FitOptions | None = None,
                    progress: Callable[[int, int], None] | None = None) -> SensitivityResult:  # fmt: skip
        """Leave each group out in turn and refit; give shifts, Cook distances, jackknife SEs;
        with ``profiles``, also each parameter's profile without each group (which data
        identify which parameter); with ``ensemble`` (its starts and seed), the ensemble's
        families without each group (which data decide between the families of good fits)."""
        chosen = resolve_policy(policy)
        alternatives = [resolve_policy(p) for p in policies]
        runs.sensitivity_grouping(by)
        backend: ModelBackend | None
        if problem is not None:
            if model is not None or fitter_cmd is not None:
                raise InputError(
                    "sensitivity: give --problem, --model or --fitter-cmd, one of them"
                )
            backend, spec = None, load_spec(params, overrides=True) if params is not None else None
        else:
            backend, spec = runs.choose_backend(
                model=model, params=params, fitter_cmd=fitter_cmd, timeout=timeout
            )
        return runs.run_sensitivity(
            self, backend, spec, by=by, policy=chosen, selection=selection or Selection(), method=method,
            options=options, workers=workers, dask=dask, threshold=threshold, alternative_policies=alternatives,
            workdir=workdir, progress=progress, problem_id=problem, tolerances=tolerances,
            profiles=profiles, profile_parameters=profile_parameters, ensemble_options=ensemble,
        )  # fmt: skip

    # -- keeping and showing -------------------------------------------------------------------

    def backup(self, destination: str | Path, *, force: bool = False) -> VerifyReport:
        """Write a verified copy of the catalog to ``destination`` (while others may write)."""
        return backup_catalog(self, destination, force=force)

    def report(self, path: str | Path, *, policy: PolicyLike = None) -> str:
        """Write the self-contained HTML report of the catalog; give its sha256."""
        return write_report(self, path, resolve_policy(policy))
