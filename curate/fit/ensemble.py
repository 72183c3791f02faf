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

import math
import multiprocessing
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, stats
from scipy.cluster import hierarchy

from curate.errors import InputError
from curate.fit.backends import ModelBackend, rebuild
from curate.fit.engine import DEFAULT_GENERATIONS, FitOptions, least_squares, start_points
from curate.fit.problem import FitProblem

# what starting a worker costs before its first fit: the same estimate as for refits
from curate.fit.sensitivity import WORKER_START_SECONDS, dask_client
from curate.fit.spec import ParameterSpec

__all__ = [
    "DEFAULT_CUT",
    "MAX_CLUSTERED",
    "MAX_REJECTED",
    "PLATEAU_GAP",
    "Cluster",
    "EnsembleResult",
    "Outcome",
    "ensemble",
    "families",
    "global_population",
    "refine",
    "unused_parameters",
]

DEFAULT_CUT = 0.5  # in the optimiser's coordinates: a factor e^0.5 = 1.65 for a log parameter
PLATEAU_GAP = 0.1  # chi2 units between sorted objectives that still share a plateau
DASK_TASKS = 2000  # tasks an ensemble sends to Dask at most (one per start below that)
MAX_REJECTED = 10  # families of finished fits beyond the threshold that are kept for comparison
# fits clustered by linkage (quadratic memory: 4 MB); the rest join the nearest within the cut
MAX_CLUSTERED = 1000


@dataclass
class Cluster:
    """One family of kept fits."""

    id: int
    size: int
    objective: float  # the best in the family
    parameters: dict[str, dict[str, float]]  # NAME -> median, min, max
    members: list[int]  # start numbers
    # optimiser coordinates: the family's median point and its best member (not in the JSON)
    centre: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)
    best: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)

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
    # the kept fits, in arrays: start numbers, objectives, natural values (columns: names)
    kept_starts: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=int), repr=False)
    kept_objectives: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)
    kept_natural: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)), repr=False)
    names: list[str] = field(default_factory=list)  # the free parameters
    executor: str = "serial"
    # the best families of finished fits beyond the threshold (ids after the kept ones): what a
    # leave-one-group-out ensemble asks about ("which data rule this family out")
    rejected: list[Cluster] = field(default_factory=list)
    kept_theta: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)), repr=False)
    origin: str = "latin hypercube"
    notes: list[str] = field(default_factory=list)

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
            "rejected": [c.to_dict() for c in self.rejected],
            "origin": self.origin,
            "notes": self.notes,
        }

    @property
    def kept(self) -> list[dict[str, Any]]:
        """Give each kept fit as ``{"start", "objective", "parameters": {NAME: value}}``."""
        return [
            {"start": int(n), "objective": float(v),
             "parameters": dict(zip(self.names, map(float, row), strict=True))}
            for n, v, row in zip(self.kept_starts, self.kept_objectives, self.kept_natural,
                                 strict=True)
        ]  # fmt: skip

    @property
    def families(self) -> list[Cluster]:
        """Give the kept families, then the rejected ones."""
        return [*self.clusters, *self.rejected]


def _plateaus(objectives: list[float]) -> list[dict[str, Any]]:
    plateaus: list[dict[str, Any]] = []
    for value in sorted(objectives):
        if plateaus and value - plateaus[-1]["last"] < PLATEAU_GAP:
            plateaus[-1]["size"] += 1
            plateaus[-1]["last"] = value
        else:
            plateaus.append({"objective": value, "size": 1, "last": value})
    return [{"objective": p["objective"], "size": p["size"]} for p in plateaus]


Outcome = tuple[int, float | None, np.ndarray | None, str | None]  # start, objective, theta, error
_Outcome = Outcome
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


def _dask_chunk(payload: tuple[Any, ...], chunk: list[tuple[int, np.ndarray]],
                options: FitOptions) -> list[_Outcome]:  # fmt: skip
    backend, description, points, spec = payload
    problem = FitProblem(points, backend if backend is not None else rebuild(description), spec)
    return [_local_fit(problem, number, x0, options) for number, x0 in chunk]


