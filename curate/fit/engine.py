"""Weighted least squares on the weighted long table. Pure computation (no catalog, no files).

Residual of point i:  r_i = sqrt(w_i) * (y_i - s_g * f_i(theta)),  objective sum r_i^2.
Scale factors s_g (one per calibration group of relative-unit data) mean data = s x model, and
are reported by calibration group.

- The model is any :class:`~curate.fit.backends.ModelBackend` (one prediction per row), the
  parameters a :class:`~curate.fit.spec.ParameterSpec`, the residual with its projected scale
  factors a :class:`~curate.fit.problem.FitProblem`.
- scipy.optimize.least_squares (trust-region reflective) with bounds; multi-start from a Latin
  hypercube (scipy.stats.qmc) inside the bounds, best kept, every start reported; optional
  global search by differential evolution (Storn & Price 1997) polished by least_squares.
- Covariance (J^T J)^-1 from the Jacobian of the projected residual at the optimum, mapped to
  natural parameters (dp = p d ln p for log parameters); optionally scaled by the reduced
  chi2 when the sigmas are only relative. With censored points each row is the Jacobian of
  z = sqrt(w) (y - s h) times the square root of its term's second derivative in z, so that
  J^T J is the curvature of the censored-normal objective (for a model linear in the
  parameters, the observed information exactly).
- A budget: ``max_evaluations`` caps the model evaluations of the search (global search and
  every start together, each Jacobian's finite differences counted; the global search stops
  after the generation that spends it, later starts get what is left); the final standard
  errors cost 2 p + 2 evaluations more (p free parameters); the polish runs only if at least
  8 p + 4 are left, and stays within them. ``generations`` caps the global search's
  generations (default 300). A fit stopped by its budget is reported as not converged, saying
  so.
- The polish (:mod:`curate.fit.polish`, on unless ``polish=False``): least_squares stops when
  the objective stops changing, which along a flat valley leaves the parameters four or five
  digits from the minimum; Gauss-Newton steps with a complex-step (or fourth-order difference)
  Jacobian then run until the scaled step or the projected gradient is below the tolerance, and
  the covariance uses that Jacobian. Skipped for a backend whose numbers are good only to a
  solver's tolerance (``accuracy`` above 4 eps): no finish beats the model's own noise.
  ``options['polished']`` says where it stopped and how the Jacobian was taken.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize
from scipy.stats import qmc

from curate.errors import InputError
from curate.fit.censored import censored_curvature
from curate.fit.polish import Polished, polish
from curate.fit.problem import FitProblem

__all__ = [
    "FitOptions",
    "FitResult",
    "covariance_from_jacobian",
    "evaluate_at_start",
    "fit",
    "jacobian",
    "least_squares",
    "start_points",
    "summarise",
]


@dataclass(frozen=True)
class FitOptions:
    """How to search."""

    starts: int = 1
    seed: int = 0
    global_search: bool = False
    scale_covariance: bool = False
    tolerance: float = 1e-10
    max_evaluations: int | None = None  # model evaluations of the whole fit (each refit apart)
    generations: int | None = None  # of the global search (None: 300)
    polish: bool = True  # finish with Gauss-Newton steps and an accurate Jacobian (see below)


@dataclass
class FitResult:
    """Everything a fit gives, each number with a documented meaning."""

    parameters: dict[str, dict[str, float | None]]
    scale_factors: dict[str, float]
    chi2: float
    dof: int
    n_points: int
    converged: bool
    starts: list[dict[str, Any]]
    covariance: np.ndarray  # natural coordinates of the free parameters, in spec order
    internal_covariance: np.ndarray
    theta: np.ndarray  # optimiser coordinates at the optimum
    free: list[str]
    message: str
    options: dict[str, Any]
    evaluations: int = 0  # every model evaluation of the fit, the final Jacobian's included
    nllh: float = float("nan")  # negative log-likelihood at the optimum (see FitProblem.nllh)
    objective: str = "chi2"  # what was minimised: 'chi2' (fixed weights) or 'nllh' (noise model)
    notes: list[str] = field(default_factory=list)  # what a reader of the numbers must know

    @property
    def reduced_chi2(self) -> float:
        """Give chi2 / dof (NaN without degrees of freedom)."""
        return self.chi2 / self.dof if self.dof > 0 else float("nan")

    def values(self) -> dict[str, float]:
        """Give the fitted values by name."""
        return {
            name: float(p["value"]) for name, p in self.parameters.items() if p["value"] is not None
        }

    def to_dict(self) -> dict[str, Any]:
        """Give the JSON shape scripts rely on (see ``curate fit --json``)."""
        return {
            "parameters": self.parameters,
            "scale_factors": self.scale_factors,
            "chi2": self.chi2,
            "nllh": self.nllh,
            "objective": self.objective,
            "dof": self.dof,
            "n_points": self.n_points,
            "converged": self.converged,
            "starts": self.starts,
            "reduced_chi2": self.reduced_chi2,
            "message": self.message,
            "options": self.options,
            "evaluations": self.evaluations,
            "notes": self.notes,
        }


def _start_points(problem: FitProblem, options: FitOptions) -> list[np.ndarray]:
    first = problem.to_internal({p.name: p.start for p in problem.free})
    if options.starts <= 1:
        return [first]
    lower, upper = problem.bounds()
    # sampling box: the bounds, or two decades (log) / a generous span (linear) around the start
    lo = np.where(
        np.isfinite(lower),
        lower,
        np.where(
            [p.log for p in problem.free],
            first - 2 * math.log(10),
            first - 10 * np.maximum(np.abs(first), 1),
        ),
    )
    hi = np.where(
        np.isfinite(upper),
        upper,
        np.where(
            [p.log for p in problem.free],
            first + 2 * math.log(10),
            first + 10 * np.maximum(np.abs(first), 1),
        ),
    )
    sampler = qmc.LatinHypercube(d=len(first), seed=options.seed)
    samples = qmc.scale(sampler.random(options.starts - 1), lo, hi)
    return [first, *list(samples)]


def start_points(problem: FitProblem, options: FitOptions) -> list[np.ndarray]:
    """Give the starts of a multi-start search: the spec's start, then ``options.starts - 1``
    Latin-hypercube points over the bounds (optimiser coordinates: log scale where asked)."""
    return _start_points(problem, options)


def _origin(number: int, options: FitOptions) -> str:
    """Give where start ``number`` came from: the global search, the spec's start, or the
    Latin hypercube."""
    if options.global_search:
        if number == 0:
            return "global search"
        number -= 1
    return "start" if number == 0 else "latin hypercube"


def least_squares(
    problem: FitProblem,
    x0: np.ndarray,
    options: FitOptions,
    rows: np.ndarray | None = None,
    *,
    max_evaluations: int | None = None,
) -> Any:
    """Give scipy's least_squares solution from ``x0`` (on the chosen rows).

    At most ``max_evaluations`` model evaluations (default: the options' budget).
    """
    budget = max_evaluations if max_evaluations is not None else options.max_evaluations
    lower, upper = problem.bounds()
    # least_squares wants a start strictly inside finite bounds
    inner_lower = np.where(
        np.isfinite(lower),
        lower + 1e-12 * np.maximum(1.0, np.abs(np.where(np.isfinite(lower), lower, 0.0))),
        -np.inf,
    )
    inner_upper = np.where(
        np.isfinite(upper),
        upper - 1e-12 * np.maximum(1.0, np.abs(np.where(np.isfinite(upper), upper, 0.0))),
        np.inf,
    )
    x0 = np.clip(x0, inner_lower, inner_upper)
    # Levenberg-Marquardt (MINPACK) where nothing is bounded: the most accurate on the NIST
    # problems; trust-region reflective where bounds must hold
    unbounded = not (np.isfinite(lower).any() or np.isfinite(upper).any())
    method = "lm" if unbounded and len(problem.y) >= len(x0) else "trf"
    # MINPACK's count includes the Jacobian's finite differences; trf's count leaves out the
    # len(x0) extra evaluations each Jacobian costs, so its cap is the budget over (1 + n)
    cap = budget if budget is None or method == "lm" else max(1, budget // (len(x0) + 1))
    # the noise residuals hold a constant n C (see curate.fit.likelihood): a relative tolerance
    # on the cost must be that much finer to mean the same on the nllh
    ftol = max(options.tolerance / 1000, 1e-15) if problem.noise_model else options.tolerance
    # forward differences: a step of sqrt(accuracy) balances truncation against the model's own
    # error (scipy's default assumes machine precision; an ODE solver's numbers are good to its
    # tolerance only, and smaller steps give a Jacobian of noise)
    accuracy = problem.backend.accuracy
    step = math.sqrt(accuracy) if accuracy > 4 * np.finfo(float).eps else None
    return optimize.least_squares(
        lambda theta: problem.residual(theta, rows), x0, bounds=(lower, upper), method=method,
        x_scale="jac", ftol=ftol, xtol=options.tolerance, gtol=options.tolerance,
        max_nfev=cap, diff_step=step,
    )  # fmt: skip


def jacobian(problem: FitProblem, theta: np.ndarray, rows: np.ndarray | None = None,
             *, raw: bool = False) -> np.ndarray:  # fmt: skip
    """Give the Jacobian of the projected residual by central differences (``raw``: of
    :meth:`FitProblem.residual` with ``raw``, censored points as plain z).

    Steps of eps^(1/3) relative size balance truncation and rounding (about 1e-10 relative
    error for smooth models), better than the optimiser's own forward differences; eps is the
    backend's accuracy (machine precision, or an ODE solver's relative tolerance).
    """
    accuracy = max(problem.backend.accuracy, float(np.finfo(float).eps))
    step = min(6e-6 * (accuracy / np.finfo(float).eps) ** (1 / 3), 1e-2) * np.maximum(
        1.0, np.abs(theta)
    )
    if len(theta) == 0:  # nothing free: no columns
        return np.zeros((len(problem.residual(theta, rows, raw=raw)), 0))
    columns = []
    centre: np.ndarray | None = None
    for k in range(len(theta)):
        e = np.zeros(len(theta))
        e[k] = step[k]
        plus, minus = (
            _try_residual(problem, theta + e, rows, raw),
            _try_residual(problem, theta - e, rows, raw),
        )
        if plus is not None and minus is not None:
            columns.append((plus - minus) / (2 * step[k]))
            continue
        # the model fails on one side (a bound where a steady state stops existing, say):
        # a one-sided difference, or no column at all (that parameter gets no standard error)
        if centre is None:
            centre = problem.residual(theta, rows, raw=raw)
        if plus is not None:
            columns.append((plus - centre) / step[k])
        elif minus is not None:
            columns.append((centre - minus) / step[k])
        else:
            columns.append(np.full(len(centre), np.nan))
    return np.column_stack(columns)


def _curvature_jacobian(problem: FitProblem, theta: np.ndarray, rows: np.ndarray | None,
                        codes: np.ndarray) -> np.ndarray:  # fmt: skip
    """Give the Jacobian of each point's z = sqrt(w) (y - s h), each row times the square root
    of its term's second derivative in z (1 for an observed point): J'J is then the curvature
    of the objective, as the Gauss-Newton J'J is for observed points alone."""
    z = problem.residual(theta, rows, raw=True)
    curvature = np.sqrt(censored_curvature(z, codes))
    return np.asarray(jacobian(problem, theta, rows, raw=True) * curvature[:, None], dtype=float)


