"""Leave-one-group-out sensitivity of a fit: exact refits or one-step screening, jackknife.

For each group g (a dataset, a lab, a condition value) the fit is repeated without g's rows:

- exact: least squares on the remaining rows, warm-started at the full optimum. Scale factors
  of the held-out group's relative data leave with it (they are projected out per group).
- one-step: one Gauss-Newton step from the full optimum using the remaining rows,
  delta = -(J_r^T J_r)^-1 J_r^T r_r. For a linear model this is exact and equals the
  group-deletion formula delta_beta = (X'WX)^-1 X_g' W_g (I - H_gg)^-1 e_g.
- auto: the one-step screen for every group, then exact refits of the groups it cannot settle:
  a screened shift or Cook distance within a factor AUTO_MARGIN (2) of its flag threshold, or a
  step along which the quadratic model fails (the actual change of the remaining rows' objective
  differs from the model's prediction by more than AUTO_MODEL_MISMATCH, 25 %, of it). The
  result's ``auto`` names each refitted group and why.

Per group: each parameter's shift in units of its full-fit standard error, the Cook-type
distance D_g = dtheta' C^-1 dtheta / p (Cook 1977, for groups), the held-out chi2 and dof of
the group under the fit without it, and plain-words flags. Over groups: the delete-one-group
jackknife standard error sqrt((G-1)/G * sum (theta_g - mean)^2).

Thresholds (common practice, no single source): a shift beyond 2 standard errors, and a Cook
distance above 1 (the usual rule of thumb for Cook's D), are flagged.

A group whose removal leaves some parameters unidentifiable is flagged too: a parameter with no
data left (it acts only on the held-out rows, as a PEtab problem's noise parameter of one
dataset does) cannot move the rest's optimum, so the refit holds it at its full-fit value and
reports it as not identified without the group; where the remaining data determine fewer parameter
combinations than the full data (the Jacobian at the full optimum loses rank, e.g. one of two
doses left out of a dose-response model), the refit runs and the flag names the parameters
whose shifts mean little, with the condition that no longer varies in training.
"""

from __future__ import annotations

import dataclasses
import math
import multiprocessing
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit.backends import ModelBackend, rebuild
from curate.fit.engine import FitOptions, FitResult, covariance_from_jacobian, least_squares
from curate.fit.engine import jacobian as fitting_jacobian
from curate.fit.polish import accurate_jacobian
from curate.fit.problem import FitProblem
from curate.fit.spec import ParameterSpec
from curate.weighting.splitters import training_gaps
from curate.weighting.table import STANDARD_COLUMNS

__all__ = [
    "DEFAULT_COOK_THRESHOLD",
    "DEFAULT_SHIFT_THRESHOLD",
    "MIN_JACKKNIFE_GROUPS",
    "GroupResult",
    "SensitivityResult",
    "dask_client",
    "jackknife_stderr",
    "leave_one_group_out",
    "leave_one_group_out_external",
    "small_directions",
]

DEFAULT_SHIFT_THRESHOLD = 2.0
DEFAULT_COOK_THRESHOLD = 1.0
# a delete-one-group jackknife over fewer groups than this gets a caveat beside its standard
# errors: common practice (the jackknife variance is itself very uncertain with few groups),
# not a published rule
MIN_JACKKNIFE_GROUPS = 5
# a parameter direction counts as lost when its singular value, every column scaled by its
# full-data norm, falls below this fraction of the largest: finite-difference Jacobians of ODE
# models carry relative errors of about this size (common practice, no source)
_RANK_TOLERANCE = 1e-3


