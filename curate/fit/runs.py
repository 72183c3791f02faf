"""Fits and sensitivity checks on the catalog's weighted data, recorded as runs.

Builds the weighted table (:mod:`curate.weighting`), fits it with any model backend
(:mod:`curate.fit.engine`), runs the leave-one-group-out checks (:mod:`curate.fit.sensitivity`)
and records each run in the catalog as an event naming the dataset versions, the backend (and
its model file's hash), the spec and the policy, so that ``impact`` can find the fits a
correction touches.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.export.manifest import build_manifest, record_run
from curate.fit import sensitivity
from curate.fit.backends import ExternalFitter, ModelBackend, PythonFunction
from curate.fit.censored import fit_points
from curate.fit.deciding import profiles_by_group
from curate.fit.engine import FitOptions, FitResult, evaluate_at_start, fit
from curate.fit.ensemble import DEFAULT_CUT, EnsembleResult, ensemble, unused_parameters
from curate.fit.families import families_by_group
from curate.fit.new_points import new_points
from curate.fit.predict import PredictionBand, prediction_band
from curate.fit.problem import FitProblem
from curate.fit.profile import ProfileResult, profile, profile_threshold
from curate.fit.spec import ParameterSpec, load_spec
from curate.ledger import Ledger
from curate.weighting import Policy, Selection, WeightedTable, weighted_table
from curate.weighting.groupings import Grouping, parse_grouping

__all__ = [
    "choose_backend",
    "run_ensemble",
    "run_fit",
    "run_predict",
    "run_problem_fit",
    "run_profile",
    "run_sensitivity",
    "sensitivity_grouping",
]


def choose_backend(*, model: str | None, params: str | Path | None, fitter_cmd: str | None,
                   timeout: float = 600.0) -> tuple[ModelBackend, ParameterSpec | None]:  # fmt: skip
    """Give the backend (and spec) that ``--model``/``--params`` or ``--fitter-cmd`` name."""
    if (model is None) == (fitter_cmd is None):
        raise InputError("sensitivity: give either --model with --params, or --fitter-cmd")
    if fitter_cmd is not None:
        fitter = ExternalFitter(fitter_cmd, timeout=timeout)
        fitter.check()
        return fitter, None
    if params is None:
        raise InputError("sensitivity: --model needs --params SPEC.toml")
    spec = load_spec(params)
    assert model is not None
    return PythonFunction.from_reference(model), spec


def sensitivity_grouping(by: str) -> Grouping:
    """Give the grouping of a sensitivity check: one that leaves one group out (not k-fold)."""
    return parse_grouping(by, leave_one_out=True)


def _record(catalog: Ledger, kind: str, backend: ModelBackend, spec: ParameterSpec | None,
            weighted: WeightedTable, summary: dict[str, Any]) -> None:  # fmt: skip
    description = backend.run_record()
    manifest = build_manifest(
        catalog, kind, weighted.policy, weighted.selection, weighted.versions, {}
    )
    record_run(catalog, kind, weighted.policy, weighted.versions, manifest, extra={
        "model": backend.label, "model_sha256": description.get("sha256"), "backend": description,
        "spec_sha256": spec.sha256 if spec else None, "spec": spec.to_dict() if spec else None, "result": summary,
    })  # fmt: skip


def run_fit(catalog: Ledger, backend: ModelBackend, spec: ParameterSpec, *, policy: Policy, selection: Selection,
            options: FitOptions | None = None,
            progress: Callable[[int, int, str], None] | None = None) -> FitResult:  # fmt: skip
    """Fit a model to the weighted selection; record the fit; give the result."""
    if backend.fits_itself:
        raise InputError(
            "fit: an external fitter fits by itself; use `curate sensitivity --fitter-cmd`"
        )
    weighted = weighted_table(catalog, policy, selection)
    points, censored_notes = fit_points(weighted.table, policy.censored)
    fitted = FitProblem(points, backend, spec)
    result = fit(fitted, options, progress=progress)
    result.notes += ungraded_note(weighted) + censored_notes
    unused = unused_parameters(fitted, result.theta) if len(result.theta) else []
    if unused:
        result.notes.append(f"{', '.join(unused)}: no residual changes with "
                            f"{'it' if len(unused) == 1 else 'them'}; the model does not read "
                            f"{'it' if len(unused) == 1 else 'them'} (fix in the spec)")  # fmt: skip
    _record(catalog, "fit", backend, spec, weighted,
            {k: v for k, v in result.to_dict().items() if k != "starts"})  # fmt: skip
    return result


def _problem_fit(catalog: Ledger, problem_id: str, *, policy: Policy, selection: Selection,
                 spec: ParameterSpec | None, tolerances: dict[str, float] | None) -> Any:  # fmt: skip
    # libroadrunner is imported only when a stored problem is fitted
    from curate.fit.backends.petab_sbml import SolverTolerances
    from curate.fit.problem_runs import problem_fit

    solver = None
    if tolerances:
        default = SolverTolerances()
        solver = SolverTolerances(relative=float(tolerances.get("relative", default.relative)),
                                  absolute=float(tolerances.get("absolute", default.absolute)))  # fmt: skip
    return problem_fit(catalog, problem_id, policy=policy, selection=selection, spec=spec,
                       tolerances=solver)  # fmt: skip


def ungraded_note(weighted: WeightedTable) -> list[str]:
    """Give the note that ungraded datasets were weighted as the policy's stand-in grade."""
    ungraded = [v.id for v in weighted.versions if v.grade is None]
    if not ungraded:
        return []
    policy = weighted.policy
    return [f"{len(ungraded)} of {len(weighted.versions)} datasets are ungraded: policy "
            f"'{policy.name}' weights them as grade {policy.ungraded} (inflation "
            f"{policy.inflation.get(policy.ungraded, 1.0):g}); grade them, or choose another policy"]  # fmt: skip