def _try_residual(
    problem: FitProblem, theta: np.ndarray, rows: np.ndarray | None, raw: bool = False
) -> np.ndarray | None:
    try:
        return problem.residual(theta, rows, raw=raw)
    except InputError:
        return None


def covariance_from_jacobian(jacobian: np.ndarray) -> np.ndarray:
    """Give (J^T J)^-1 by SVD (pseudo-inverse where J is rank deficient); a column that could
    not be computed (NaN) gives NaN in its row and column."""
    if jacobian.shape[1] == 0:
        return np.zeros((0, 0))
    known = np.all(np.isfinite(jacobian), axis=0)
    if not known.all():
        covariance = np.full((jacobian.shape[1],) * 2, np.nan)
        if known.any():
            covariance[np.ix_(known, known)] = covariance_from_jacobian(jacobian[:, known])
        return covariance
    _, singular, vt = np.linalg.svd(jacobian, full_matrices=False)
    threshold = np.finfo(float).eps * max(jacobian.shape) * (singular[0] if len(singular) else 0.0)
    keep = singular > threshold
    inverse = np.zeros_like(singular)
    inverse[keep] = 1.0 / singular[keep] ** 2
    return np.asarray((vt.T * inverse) @ vt, dtype=float)


def summarise(problem: FitProblem, theta: np.ndarray, jacobian: np.ndarray, *, converged: bool, starts: list[dict[str, Any]],
              message: str, options: FitOptions, rows: np.ndarray | None = None) -> FitResult:  # fmt: skip
    """Give the FitResult at an optimum: values, standard errors, scale factors, chi2, dof."""
    residual = problem.point_residual(theta, rows)
    chi2 = float(residual @ residual)
    n_points = len(residual)
    nllh = problem.nllh(theta, rows)
    dof = n_points - len(theta) - problem.n_scale_factors(rows)
    codes = problem.censored if rows is None else problem.censored[rows]
    if codes.any() and not problem.noise_model:
        # censored terms: the Gauss-Newton J'J of sqrt(-2 log Phi) rows is not their curvature;
        # take each point's own second derivative along its z (exact for a model linear in theta)
        jacobian = _curvature_jacobian(problem, theta, rows, codes)
    internal = covariance_from_jacobian(jacobian)
    if options.scale_covariance and dof > 0:
        internal = internal * (chi2 / dof)
    natural = problem.to_natural(theta)
    derivative = np.array(
        [
            natural[p.name] if p.log else t
            for p, t in zip(problem.free, problem.typical, strict=True)
        ]
    )
    covariance = internal * np.outer(derivative, derivative)
    parameters: dict[str, dict[str, float | None]] = {}
    for k, p in enumerate(problem.free):
        variance = covariance[k, k]
        parameters[p.name] = {
            "value": natural[p.name],
            "stderr": float(math.sqrt(variance)) if variance > 0 else None,
        }
    for p in problem.spec.parameters:
        if p.fixed:
            parameters[p.name] = {"value": p.start, "stderr": None}
    # one per calibration group that has rows, by its name: data = s x model (PEtab's
    # scale_<group> parameters are the same numbers)
    scale_factors: dict[str, float] = {}
    if problem.scale_groups:
        scales = problem.scales(problem.predict(theta, rows), rows)
        present = set(problem.group_index(rows).tolist())
        scale_factors = {
            name: float(scales[k]) for k, name in enumerate(problem.scale_groups) if k in present
        }
    return FitResult(
        parameters=parameters, scale_factors=scale_factors, chi2=chi2, dof=dof, n_points=n_points,
        converged=converged, starts=starts, covariance=covariance, internal_covariance=internal, theta=theta,
        free=[p.name for p in problem.free], message=message, nllh=nllh,
        objective="nllh" if problem.noise_model else "chi2",
        options={"starts": options.starts, "seed": options.seed, "global_search": options.global_search,
                 "scale_covariance": options.scale_covariance, "tolerance": options.tolerance,
                 "max_evaluations": options.max_evaluations, "generations": options.generations,
                 "polish": options.polish},
    )  # fmt: skip