@dataclass
class GroupResult:
    """What leaving one group out does to the fit."""

    group: str
    n_points: int
    parameters: dict[str, dict[str, float | None]]
    cook_distance: float | None
    heldout_chi2: float | None
    heldout_dof: int | None
    flags: list[str]
    converged: bool = True
    error: str | None = None

    @classmethod
    def failed(cls, group: str, n_points: int, flag: str, error: str | None) -> GroupResult:
        """Give the row of a group whose refit could not be made."""
        return cls(group, n_points, {}, None, None, None, [flag], False, error)

    def to_dict(self) -> dict[str, Any]:
        """Give the row in the JSON shape of ``curate sensitivity --json``."""
        return {
            "group": self.group,
            "n_points": self.n_points,
            "parameters": self.parameters,
            "cook_distance": self.cook_distance,
            "heldout_chi2": self.heldout_chi2,
            "heldout_dof": self.heldout_dof,
            "flags": self.flags,
            "converged": self.converged,
            "error": self.error,
        }


@dataclass
class SensitivityResult:
    """The full fit, every group's refit, and the jackknife standard errors."""

    full: FitResult | dict[str, Any]
    by: str
    method: str
    groups: list[GroupResult]
    jackknife_stderr: dict[str, float | None]
    shift_threshold: float
    cook_threshold: float
    policies: list[dict[str, Any]] = field(default_factory=list)
    executor: str = "serial"
    # the profiles without each group (``--profiles``): see curate.fit.deciding
    profiles: dict[str, Any] | None = None
    # the ensemble's families without each group (``--ensemble``): see curate.fit.families
    families: dict[str, Any] | None = None
    # --method auto: which groups were refitted exactly and why ({"refitted": {group: why},
    # "screened": n, "groups": n})
    auto: dict[str, Any] | None = None

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> SensitivityResult:
        """Give a result back from its plain-data form (as recorded in the catalog)."""
        groups = [
            GroupResult(
                group=g["group"], n_points=g["n_points"], parameters=g["parameters"], cook_distance=g["cook_distance"],
                heldout_chi2=g["heldout_chi2"], heldout_dof=g["heldout_dof"], flags=list(g["flags"]),
                converged=g.get("converged", True), error=g.get("error"),
            )
            for g in data["groups"]
        ]  # fmt: skip
        return cls(
            full=data["full"], by=data["by"], method=data["method"], groups=groups,
            jackknife_stderr=data["jackknife_stderr"], shift_threshold=data["shift_threshold"],
            cook_threshold=data["cook_threshold"], policies=data.get("policies", []), executor=data.get("executor", ""),
            profiles=data.get("profiles"), families=data.get("families"), auto=data.get("auto"),
        )  # fmt: skip

    def flags(self) -> list[str]:
        """Give every plain-words flag."""
        return [flag for g in self.groups for flag in g.flags]

    def unjudged(self) -> list[str]:
        """Give the parameters whose shifts cannot be judged: the full fit gave no standard error."""
        full = self.full.to_dict() if isinstance(self.full, FitResult) else self.full
        return [n for n, p in full["parameters"].items() if p.get("stderr") is None
                and any(n in g.parameters for g in self.groups)]  # fmt: skip

    def notes(self) -> list[str]:
        """Give the caveats that go with the numbers (a jackknife over few groups, failed
        refits, parameters without a standard error)."""
        notes = []
        used = sum(1 for g in self.groups if g.error is None)
        if 2 <= used < MIN_JACKKNIFE_GROUPS:
            notes.append(
                f"the jackknife standard errors come from only {used} groups: treat them as "
                f"rough (fewer than {MIN_JACKKNIFE_GROUPS} groups; common practice, not a "
                "published rule)"
            )
        failed = len(self.groups) - used
        if failed:
            notes.append(
                f"{failed} of {len(self.groups)} refits failed: nothing is known of what "
                "leaving those groups out does, and the jackknife uses only the others"
            )
        unjudged = self.unjudged()
        if unjudged:
            notes.append(
                f"the full fit gave no standard error for {', '.join(unjudged)}: their shifts "
                "cannot be judged in SE, so no flag can say whether they depend on one group "
                "(their relative changes are shown instead)"
            )
        return notes

    def to_dict(self) -> dict[str, Any]:
        """Give the JSON shape scripts rely on."""
        full = self.full.to_dict() if isinstance(self.full, FitResult) else self.full
        return {
            "full": full,
            "by": self.by,
            "method": self.method,
            "groups": [g.to_dict() for g in self.groups],
            "jackknife_stderr": self.jackknife_stderr,
            "shift_threshold": self.shift_threshold,
            "cook_threshold": self.cook_threshold,
            "policies": self.policies,
            "executor": self.executor,
            "notes": self.notes(),
            **({"profiles": self.profiles} if self.profiles is not None else {}),
            **({"families": self.families} if self.families is not None else {}),
            **({"auto": self.auto} if self.auto is not None else {}),
        }