def _refine_on_dask(problem: FitProblem, candidates: Sequence[np.ndarray] | np.ndarray, options: FitOptions,
                    address: str, progress: Callable[[int, int, str], None] | None,
                    keep: Callable[[Outcome], None]) -> str:  # fmt: skip
    """Give every start's local optimum (to ``keep``) from a Dask cluster, and what ran it: the
    problem sent once to every worker, the starts in small chunks as they finish (one task per
    start up to DASK_TASKS starts, so one slow start does not hold the rest back)."""
    from dask.distributed import as_completed

    backend = problem.backend
    portable = backend.portable
    payload = (None if portable else backend, backend.describe() if portable else None,
               problem.points, problem.spec)  # fmt: skip
    total = len(candidates)
    size = max(1, math.ceil(total / DASK_TASKS))
    with dask_client(address) as client:
        workers = max(1, len(client.scheduler_info().get("workers", {})))
        shared = client.scatter(payload, broadcast=True)
        chunks = [
            [(number, candidates[number]) for number in range(k, min(total, k + size))]
            for k in range(0, total, size)
        ]
        futures = client.map(_dask_chunk, [shared] * len(chunks), chunks,
                             [options] * len(chunks), pure=False)  # fmt: skip
        done = 0
        for future in as_completed(futures):  # type: ignore[no-untyped-call]
            chunk = future.result()
            future.release()
            for outcome in chunk:
                keep(outcome)
            done += len(chunk)
            if progress is not None:
                progress(done, total, "starts")
    return f"dask ({address}, {workers} workers)"