DEFAULT_GENERATIONS = 300


def evaluate_at_start(problem: FitProblem, options: FitOptions | None = None) -> FitResult:
    """Give the objective, chi2 and standard errors at the start point, without optimising."""
    options = options or FitOptions()
    first = problem.calls
    theta = problem.to_internal({p.name: p.start for p in problem.free})
    problem.residual(theta)  # a model that fails there says so at the start point itself
    result = summarise(problem, theta, jacobian(problem, theta), converged=False, starts=[],
                       message="evaluated at the start point; not optimised", options=options)  # fmt: skip
    result.options["evaluate"] = True
    result.evaluations = problem.calls - first
    return result


def _polishable(problem: FitProblem) -> bool:
    """Tell whether a polish can sharpen the fit: the model's numbers are good to machine
    precision (an ODE solver's tolerance bounds what any finish could reach; its backend says
    so with ``accuracy``)."""
    return problem.backend.accuracy <= 4 * float(np.finfo(float).eps) and len(problem.free) > 0


def fit(problem: FitProblem, options: FitOptions | None = None, *,
        progress: Callable[[int, int, str], None] | None = None) -> FitResult:  # fmt: skip
    """Give the best weighted least-squares fit over all starts (and the global search if asked).

    ``progress(done, total, stage)`` is called after each generation of the global search and
    after each start.
    """
    options = options or FitOptions()
    for name in ("max_evaluations", "generations"):
        value = getattr(options, name)
        if value is not None and value < 1:
            raise InputError(f"{name} = {value}: expected at least 1")
    if len(problem.y) <= len(problem.free):
        raise InputError(
            f"{len(problem.y)} points cannot determine {len(problem.free)} free parameters"
        )
    budget = options.max_evaluations
    first = problem.calls  # every model evaluation is counted where it happens
    candidates = _start_points(problem, options)
    if options.global_search:
        lower, upper = problem.bounds()
        if not (np.all(np.isfinite(lower)) and np.all(np.isfinite(upper))):
            raise InputError(
                "the global search needs finite lower and upper bounds for every free parameter"
            )
        generations = options.generations or DEFAULT_GENERATIONS
        done = 0

        def objective(theta: np.ndarray) -> float:
            return float(np.sum(problem.residual(theta) ** 2))

        def generation(_x: np.ndarray, convergence: float = 0.0) -> bool:
            nonlocal done
            done += 1
            if progress is not None:
                progress(done, generations, "global search")
            return budget is not None and problem.calls - first >= budget  # True halts it

        found = optimize.differential_evolution(
            objective, list(zip(lower, upper, strict=True)), seed=options.seed, polish=False,
            tol=1e-8, maxiter=generations, callback=generation,
        )  # fmt: skip
        candidates = [np.asarray(found.x), *candidates]
    starts: list[dict[str, Any]] = []
    best = None
    for number, x0 in enumerate(candidates):
        if progress is not None:
            progress(number, len(candidates), "local fits")
        left = None if budget is None else budget - (problem.calls - first)
        if left is not None and left < len(x0) + 1:  # not even one step with its Jacobian
            starts.append({"start": problem.to_natural(x0), "chi2": None, "converged": False,
                           "message": f"not run: the budget of {budget} model evaluations is spent"})  # fmt: skip
            continue
        try:
            solution = least_squares(problem, x0, options, max_evaluations=left)
        except InputError as err:
            starts.append(
                {
                    "start": problem.to_natural(x0),
                    "chi2": None,
                    "converged": False,
                    "message": str(err),
                }
            )
            continue
        except ArithmeticError:  # a log parameter ran off to infinity: exp() overflowed
            starts.append({"start": problem.to_natural(x0), "chi2": None, "converged": False,
                           "message": "the parameters ran off to infinity"})  # fmt: skip
            continue
        chi2 = float(2 * solution.cost)
        record: dict[str, Any] = {"start": problem.to_natural(x0), "chi2": chi2, "converged": bool(solution.success),
                  "message": str(solution.message), "from": _origin(number, options),
                  "optimum": problem.to_natural(np.asarray(solution.x)), "objective": chi2}  # fmt: skip
        if problem.noise_model:  # the cost also holds the noise terms: give both parts apart
            fitted = np.asarray(solution.fun)[: len(problem.y)]
            record["chi2"] = float(fitted @ fitted)
            record["nllh"] = problem.nllh(np.asarray(solution.x))
        starts.append(record)
        if best is None or chi2 < 2 * best.cost:
            best = solution
    if progress is not None:
        progress(len(candidates), len(candidates), "local fits")
    spent = problem.calls - first
    spent_all = budget is not None and spent + len(candidates[0]) + 1 > budget
    if best is not None:
        theta, converged, message = np.asarray(best.x), bool(best.success), str(best.message)
    elif spent_all and options.global_search:  # the search spent it all: its best point stands
        theta, converged, message = candidates[0], False, "global search only"
    else:
        raise InputError("no start converged: " + "; ".join(str(s["message"]) for s in starts[:3]))
    if spent_all and not converged:
        message = f"stopped: the budget of {budget} model evaluations is spent ({message})"
    final: np.ndarray | None = None
    polished: Polished | None = None
    left = None if budget is None else budget - (problem.calls - first)
    if (
        options.polish
        and best is not None
        and _polishable(problem)
        and (left is None or left >= 8 * len(theta) + 4)
    ):
        try:
            polished = polish(problem, theta, tolerance=options.tolerance, budget=left)
        except (InputError, ArithmeticError):  # the model fails beside the optimum: as it was
            polished = None
        else:
            theta, final = polished.theta, polished.jacobian
            converged = converged or polished.reason in ("scaled step", "projected gradient")
    if final is None:
        final = jacobian(problem, theta)
    result = summarise(problem, theta, final, converged=converged, starts=starts,
                       message=message, options=options)  # fmt: skip
    if polished is not None:
        result.options["polished"] = {"stopped_on": polished.reason, "jacobian": polished.method,
                                      "steps": polished.accepted}  # fmt: skip
    result.evaluations = problem.calls - first  # the final Jacobian's 2 p included
    return result