def group_order(label: str) -> tuple[int, float, str]:
    """Give a sort key that puts numeric group labels (doses, temperatures) in numeric order
    (0.1, 0.3, 1, 3, 10, 30), before the other labels in text order."""
    try:
        number = float(label)
    except ValueError:
        return (1, 0.0, label)
    return (0, number, label) if math.isfinite(number) else (1, 0.0, label)


def jackknife_stderr(
    values: Sequence[dict[str, float]], names: Sequence[str]
) -> dict[str, float | None]:
    """Give the delete-one-group jackknife SE, sqrt((G-1)/G * sum (theta_g - mean)^2), per name."""
    out: dict[str, float | None] = {}
    for name in names:
        column = np.array(
            [v[name] for v in values if name in v and v[name] is not None], dtype=float
        )
        g = len(column)
        out[name] = (
            float(math.sqrt((g - 1) / g * np.sum((column - column.mean()) ** 2)))
            if g >= 2
            else None
        )
    return out


@dataclass(frozen=True)
class _Task:
    """One refit, in a form that pickles into a worker process or a Dask worker."""

    group: str
    keep: np.ndarray
    theta0: np.ndarray
    backend: ModelBackend | None  # in process, or pickled as it is
    description: dict[str, Any] | None  # a portable backend is rebuilt from this in the worker
    points: Any
    spec: ParameterSpec
    options: FitOptions

    @classmethod
    def of(cls, problem: FitProblem, group: str, keep: np.ndarray, theta0: np.ndarray,
           options: FitOptions, *, in_worker: bool, held: Sequence[str] = ()) -> _Task:  # fmt: skip
        """Give the task of one refit; a portable backend travels as its description.

        ``held`` parameters (no data left) are held at their values in ``theta0``.
        """
        backend = problem.backend
        spec, theta0 = _holding(problem, theta0, held)
        if in_worker and backend.portable:
            return cls(group, keep, theta0, None, backend.describe(), problem.points, spec, options)
        return cls(group, keep, theta0, backend, None, problem.points, spec, options)


def _holding(problem: FitProblem, theta: np.ndarray,
             held: Sequence[str]) -> tuple[ParameterSpec, np.ndarray]:  # fmt: skip
    """Give the spec with ``held`` parameters fixed at their values in ``theta``, and the
    optimiser vector of the others (their internal scaling is unchanged)."""
    if not held:
        return problem.spec, theta
    natural = problem.to_natural(theta)
    spec = dataclasses.replace(problem.spec, parameters=tuple(
        dataclasses.replace(p, start=natural[p.name], fixed=True) if p.name in held else p
        for p in problem.spec.parameters
    ))  # fmt: skip
    free = np.array([p.name not in held for p in problem.free])
    return spec, theta[free]


def _exact_refit(task: _Task) -> tuple[str, np.ndarray | None, np.ndarray | None, bool, str | None]:
    """Give (group, theta, jacobian, converged, error) for one exact refit (runs in a worker)."""
    backend = task.backend if task.backend is not None else rebuild(task.description or {})
    problem = FitProblem(task.points, backend, task.spec)
    try:
        solution = least_squares(problem, task.theta0, task.options, rows=task.keep)
        theta = _polish(problem, np.asarray(solution.x), task.keep)
    except InputError as err:
        return task.group, None, None, False, str(err)
    except ArithmeticError:  # a log parameter ran off to infinity: exp() overflowed
        return task.group, None, None, False, "the parameters ran off to infinity"
    return task.group, theta, np.asarray(solution.jac), bool(solution.success), None