def run_problem_fit(catalog: Ledger, problem_id: str, *, policy: Policy, selection: Selection,
                    spec: ParameterSpec | None = None, options: FitOptions | None = None,
                    evaluate: bool = False, simulations: str | Path | None = None,
                    tolerances: dict[str, float] | None = None,
                    progress: Callable[[int, int, str], None] | None = None) -> FitResult:  # fmt: skip
    """Fit (or, with ``evaluate``, only evaluate) a stored PEtab problem's model on its datasets
    in the selection; write the PEtab simulation table if asked; record the run."""
    from curate.export.simulations import check_simulation_path, write_simulation_table
    from curate.fit.problem_runs import simulation_table

    if simulations is not None:
        check_simulation_path(Path(simulations))  # before any work
    fitted = _problem_fit(catalog, problem_id, policy=policy, selection=selection, spec=spec,
                          tolerances=tolerances)  # fmt: skip
    if not fitted.spec.free and not evaluate:
        raise InputError(
            f"{fitted.spec.origin}: every parameter is fixed; nothing to fit (--evaluate "
            "computes the objective at these values)"
        )
    problem = FitProblem(fitted.points, fitted.backend, fitted.spec)
    result = (
        evaluate_at_start(problem, options)
        if evaluate
        else fit(problem, options, progress=progress)
    )
    result.notes += ungraded_note(fitted.weighted)
    if simulations is not None:
        found = problem.evaluate(result.theta)
        write_simulation_table(Path(simulations),
                               simulation_table(fitted, found.simulation, found.sigma))  # fmt: skip
    summary = {k: v for k, v in result.to_dict().items() if k != "starts"}
    summary["problem"] = {"id": fitted.problem.id, "version": fitted.problem.version,
                          "sha256": fitted.problem.content_sha256}  # fmt: skip
    _record(catalog, "fit", fitted.backend, fitted.spec, fitted.weighted, summary)
    return result


