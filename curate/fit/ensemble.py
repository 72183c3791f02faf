"""Ensembles of good fits: many starts, each refined locally; every fit within a likelihood-ratio
threshold of the best kept, and the kept fits grouped into families.

A model with many parameters fitted to data from several labs rarely has one best fit: starts
scattered over the bounds end in several optima that fit (nearly) equally well. The threshold
for "equally well" is the likelihood-ratio one, chi2(0.95, p) in chi2 units above the best
(p free parameters; the joint 95 % confidence region of all parameters, Wilks 1938), settable.
The kept fits are clustered in the optimiser's coordinates (ln p for log parameters, p / |start|
otherwise) by scipy's average-linkage hierarchical clustering, cut at a stated distance; they are
also grouped by objective plateau (sorted objectives closer than PLATEAU_GAP in chi2 units).
"""

from __future__ import annotations

import multiprocessing
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats
from scipy.cluster import hierarchy

from curate.errors import InputError
from curate.fit.backends import ModelBackend, rebuild
from curate.fit.engine import FitOptions, least_squares, start_points
from curate.fit.problem import FitProblem

# what starting a worker costs before its first fit: the same estimate as for refits
from curate.fit.sensitivity import WORKER_START_SECONDS
from curate.fit.spec import ParameterSpec

__all__ = ["DEFAULT_CUT", "PLATEAU_GAP", "Cluster", "EnsembleResult", "ensemble"]

DEFAULT_CUT = 0.5  # in the optimiser's coordinates: a factor e^0.5 = 1.65 for a log parameter
PLATEAU_GAP = 0.1  # chi2 units between sorted objectives that still share a plateau


@dataclass
class Cluster:
    """One family of kept fits."""

    id: int
    size: int
    objective: float  # the best in the family
    parameters: dict[str, dict[str, float]]  # NAME -> median, min, max
    members: list[int]  # start numbers

    def to_dict(self) -> dict[str, Any]:
        """Give the JSON shape of one cluster."""
        return {"id": self.id, "size": self.size, "objective": self.objective,
                "parameters": self.parameters}  # fmt: skip