def _polish(problem: FitProblem, theta: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Give theta after one Gauss-Newton step with a central-difference Jacobian, if it helps.

    The optimiser stops on its tolerances with forward-difference Jacobians; one accurate step
    makes a linear model's refit exact and sharpens a nonlinear one.
    """
    lower, upper = problem.bounds()
    residual = problem.residual(theta, rows)
    j = fitting_jacobian(problem, theta, rows)
    candidate = theta - covariance_from_jacobian(j) @ (j.T @ residual)
    if np.any(candidate < lower) or np.any(candidate > upper):
        return theta
    try:
        better = problem.residual(candidate, rows)
    except InputError:
        return theta
    # accept unless it is clearly worse: near the optimum both costs agree to rounding
    return candidate if better @ better <= (residual @ residual) * (1 + 1e-9) else theta


# what starting a worker process costs before its first refit (spawn, import curate and its
# libraries, rebuild the model; an SBML model is compiled again): about 2 s on 2 cores
WORKER_START_SECONDS = 2.0


def _run_tasks(tasks: list[_Task], *, workers: int, dask: str | None,
               progress: Callable[[int, int], None] | None) -> tuple[list[Any], str]:  # fmt: skip
    if dask is not None:
        return _run_on_dask(tasks, dask, progress), f"dask ({dask})"
    if workers <= 1 or len(tasks) <= 1:
        results = []
        for done, task in enumerate(tasks):
            results.append(_exact_refit(task))
            if progress:
                progress(done + 1, len(tasks))
        return results, "serial"
    # the first refit runs here: if the others would finish sooner here than on workers that
    # must first start (import curate, rebuild the model), they run here too
    started = time.perf_counter()
    results = [_exact_refit(tasks[0])]
    took = time.perf_counter() - started
    if progress:
        progress(1, len(tasks))
    rest = tasks[1:]
    here = took * len(rest)
    if here <= WORKER_START_SECONDS + here / min(workers, len(rest)):
        for done, task in enumerate(rest):
            results.append(_exact_refit(task))
            if progress:
                progress(done + 2, len(tasks))
        return results, (f"serial: a refit takes {took:.2g} s, less than starting "
                         f"{workers} worker processes would")  # fmt: skip
    # spawn, not fork: a forked child can inherit a lock held by another thread (pyarrow's
    # pool, SQLite) and hang; spawned workers start clean and import the model themselves
    with ProcessPoolExecutor(
        max_workers=workers, mp_context=multiprocessing.get_context("spawn")
    ) as pool:
        for done, result in enumerate(pool.map(_exact_refit, rest)):
            results.append(result)
            if progress:
                progress(done + 2, len(tasks))
    return results, f"process pool ({workers} workers)"


@contextmanager
def dask_client(address: str) -> Iterator[Any]:
    """Give a Dask distributed client: a two-worker LocalCluster for ``local``, else the
    scheduler at ``address``; closed (with the cluster) afterwards."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise InputError(
            "--dask needs the dask distributed package: pip install 'curate[dask]'"
        ) from None
    cluster = None
    try:
        if address == "local":
            cluster = LocalCluster(
                n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
            )
            client = Client(cluster)
        else:
            client = Client(address, timeout=30)
    except OSError as err:
        raise InputError(f"--dask {address}: cannot reach the scheduler ({err})") from None
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _run_on_dask(
    tasks: list[_Task], address: str, progress: Callable[[int, int], None] | None
) -> list[Any]:
    with dask_client(address) as client:
        futures = client.map(_exact_refit, tasks, pure=False)
        results = client.gather(futures)
        if progress:
            progress(len(tasks), len(tasks))
        return list(results)