def _chosen_problem(catalog: Ledger, *, backend: ModelBackend | None, spec: ParameterSpec | None,
                    problem_id: str | None, policy: Policy, selection: Selection,
                    tolerances: dict[str, float] | None, what: str,
                    ) -> tuple[FitProblem, ModelBackend, ParameterSpec, WeightedTable]:  # fmt: skip
    """Give the fit problem of a model and spec, or of a stored problem, on the selection."""
    if problem_id is not None:
        fitted = _problem_fit(catalog, problem_id, policy=policy, selection=selection, spec=spec,
                              tolerances=tolerances)  # fmt: skip
        problem = FitProblem(fitted.points, fitted.backend, fitted.spec)
        backend, spec, weighted = fitted.backend, fitted.spec, fitted.weighted
    else:
        assert backend is not None and spec is not None
        if backend.fits_itself:
            raise InputError(f"{what}: an external fitter fits by itself; {what} needs --model")
        weighted = weighted_table(catalog, policy, selection)
        # the policy's censored-point rule applies here as in a fit
        problem = FitProblem(fit_points(weighted.table, policy.censored)[0], backend, spec)
    if not problem.free:
        raise InputError(f"{spec.origin}: every parameter is fixed; there is nothing to {what}")
    return problem, backend, spec, weighted


def run_ensemble(catalog: Ledger, *, backend: ModelBackend | None = None,
                 spec: ParameterSpec | None = None, problem_id: str | None = None, policy: Policy,
                 selection: Selection, options: FitOptions, threshold: float | None = None,
                 cut: float = DEFAULT_CUT, tolerances: dict[str, float] | None = None, workers: int = 1,
                 progress: Callable[[int, int, str], None] | None = None,
                 dask: str | None = None) -> EnsembleResult:  # fmt: skip
    """Run an ensemble of local fits from many starts (here, on a process pool or on Dask);
    record it as a run (seed included)."""
    problem, backend, spec, weighted = _chosen_problem(
        catalog, backend=backend, spec=spec, problem_id=problem_id, policy=policy,
        selection=selection, tolerances=tolerances, what="ensemble",
    )  # fmt: skip
    result = ensemble(problem, options, threshold=threshold, cut=cut, workers=workers,
                      progress=progress, dask=dask)  # fmt: skip
    summary = {**result.to_dict(), "seed": options.seed, "cut": cut}
    _record(catalog, "ensemble", backend, spec, weighted, summary)
    return result


def run_predict(catalog: Ledger, *, backend: ModelBackend | None = None,
                spec: ParameterSpec | None = None, problem_id: str | None = None, policy: Policy,
                selection: Selection, conditions: dict[str, str], times: Sequence[float],
                time_unit: str = "s", observable: str | None = None, by: str | None = "dataset",
                options: FitOptions, threshold: float | None = None, cut: float = DEFAULT_CUT,
                workers: int = 1, progress: Callable[[int, int, str], None] | None = None,
                ) -> PredictionBand:  # fmt: skip
    """Give the ensemble's prediction band at new conditions and, unless ``by`` is None, which
    left-out group widens it most; record the run."""
    if problem_id is not None:
        raise InputError(
            "predict: a stored PEtab problem predicts only its own conditions; predictions at "
            "new conditions need --model with --params"
        )
    grouping = sensitivity_grouping(by) if by is not None else None
    problem, backend, spec, weighted = _chosen_problem(
        catalog, backend=backend, spec=spec, problem_id=None, policy=policy,
        selection=selection, tolerances=None, what="predict",
    )  # fmt: skip
    last = float(weighted.table["time"].max()) if len(weighted.table) else None
    points, notes = new_points(weighted.versions, conditions, times, time_unit=time_unit,
                               observable=observable, last_time=last)  # fmt: skip
    table, censored_notes = fit_points(weighted.table, policy.censored)
    whole = ensemble(problem, options, threshold=threshold, cut=cut, workers=workers,
                     progress=progress)  # fmt: skip
    labels = grouping.labels(table) if grouping is not None else None
    result = prediction_band(
        problem, whole, points, labels, by=by or "", options=options, workers=workers,
        progress=(lambda d, t: progress(d, t, "groups")) if progress else None,
    )  # fmt: skip
    result.notes += notes + censored_notes + ungraded_note(weighted)
    result.units = dict(points.attrs.get("units", {}))
    if "relative" in weighted.table and bool(weighted.table["relative"].any()):
        result.notes.append("some datasets are in relative units: the band is the model's own "
                            "output, before any dataset's scale factor")  # fmt: skip
    summary = {**result.to_dict(), "starts": whole.starts, "seed": options.seed,
               "threshold": whole.threshold, "conditions": conditions, "time_unit": time_unit}  # fmt: skip
    _record(catalog, "prediction", backend, spec, weighted, summary)
    return result