@dataclass
class EnsembleResult:
    """Every start's outcome, the kept fits and their families."""

    starts: int
    failed: list[dict[str, Any]]  # {"start", "error"}
    threshold: float
    best_objective: float
    best_parameters: dict[str, float]
    accepted: int
    clusters: list[Cluster]
    plateaus: list[dict[str, Any]]  # {"objective", "size"}, best first
    objectives: list[float]  # every finished start's objective, sorted (the waterfall)
    cut: float
    objective: str = "chi2"
    kept: list[dict[str, Any]] = field(default_factory=list)  # start, objective, parameters
    executor: str = "serial"

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"starts", "failed", "threshold", "best": {"objective", "parameters"},
        "accepted", "clusters": [...]}`` (and the plateaus and the sorted objectives)."""
        return {
            "starts": self.starts,
            "failed": self.failed,
            "threshold": self.threshold,
            "best": {"objective": self.best_objective, "parameters": self.best_parameters},
            "accepted": self.accepted,
            "clusters": [c.to_dict() for c in self.clusters],
            "plateaus": self.plateaus,
            "objectives": self.objectives,
            "executor": self.executor,
        }


def _plateaus(objectives: list[float]) -> list[dict[str, Any]]:
    plateaus: list[dict[str, Any]] = []
    for value in sorted(objectives):
        if plateaus and value - plateaus[-1]["last"] < PLATEAU_GAP:
            plateaus[-1]["size"] += 1
            plateaus[-1]["last"] = value
        else:
            plateaus.append({"objective": value, "size": 1, "last": value})
    return [{"objective": p["objective"], "size": p["size"]} for p in plateaus]


_Outcome = tuple[int, float | None, np.ndarray | None, str | None]  # start, objective, theta, error
_WORKER: dict[str, FitProblem] = {}  # the problem of this worker process (built once per worker)


def _local_fit(problem: FitProblem, number: int, x0: np.ndarray, options: FitOptions) -> _Outcome:
    try:
        solution = least_squares(problem, x0, options)
    except (InputError, ArithmeticError) as err:
        return number, None, None, str(err).splitlines()[0] if str(err) else type(err).__name__
    value = float(2 * solution.cost)
    if not np.isfinite(value):
        return number, None, None, "the objective is not a finite number"
    return number, value, np.asarray(solution.x, dtype=float), None


def _worker_start(backend: ModelBackend | None, description: dict[str, Any] | None,
                  points: Any, spec: ParameterSpec) -> None:  # fmt: skip
    model = backend if backend is not None else rebuild(description or {})
    _WORKER["problem"] = FitProblem(points, model, spec)


def _worker_fit(task: tuple[int, np.ndarray, FitOptions]) -> _Outcome:
    number, x0, options = task
    return _local_fit(_WORKER["problem"], number, x0, options)


def _run_starts(problem: FitProblem, candidates: list[np.ndarray], options: FitOptions,
                workers: int, progress: Callable[[int, int, str], None] | None,
                ) -> tuple[list[_Outcome], str]:  # fmt: skip
    """Give every start's outcome, here or on a process pool (spawned workers, each building
    the problem once), whichever is quicker."""
    total = len(candidates)
    outcomes = []
    started = time.perf_counter()
    outcomes.append(_local_fit(problem, 0, candidates[0], options))
    took = time.perf_counter() - started
    if progress is not None:
        progress(1, total, "starts")
    rest = list(enumerate(candidates))[1:]
    here = took * len(rest)
    if workers <= 1 or not rest or here <= WORKER_START_SECONDS + here / min(workers, len(rest)):
        for number, x0 in rest:
            outcomes.append(_local_fit(problem, number, x0, options))
            if progress is not None:
                progress(number + 1, total, "starts")
        why = (
            "serial"
            if workers <= 1
            else f"serial: a fit takes {took:.2g} s, less than starting {workers} workers would"
        )
        return outcomes, why
    backend = problem.backend
    portable = backend.portable
    initargs = (None if portable else backend, backend.describe() if portable else None,
                problem.points, problem.spec)  # fmt: skip
    with ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                             initializer=_worker_start, initargs=initargs) as pool:  # fmt: skip
        chunk = max(1, len(rest) // (8 * workers))
        tasks = [(number, x0, options) for number, x0 in rest]
        for done, outcome in enumerate(pool.map(_worker_fit, tasks, chunksize=chunk)):
            outcomes.append(outcome)
            if progress is not None:
                progress(done + 2, total, "starts")
    return outcomes, f"process pool ({workers} workers)"


def ensemble(
    problem: FitProblem,
    options: FitOptions,
    *,
    threshold: float | None = None,
    cut: float = DEFAULT_CUT,
    workers: int = 1,
    progress: Callable[[int, int, str], None] | None = None,
) -> EnsembleResult:
    """Give the ensemble of ``options.starts`` local fits (the spec's start and a Latin
    hypercube over the bounds, log scale where the spec says so)."""
    if threshold is not None and not threshold > 0:
        raise InputError(f"--threshold {threshold}: expected a positive number (chi2 units)")
    if not cut > 0:
        raise InputError(f"--cut {cut}: expected a positive distance")
    if options.starts < 2:
        raise InputError(f"--starts {options.starts}: an ensemble needs at least 2 starts")
    free = [p.name for p in problem.free]
    if not free:
        raise InputError("every parameter is fixed; there is nothing to search")
    limit = float(stats.chi2.ppf(0.95, len(free))) if threshold is None else float(threshold)
    if workers < 1:
        raise InputError(f"--workers {workers}: expected at least 1 worker process")
    candidates = start_points(problem, options)
    outcomes, executor = _run_starts(problem, candidates, options, workers, progress)
    finished: list[tuple[int, float, np.ndarray]] = []
    failed: list[dict[str, Any]] = []
    for number, value, theta, error in sorted(outcomes, key=lambda o: o[0]):
        if value is None or theta is None:
            failed.append({"start": number, "error": error or "failed"})
        else:
            finished.append((number, value, theta))
    if progress is not None:
        progress(len(candidates), len(candidates), "starts")
    if not finished:
        raise InputError(
            "no start finished: "
            + "; ".join(f"start {f['start']}: {f['error']}" for f in failed[:3])
        )
    best = min(finished, key=lambda item: item[1])
    kept = [item for item in finished if item[1] - best[1] <= limit]
    coordinates = np.array([theta for _, _, theta in kept])
    if len(kept) > 1:
        labels = hierarchy.fcluster(
            hierarchy.linkage(coordinates, method="average"), t=cut, criterion="distance"
        )
    else:
        labels = np.array([1])
    clusters = []
    for label in np.unique(labels):
        members = [kept[k] for k in np.flatnonzero(labels == label)]
        natural = [problem.to_natural(theta) for _, _, theta in members]
        summary = {}
        for name in free:
            values = np.array([n[name] for n in natural])
            summary[name] = {"median": float(np.median(values)), "min": float(values.min()),
                             "max": float(values.max())}  # fmt: skip
        clusters.append((min(v for _, v, _ in members), len(members), summary,
                         [n for n, _, _ in members]))  # fmt: skip
    clusters.sort(key=lambda c: (c[0], -c[1]))
    return EnsembleResult(
        starts=len(candidates),
        failed=failed,
        threshold=limit,
        best_objective=best[1],
        best_parameters={k: v for k, v in problem.to_natural(best[2]).items() if k in free},
        accepted=len(kept),
        clusters=[
            Cluster(k + 1, size, value, summary, members)
            for k, (value, size, summary, members) in enumerate(clusters)
        ],
        plateaus=_plateaus([v for _, v, _ in kept]),
        objectives=sorted(v for _, v, _ in finished),
        cut=cut,
        objective="2 nllh" if problem.noise_model else "chi2",
        kept=[
            {"start": n, "objective": v, "parameters": problem.to_natural(t)} for n, v, t in kept
        ],
        executor=executor,
    )