def leave_one_group_out(
    problem: FitProblem,
    full: FitResult,
    labels: np.ndarray,
    *,
    by: str,
    method: str = "exact",
    options: FitOptions | None = None,
    workers: int = 1,
    dask: str | None = None,
    shift_threshold: float = DEFAULT_SHIFT_THRESHOLD,
    cook_threshold: float = DEFAULT_COOK_THRESHOLD,
    progress: Callable[[int, int], None] | None = None,
) -> SensitivityResult:
    """Give the leave-one-group-out sensitivity of ``full`` (a fit of ``problem``)."""
    if method not in ("exact", "one-step", "auto"):
        raise InputError(f"--method {method}: expected exact, one-step or auto")
    if shift_threshold <= 0:
        raise InputError(
            f"--threshold {shift_threshold}: expected a positive number of standard errors"
        )
    options = options or FitOptions()
    labels = np.asarray(labels).astype(str)
    unique = sorted(set(labels.tolist()), key=group_order)
    if len(unique) < 2:
        raise InputError(
            f"--by {by}: the selection has only one group ({unique[0] if unique else 'none'}); nothing to leave out"
        )
    theta = full.theta
    jacobian = fitting_jacobian(problem, theta)
    residual = problem.residual(theta)
    names = full.free
    natural_full = problem.to_natural(theta)
    stderr = {n: full.parameters[n]["stderr"] for n in names}
    inverse_cov = np.linalg.pinv(full.covariance)
    plans: dict[str, tuple[np.ndarray, np.ndarray, str | None]] = {}
    holding: dict[str, list[str]] = {}  # group -> parameters with no data left without it
    moving: dict[str, np.ndarray] = {}  # group -> mask of the other parameters (refitted)
    weak: dict[str, str] = {}  # group -> the flag of parameters the rest no longer identify
    conditions = [c for c in problem.points.columns if c not in STANDARD_COLUMNS]
    already_lost = small_directions(jacobian, np.arange(len(jacobian)))[0]
    for group in unique:
        held = labels == group
        keep = np.flatnonzero(~held)
        kept_rows = problem.residual_index(keep)  # a noise model has two residuals per point
        holding[group] = _without_data(jacobian, kept_rows, names)
        moving[group] = np.array([n not in holding[group] for n in names], dtype=bool)
        ident = np.flatnonzero(moving[group])
        gap = _too_few(len(keep), len(ident))
        plans[group] = (keep, np.flatnonzero(held), gap)
        if gap is None:
            lost, weights = small_directions(jacobian[:, ident], kept_rows)
            if lost > already_lost:
                involved = [
                    names[k]
                    for k, w in zip(ident, weights[: lost - already_lost].sum(axis=0), strict=True)
                    if w > 0.1
                ]
                why = [f"{gap.name} takes one value ({gap.value}) in training" for gap in training_gaps(
                    problem.points.iloc[keep], problem.points.iloc[held], condition_columns=conditions,
                ) if gap.kind == "single"]  # fmt: skip
                weak[group] = (
                    f"without {by} {group} the rest no longer identifies {', '.join(involved)} "
                    f"({lost - already_lost} combination(s) lost" + "".join(f"; {w}" for w in why)
                    + "): their shifts mean little"
                )  # fmt: skip
    refits: dict[str, tuple[np.ndarray | None, bool, str | None]] = {}
    executor = "no refits"
    exact = [group for group, (_, _, gap) in plans.items() if gap is None]
    screened: dict[str, str] = {}  # group -> why auto refits it exactly
    screened_note: dict[str, Any] | None = None
    if method != "exact":
        # auto judges each screen by its numbers: it takes them from the polish's Jacobian
        # (complex step, or fourth-order differences whose larger steps stand above an ODE
        # solver's noise, where second-order ones of eps^(1/3) do not)
        steps_jacobian = accurate_jacobian(problem, theta)[0] if method == "auto" else jacobian
        for done, (group, (keep, _, gap)) in enumerate(plans.items()):
            if gap is None:
                kept_rows = problem.residual_index(keep)
                mask = moving[group]
                j, r = steps_jacobian[np.ix_(kept_rows, mask)], residual[kept_rows]
                step = np.zeros(len(theta))
                if group in weak:  # step only along the directions the rest still determines
                    step[mask] = -_determined_step(j, r)
                else:
                    step[mask] = -covariance_from_jacobian(j) @ (j.T @ r)
                refits[group] = (theta + step, True, None)
                if method == "auto":
                    reason = _screen(problem, theta, step, keep, steps_jacobian[kept_rows], r,
                                     _Limits(names, stderr, natural_full, inverse_cov, mask,
                                             shift_threshold, cook_threshold))  # fmt: skip
                    if reason is not None:
                        screened[group] = reason
            if progress and method == "one-step":
                progress(done + 1, len(plans))
        exact = list(screened)
    if exact:
        in_worker = dask is not None or workers > 1
        tasks = [
            _Task.of(problem, group, plans[group][0], theta, options, in_worker=in_worker,
                     held=holding[group])
            for group in exact
        ]  # fmt: skip
        results, executor = _run_tasks(tasks, workers=workers, dask=dask, progress=progress)
        for group, new_theta, _, converged, error in results:
            if new_theta is not None and holding[group]:  # back to the full vector
                full_theta = theta.copy()
                full_theta[moving[group]] = new_theta
                new_theta = full_theta
            refits[group] = (new_theta, converged, error)
    if method == "auto":
        screened_note = {"refitted": screened, "screened": len(refits), "groups": len(plans)}
        executor = (f"auto: {len(screened)} of {len(refits)} groups refitted exactly"
                    + (f" ({executor})" if screened else ""))  # fmt: skip
        if progress and not screened:
            progress(len(plans), len(plans))
    groups = []
    for group, (_, held, gap) in plans.items():
        if gap is not None:
            groups.append(
                GroupResult.failed(group, len(held), f"leaving out {by} {group} {gap}", gap)
            )
            continue
        new_theta, converged, error = refits[group]
        if new_theta is None:
            failed = GroupResult.failed(
                group, len(held), f"refit without {by} {group} failed: {error}", error
            )
            if group in weak:
                failed.flags.insert(0, weak[group])
            groups.append(failed)
            continue
        natural = problem.to_natural(new_theta)
        delta = np.array([natural[n] - natural_full[n] for n in names])
        parameters: dict[str, dict[str, float | None]] = {}
        flags = []
        for k, name in enumerate(names):
            if name in holding[group]:  # not identified without the group: nothing to report
                parameters[name] = {"value": None, "shift_se": None}
                continue
            se = stderr[name]
            shift = float(delta[k] / se) if se else None
            parameters[name] = {"value": natural[name], "shift_se": shift}
            if shift is not None and abs(shift) > shift_threshold:
                flags.append(f"{name} depends on {by} {group}: shifts {shift:+.1f} SE without it")
        # over the parameters the rest identifies (the held ones do not move)
        mask = moving[group]
        block = inverse_cov[np.ix_(mask, mask)]
        cook = float(delta[mask] @ block @ delta[mask] / max(1, int(mask.sum())))
        if cook > cook_threshold:
            flags.append(
                f"the fit as a whole depends on {by} {group}: Cook distance {cook:.2f} (> {cook_threshold:g})"
            )
        if group in weak:
            flags.insert(0, weak[group])
        if holding[group]:
            flags.insert(0, (
                f"leaving out {by} {group} leaves {', '.join(holding[group])} with no data: held "
                "at the full-fit value in the refit (not identified without it; the held-out chi2 "
                "uses that value, fitted with the group)"
            ))  # fmt: skip
        held_residual = problem.point_residual(new_theta, held)
        heldout_chi2 = float(held_residual @ held_residual)
        heldout_dof = len(held) - problem.n_scale_factors(held)
        if not converged:
            flags.append(f"the refit without {by} {group} did not converge")
        groups.append(
            GroupResult(
                group, len(held), parameters, cook, heldout_chi2, heldout_dof, flags, converged
            )
        )
    good = [{n: g.parameters[n]["value"] for n in g.parameters} for g in groups if g.error is None]
    return SensitivityResult(
        full=full, by=by, method=method, groups=groups, jackknife_stderr=jackknife_stderr(good, names),  # type: ignore[arg-type]
        shift_threshold=shift_threshold, cook_threshold=cook_threshold, executor=executor,
        auto=screened_note,
    )  # fmt: skip