def run_profile(catalog: Ledger, *, backend: ModelBackend | None = None,
                spec: ParameterSpec | None = None, problem_id: str | None = None, policy: Policy,
                selection: Selection, names: Sequence[str] = (), level: float = 0.95,
                options: FitOptions | None = None, tolerances: dict[str, float] | None = None,
                progress: Callable[[int, int, str], None] | None = None) -> ProfileResult:  # fmt: skip
    """Fit, then profile each named parameter (default: every free one); record the run."""
    profile_threshold(level)  # a bad level is refused before any work
    problem, backend, spec, weighted = _chosen_problem(
        catalog, backend=backend, spec=spec, problem_id=problem_id, policy=policy,
        selection=selection, tolerances=tolerances, what="profile",
    )  # fmt: skip
    best = fit(problem, options)
    result = profile(problem, best, names or None, level=level, options=options, progress=progress)
    result.notes += ungraded_note(weighted)
    if not best.converged:
        result.notes.append(f"the fit the profiles start from did not converge: {best.message}")
    summary = {**result.to_dict(), "threshold": result.threshold, "level": level,
               "optimum": result.optimum, "objective": result.objective,
               "notes": result.notes}  # fmt: skip
    _record(catalog, "profile", backend, spec, weighted, summary)
    return result


def run_sensitivity(
    catalog: Ledger,
    backend: ModelBackend | None,
    spec: ParameterSpec | None,
    *,
    by: str,
    policy: Policy,
    selection: Selection,
    method: str = "exact",
    options: FitOptions | None = None,
    workers: int = 1,
    dask: str | None = None,
    threshold: float = sensitivity.DEFAULT_SHIFT_THRESHOLD,
    alternative_policies: Sequence[Policy] = (),
    workdir: str | Path | None = None,
    progress: Callable[[int, int], None] | None = None,
    problem_id: str | None = None,
    tolerances: dict[str, float] | None = None,
    profiles: bool = False,
    profile_parameters: Sequence[str] = (),
    ensemble_options: FitOptions | None = None,
) -> sensitivity.SensitivityResult:
    """Run the leave-one-group-out check (and a policy sweep); record it; give the result.

    With ``problem_id`` the backend is the stored problem's model (``backend`` is then None)
    and ``spec`` overrides its parameter table when given.
    """
    if workers < 1:
        raise InputError(f"workers={workers}: expected at least 1 worker process")
    grouping = sensitivity_grouping(by)
    if problem_id is not None:
        fitted = _problem_fit(catalog, problem_id, policy=policy, selection=selection, spec=spec,
                              tolerances=tolerances)  # fmt: skip
        backend, spec, weighted, table = fitted.backend, fitted.spec, fitted.weighted, fitted.points
    else:
        weighted = weighted_table(catalog, policy, selection)
        table, _ = fit_points(weighted.table, policy.censored)
    if backend is None:
        raise InputError("sensitivity: give --model with --params, --fitter-cmd, or --problem ID")
    labels = grouping.labels(table)
    if profiles and (backend.fits_itself or method != "exact"):
        raise InputError(
            "sensitivity --profiles refits and profiles each group with --model or --problem "
            "and --method exact (profiles need the model itself, not a screen)"
        )
    if ensemble_options is not None and (backend.fits_itself or method != "exact"):
        raise InputError(
            "sensitivity --ensemble refits the ensemble without each group with --model or "
            "--problem and --method exact (families need the model itself, not a screen)"
        )
    if ensemble_options is not None and ensemble_options.starts < 2:
        raise InputError(
            f"--ensemble-starts {ensemble_options.starts}: an ensemble needs at least 2 starts"
        )
    if backend.fits_itself:
        # a folder of our own is removed after a run in which every fit worked; after a failure
        # it stays, since the error messages name the logs in it; a --workdir always stays
        folder = Path(workdir) if workdir else Path(tempfile.mkdtemp(prefix="curate-fitter-"))
        result = sensitivity.leave_one_group_out_external(
            backend, weighted.table, labels, by=by, workdir=folder, threshold=threshold, progress=progress
        )  # fmt: skip
        if workdir is None and all(g.error is None for g in result.groups):
            shutil.rmtree(folder, ignore_errors=True)
            assert isinstance(result.full, dict)
            result.full["workdir"] = None
        _record(catalog, "sensitivity", backend, None, weighted, _summary(result))
        return result
    if spec is None:
        raise InputError("sensitivity: --model needs --params SPEC.toml")
    problem = FitProblem(table, backend, spec)
    full = fit(problem, options, progress=(lambda d, t, _: progress(d, t)) if progress else None)
    result = sensitivity.leave_one_group_out(
        problem, full, labels, by=by, method=method, options=options, workers=workers, dask=dask,
        shift_threshold=threshold, progress=progress,
    )  # fmt: skip
    if profiles:
        result.profiles = profiles_by_group(
            problem, full, labels, by=by, names=profile_parameters or None, options=options,
        ).to_dict()  # fmt: skip
    if ensemble_options is not None:
        whole = ensemble(problem, ensemble_options, workers=workers)
        result.families = {
            **families_by_group(problem, whole, labels, by=by, options=ensemble_options,
                                workers=workers).to_dict(),
            "starts": whole.starts, "seed": ensemble_options.seed, "cut": whole.cut,
            "objectives": whole.objectives,
        }  # fmt: skip
    tolerance = (options or FitOptions()).tolerance
    for alternative in alternative_policies:
        if problem_id is not None:
            again = _problem_fit(catalog, problem_id, policy=alternative, selection=selection,
                                 spec=spec, tolerances=tolerances)  # fmt: skip
            other_points = again.points
        else:
            other_points = fit_points(
                weighted_table(catalog, alternative, selection).table, alternative.censored
            )[0]
        refit = fit(FitProblem(other_points, backend, spec), FitOptions(tolerance=tolerance))
        shifts = {}
        for name in full.free:
            se = full.parameters[name]["stderr"]
            value = refit.parameters[name]["value"]
            base = full.parameters[name]["value"]
            shifts[name] = {
                "value": value,
                "shift_se": (value - base) / se
                if (se and value is not None and base is not None)
                else None,
            }
        result.policies.append({"policy": alternative.name, "origin": alternative.origin, "sha256": alternative.sha256,
                                "parameters": shifts, "chi2": refit.chi2})  # fmt: skip
    _record(catalog, "sensitivity", backend, spec, weighted, _summary(result))
    return result


def _summary(result: sensitivity.SensitivityResult) -> dict[str, Any]:
    """Give the whole result as plain data (the report draws from the newest recorded run)."""
    data = result.to_dict()
    data["full"] = {k: v for k, v in data["full"].items() if k != "starts"}
    data["flags"] = result.flags()
    return data