def refine(problem: FitProblem, candidates: Sequence[np.ndarray] | np.ndarray, options: FitOptions,
           workers: int = 1, progress: Callable[[int, int, str], None] | None = None,
           dask: str | None = None,
           collect: Callable[[Outcome], None] | None = None) -> tuple[list[Outcome], str]:  # fmt: skip
    """Give every start's local optimum, here or on a process pool (spawned workers, each
    building the problem once), whichever is quicker, or on the Dask cluster at ``dask``
    ("local": a LocalCluster); and which it was.

    With ``collect`` each outcome goes to it as it arrives and the list given back is empty
    (an ensemble of many starts keeps them in arrays, not as one object per start).
    """
    outcomes: list[Outcome] = []
    keep = collect if collect is not None else outcomes.append
    if dask is not None:
        return outcomes, _refine_on_dask(problem, candidates, options, dask, progress, keep)
    total = len(candidates)
    started = time.perf_counter()
    keep(_local_fit(problem, 0, candidates[0], options))
    took = time.perf_counter() - started
    if progress is not None:
        progress(1, total, "starts")
    rest = range(1, total)
    here = took * len(rest)
    if workers <= 1 or not rest or here <= WORKER_START_SECONDS + here / min(workers, len(rest)):
        for number in rest:
            keep(_local_fit(problem, number, candidates[number], options))
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
        chunk = max(1, min(16, len(rest) // (8 * workers)))
        tasks = ((number, candidates[number], options) for number in rest)
        for done, outcome in enumerate(pool.map(_worker_fit, tasks, chunksize=chunk)):
            keep(outcome)
            if progress is not None:
                progress(done + 2, total, "starts")
    return outcomes, f"process pool ({workers} workers)"


def global_population(problem: FitProblem, options: FitOptions) -> list[np.ndarray]:
    """Give the spec's start and the final population of a differential-evolution search
    (scipy, ``options.starts - 1`` members, ``options.generations`` generations): starts
    spread over the good region rather than the whole box."""
    lower, upper = problem.bounds()
    if not (np.all(np.isfinite(lower)) and np.all(np.isfinite(upper))):
        raise InputError("--global needs finite lower and upper bounds for every free parameter")
    dimension = len(problem.free)
    wanted = options.starts - 1
    # scipy's population is popsize * dimension members (at least 5 in all)
    size = max(1, math.ceil(max(wanted, 5) / dimension))

    def objective(theta: np.ndarray) -> float:
        try:
            value = float(np.sum(problem.residual(theta) ** 2))
        except (InputError, ArithmeticError):
            return math.inf
        return value if math.isfinite(value) else math.inf

    found = optimize.differential_evolution(
        objective, list(zip(lower, upper, strict=True)), seed=options.seed, polish=False,
        tol=1e-8, maxiter=options.generations or DEFAULT_GENERATIONS, popsize=size,
    )  # fmt: skip
    order = np.argsort(found.population_energies)
    population = [np.asarray(found.population[k], dtype=float) for k in order[:wanted]]
    return [problem.to_internal({p.name: p.start for p in problem.free}), *population]


def unused_parameters(problem: FitProblem, theta: np.ndarray) -> list[str]:
    """Give the free parameters whose change (a hundredth of the bounds' span, or 1 % of the
    value) leaves every residual exactly as it was: parameters the model never reads."""
    try:
        base = problem.residual(theta)
    except (InputError, ArithmeticError):
        return []
    lower, upper = problem.bounds()
    unused = []
    for k, parameter in enumerate(problem.free):
        span = upper[k] - lower[k]
        step = 0.01 * span if np.isfinite(span) else 0.01 * max(abs(theta[k]), 1.0)
        moved = theta.copy()
        moved[k] = theta[k] + step if theta[k] + step <= upper[k] else theta[k] - step
        try:
            if np.array_equal(problem.residual(moved), base):
                unused.append(parameter.name)
        except (InputError, ArithmeticError):
            continue
    return unused


def _labels(coordinates: np.ndarray, objectives: np.ndarray, cut: float) -> np.ndarray:
    """Give each fit's cluster label: average linkage over at most MAX_CLUSTERED fits (spread
    evenly over the objective ranks; linkage needs memory quadratic in the fits), every other
    fit joining the cluster whose median lies nearest if it lies within the cut of it. Fits
    within the cut of no sampled cluster are clustered the same way among themselves (new
    labels), so a small family the sample missed is still found."""
    n = len(coordinates)
    if n == 1:
        return np.array([1])
    if n <= MAX_CLUSTERED:
        return np.asarray(
            hierarchy.fcluster(
                hierarchy.linkage(coordinates, method="average"), t=cut, criterion="distance"
            )
        )
    order = np.argsort(objectives, kind="stable")
    sample = np.unique(order[np.linspace(0, n - 1, MAX_CLUSTERED).astype(int)])
    sampled = hierarchy.fcluster(
        hierarchy.linkage(coordinates[sample], method="average"), t=cut, criterion="distance"
    )
    names = np.unique(sampled)
    centres = np.array([np.median(coordinates[sample][sampled == name], axis=0) for name in names])
    labels = np.zeros(n, dtype=int)
    for begin in range(0, n, 4096):  # in blocks: distances to every centre at once, bounded
        block = coordinates[begin : begin + 4096]
        distances = np.linalg.norm(block[:, None, :] - centres[None, :, :], axis=2)
        nearest = np.argmin(distances, axis=1)
        placed = distances[np.arange(len(block)), nearest] <= cut
        labels[begin : begin + 4096] = np.where(placed, names[nearest], 0)
    labels[sample] = sampled
    astray = np.flatnonzero(labels == 0)
    if len(astray):
        labels[astray] = _labels(coordinates[astray], objectives[astray], cut) + int(names.max())
    return labels


def families(problem: FitProblem, found: list[tuple[int, float, np.ndarray]], cut: float,
             first_id: int = 1, ignore: Sequence[str] = ()) -> list[Cluster]:  # fmt: skip
    """Give the families of fits (start, objective, optimiser coordinates): scipy's
    average-linkage clusters cut at ``cut``, best family first, numbered from ``first_id``."""
    if not found:
        return []
    return families_of(
        problem,
        np.array([n for n, _, _ in found], dtype=int),
        np.array([v for _, v, _ in found], dtype=float),
        np.array([t for _, _, t in found], dtype=float),
        cut,
        first_id=first_id,
        ignore=ignore,
    )


def natural_values(problem: FitProblem, coordinates: np.ndarray) -> np.ndarray:
    """Give the free parameters' natural values, one row per row of optimiser coordinates
    (the columns of ``problem.to_natural`` in the order of ``problem.free``)."""
    logged = np.array([p.log for p in problem.free], dtype=bool)
    typical = np.asarray(problem.typical, dtype=float)
    return np.where(logged, np.exp(np.where(logged, coordinates, 0.0)), coordinates * typical)


def families_of(problem: FitProblem, starts: np.ndarray, values: np.ndarray,
                coordinates: np.ndarray, cut: float, first_id: int = 1,
                ignore: Sequence[str] = ()) -> list[Cluster]:  # fmt: skip
    """Give the families of fits given as arrays (start numbers, objectives, one row of
    optimiser coordinates per fit); as ``families``, without a Python object per fit."""
    if len(starts) == 0:
        return []
    free = [p.name for p in problem.free]
    used = np.array([p.name not in ignore for p in problem.free], dtype=bool)
    if not used.any():
        used[:] = True
    labels = _labels(coordinates[:, used], values, cut)
    groups = []
    for label in np.unique(labels):
        rows = np.flatnonzero(labels == label)
        natural = natural_values(problem, coordinates[rows])
        summary = {
            name: {"median": float(np.median(natural[:, j])), "min": float(natural[:, j].min()),
                   "max": float(natural[:, j].max())}
            for j, name in enumerate(free)
        }  # fmt: skip
        best = rows[int(np.argmin(values[rows]))]
        groups.append((float(values[best]), len(rows), summary, [int(n) for n in starts[rows]],
                       np.median(coordinates[rows], axis=0), coordinates[best].copy()))  # fmt: skip
    # best first; families of equal objective (mirror optima) in the order of their centres, so
    # the numbering does not depend on which start found which
    groups.sort(key=lambda g: (round(g[0], 6), -g[1], tuple(np.round(g[4], 6))))
    return [
        Cluster(first_id + k, size, value, summary, members, centre=centre, best=best)
        for k, (value, size, summary, members, centre, best) in enumerate(groups)
    ]


def _candidates(problem: FitProblem, options: FitOptions) -> tuple[list[np.ndarray], str]:
    if options.global_search:
        return global_population(problem, options), "final population of the global search"
    return start_points(problem, options), "latin hypercube"


def ensemble(
    problem: FitProblem,
    options: FitOptions,
    *,
    threshold: float | None = None,
    cut: float = DEFAULT_CUT,
    workers: int = 1,
    progress: Callable[[int, int, str], None] | None = None,
    candidates: list[np.ndarray] | None = None,
    dask: str | None = None,
) -> EnsembleResult:
    """Give the ensemble of ``options.starts`` local fits (the spec's start and a Latin
    hypercube over the bounds, log scale where the spec says so; or the final population of a
    global search with ``options.global_search``; or the ``candidates`` given)."""
    if threshold is not None and not threshold > 0:
        raise InputError(f"--threshold {threshold}: expected a positive number (chi2 units)")
    if not cut > 0:
        raise InputError(f"--cut {cut}: expected a positive distance")
    if candidates is None and options.starts < 2:
        raise InputError(f"--starts {options.starts}: an ensemble needs at least 2 starts")
    free = [p.name for p in problem.free]
    if not free:
        raise InputError("every parameter is fixed; there is nothing to search")
    limit = float(stats.chi2.ppf(0.95, len(free))) if threshold is None else float(threshold)
    if workers < 1:
        raise InputError(f"--workers {workers}: expected at least 1 worker process")
    origin = "given starts"
    if candidates is None:
        candidates, origin = _candidates(problem, options)
    # every start in arrays (8 (p + 1) bytes each), not as one Python object per start
    starts = np.asarray(candidates, dtype=float).reshape(len(candidates), len(free))
    del candidates
    total = len(starts)
    objectives = np.full(total, math.nan)
    optima = np.full((total, len(free)), math.nan)
    errors: dict[int, str] = {}

    def collect(outcome: Outcome) -> None:
        number, value, theta, error = outcome
        if value is None or theta is None:
            errors[number] = error or "failed"
        else:
            objectives[number], optima[number] = value, theta

    unused = unused_parameters(problem, starts[0])
    _, executor = refine(problem, starts, options, workers, progress, dask=dask, collect=collect)
    failed = [{"start": number, "error": errors[number]} for number in sorted(errors)]
    if progress is not None:
        progress(total, total, "starts")
    done = np.flatnonzero(np.isfinite(objectives))
    if not len(done):
        raise InputError(
            "no start finished: "
            + "; ".join(f"start {f['start']}: {f['error']}" for f in failed[:3])
        )
    best_row = done[int(np.argmin(objectives[done]))]
    best_value = float(objectives[best_row])
    kept = done[objectives[done] - best_value <= limit]
    beyond = done[objectives[done] - best_value > limit]
    clusters = families_of(problem, kept, objectives[kept], optima[kept], cut, ignore=unused)
    rejected = families_of(problem, beyond, objectives[beyond], optima[beyond], cut,
                           first_id=len(clusters) + 1, ignore=unused)[:MAX_REJECTED]  # fmt: skip
    return EnsembleResult(
        starts=total,
        failed=failed,
        threshold=limit,
        best_objective=best_value,
        best_parameters={
            k: v for k, v in problem.to_natural(optima[best_row]).items() if k in free
        },
        accepted=len(kept),
        clusters=clusters,
        plateaus=_plateaus(objectives[kept].tolist()),
        objectives=np.sort(objectives[done]).tolist(),
        cut=cut,
        objective="2 nllh" if problem.noise_model else "chi2",
        kept_starts=kept,
        kept_objectives=objectives[kept],
        executor=executor,
        rejected=rejected,
        kept_theta=optima[kept],
        origin=origin,
        notes=[
            f"{', '.join(unused)} change{'s' if len(unused) == 1 else ''} no residual: the model "
            "does not read "
            f"{'it' if len(unused) == 1 else 'them'}; fix {'it' if len(unused) == 1 else 'them'} "
            "in the spec (families are told apart without it)"
        ]
        if unused
        else [],
        names=free,
        kept_natural=natural_values(problem, optima[kept]),
    )