# --method auto refits a group exactly when its one-step screen comes within this factor of a
# flag threshold, or when the quadratic model's predicted change of the objective misses the
# actual change by more than this fraction of it (common practice in trust-region methods,
# which judge a step by actual / predicted reduction; the numbers are ours)
AUTO_MARGIN = 2.0
AUTO_MODEL_MISMATCH = 0.25


@dataclass(frozen=True)
class _Limits:
    """What a one-step screen is judged against."""

    names: Sequence[str]
    stderr: dict[str, float | None]
    natural_full: dict[str, float]
    inverse_covariance: np.ndarray
    moving: np.ndarray
    shift_threshold: float
    cook_threshold: float


def _screen(problem: FitProblem, theta: np.ndarray, step: np.ndarray, keep: np.ndarray,
            jacobian: np.ndarray, residual: np.ndarray, limits: _Limits) -> str | None:  # fmt: skip
    """Give why a group's one-step screen cannot be trusted (it comes within AUTO_MARGIN of a
    flag threshold, or the quadratic model does not hold along the step), or None."""
    natural = problem.to_natural(theta + step)
    delta = np.array([natural[n] - limits.natural_full[n] for n in limits.names])
    for k, name in enumerate(limits.names):
        se = limits.stderr[name]
        if se and abs(delta[k] / se) * AUTO_MARGIN > limits.shift_threshold:
            return f"{name} shifts {delta[k] / se:+.2f} SE in the screen"
    mask = limits.moving
    block = limits.inverse_covariance[np.ix_(mask, mask)]
    cook = float(delta[mask] @ block @ delta[mask] / max(1, int(mask.sum())))
    if cook * AUTO_MARGIN > limits.cook_threshold:
        return f"Cook distance {cook:.2f} in the screen"
    change = jacobian @ step
    predicted = 2 * float(residual @ change) + float(change @ change)
    try:
        moved = problem.residual(theta + step, keep)
    except (InputError, ArithmeticError):
        return "the model fails at the screened point"
    actual = float(moved @ moved) - float(residual @ residual)
    if abs(actual - predicted) > AUTO_MODEL_MISMATCH * abs(predicted) + 1e-12 * float(
        residual @ residual
    ):
        return (
            f"the objective changes by {actual:.4g} where the quadratic model says {predicted:.4g}"
        )
    return None


def _determined_step(j: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Give the least-squares step (J^T J)^+ J^T r restricted to the directions J determines
    (singular values above the rank tolerance, columns scaled), so a lost direction adds none."""
    norm = np.linalg.norm(j, axis=0)
    norm = np.where(norm > 0, norm, 1.0)
    u, singular, vt = np.linalg.svd(j / norm, full_matrices=False)
    keep = singular >= _RANK_TOLERANCE * singular[0]
    scaled_step = vt[keep].T @ ((u[:, keep].T @ r) / singular[keep])
    return np.asarray(scaled_step / norm, dtype=float)


def small_directions(jacobian: np.ndarray, keep: np.ndarray) -> tuple[int, np.ndarray]:
    """Give (how many parameter directions the kept rows barely determine, each parameter's
    squared share in them, one row per direction, smallest first)."""
    norm = np.linalg.norm(jacobian, axis=0)
    scaled = jacobian[keep] / np.where(norm > 0, norm, 1.0)
    _, singular, vt = np.linalg.svd(scaled, full_matrices=False)
    small = singular < _RANK_TOLERANCE * (singular[0] if len(singular) else 0.0)
    count = int(small.sum()) + max(0, jacobian.shape[1] - len(singular))
    return count, (vt[::-1] ** 2)


def _without_data(jacobian: np.ndarray, keep: np.ndarray, names: Sequence[str]) -> list[str]:
    """Give the parameters the kept residual rows do not depend on at all (no data left)."""
    full_norm = np.linalg.norm(jacobian, axis=0)
    kept_norm = np.linalg.norm(jacobian[keep], axis=0) if len(keep) else np.zeros(len(names))
    return [
        n for n, a, b in zip(names, full_norm, kept_norm, strict=True) if a > 0 and b <= 1e-10 * a
    ]


def _too_few(points: int, parameters: int) -> str | None:
    """Give a reason if the kept points cannot determine the parameters left, else None."""
    if points <= parameters:
        return f"leaves {points} points for {parameters} parameters"
    return None


def leave_one_group_out_external(backend: ModelBackend, table: pd.DataFrame, labels: np.ndarray, *, by: str,
                                 workdir: Path, threshold: float = DEFAULT_SHIFT_THRESHOLD,
                                 progress: Callable[[int, int], None] | None = None) -> SensitivityResult:  # fmt: skip
    """Give the leave-one-group-out check of a backend that fits itself (an external fitter).

    The shifts are in units of the standard errors the fitter reported on the full data; there
    are no Cook distances or held-out chi2 (the fitter's objective is its own).
    """
    full = backend.fit_points(table, folder=workdir / "full", group="full")
    if full.error is not None:
        raise InputError(f"--fitter-cmd on the full data: {full.error}")
    groups = []
    unique = sorted(set(labels.astype(str).tolist()), key=group_order)
    names = sorted(full.parameters)
    for done, group in enumerate(unique):
        keep = labels.astype(str) != group
        safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in group)
        fold = backend.fit_points(table[keep], folder=workdir / f"without_{safe}", group=group)
        if progress:
            progress(done + 1, len(unique))
        if fold.error is not None:
            groups.append(
                GroupResult.failed(
                    group,
                    int((~keep).sum()),
                    f"fold without {by} {group} failed: {fold.error}",
                    fold.error,
                )
            )
            continue
        parameters: dict[str, dict[str, float | None]] = {}
        flags = []
        for name in names:
            value = fold.parameters.get(name)
            se = full.stderr.get(name)
            shift = (value - full.parameters[name]) / se if (value is not None and se) else None
            parameters[name] = {"value": value, "shift_se": shift}
            if shift is not None and abs(shift) > threshold:
                flags.append(f"{name} depends on {by} {group}: shifts {shift:+.1f} SE without it")
        groups.append(GroupResult(group, int((~keep).sum()), parameters, None, None, None, flags))
    good = [{n: g.parameters[n]["value"] for n in g.parameters} for g in groups if g.error is None]
    full_dict: dict[str, Any] = {"parameters": {n: {"value": v, "stderr": full.stderr.get(n)} for n, v in full.parameters.items()},
                 "scale_factors": {}, "chi2": None, "dof": None, "n_points": len(table), "converged": True,
                 "starts": [], "fitter": backend.describe().get("command", backend.label), "workdir": str(workdir)}  # fmt: skip
    return SensitivityResult(
        full=full_dict, by=by, method="external", groups=groups,
        jackknife_stderr=jackknife_stderr(good, names),  # type: ignore[arg-type]
        shift_threshold=threshold, cook_threshold=DEFAULT_COOK_THRESHOLD, executor=backend.label,
    )  # fmt: skip
