"""Profile likelihoods: for each parameter, the best objective with that parameter held fixed.

Raue, Kreutz, Maiwald, Bachmann, Schilling, Klingmüller and Timmer (2009), "Structural and
practical identifiability analysis of partially observed dynamical models by exploiting the
profile likelihood", Bioinformatics 25:1923-1929. The profile of parameter k is

    PL(x) = min over the other parameters of J(theta | theta_k = x),

J the objective in chi2 units (the weighted sum of squares for fixed sigmas; twice the negative
log-likelihood, up to a constant, where the noise model has parameters). Its confidence interval
at level 1 - alpha is where PL rises by the chi2(1 - alpha, 1) quantile above the optimum
(3.84 for 95 %): a likelihood-ratio interval, which for a model linear in its parameters with
known sigma is exactly the Wald interval beta +- z * SE.

Each side is walked from the optimum in the optimiser's coordinates (ln p for log parameters),
each step re-optimising the others warm-started from the step before; the step grows where the
profile is flat and halves where it rises too fast; the crossing is then found by root finding
on the profile itself. Verdicts, as the paper defines them: identifiable (the profile crosses
the threshold on both sides); practically non-identifiable (it stays below the threshold on at
least one side, within the bounds or the steps allowed); structurally non-identifiable (flat:
it never rises by more than FLAT_FRACTION of the threshold anywhere it was walked).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, cast

import numpy as np
from scipy import optimize, stats

from curate.errors import InputError
from curate.fit.engine import FitOptions, FitResult, least_squares
from curate.fit.problem import FitProblem

__all__ = [
    "FLAT_FRACTION",
    "VERDICTS",
    "ParameterProfile",
    "ProfileResult",
    "profile",
    "profile_threshold",
]

VERDICTS = ("identifiable", "practically non-identifiable", "structurally non-identifiable")
# a profile that never rises by 1 % of the threshold is flat (common practice, no single source)
FLAT_FRACTION = 0.01
MAX_STEPS = 60  # per side
STEP_LIMIT = 2.0  # the largest step in the optimiser's coordinates (a factor e^2 for a log one)


def profile_threshold(level: float = 0.95) -> float:
    """Give the rise of the profile (chi2 units) that bounds a ``level`` confidence interval."""
    if not 0 < level < 1:
        raise InputError(f"confidence level {level}: expected a number between 0 and 1")
    return float(stats.chi2.ppf(level, 1))


@dataclass
class ParameterProfile:
    """One parameter's profile: its interval, verdict and the walked points."""

    name: str
    value: float  # at the optimum (natural units)
    lower: float | None  # None: the profile stays below the threshold on that side
    upper: float | None
    verdict: str
    points: list[tuple[float, float]]  # (value, objective in chi2 units), sorted by value
    lower_end: str = ""  # why the lower side stopped: crossed, bound, steps, model failed
    upper_end: str = ""

    def to_dict(self) -> dict[str, Any]:
        """Give the JSON shape of ``curate profile --json`` for one parameter."""
        return {
            "value": self.value,
            "lower": self.lower,
            "upper": self.upper,
            "verdict": self.verdict,
            "points": [[x, y] for x, y in self.points],
        }


@dataclass
class ProfileResult:
    """Every profiled parameter, with the threshold and objective they were judged by."""

    parameters: dict[str, ParameterProfile]
    optimum: float  # objective at the fit's optimum (chi2 units)
    threshold: float
    level: float
    objective: str  # 'chi2' or '2 nllh'
    refits: int = 0
    evaluations: int = 0
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"parameters": {NAME: {"value", "lower", "upper", "verdict", "points"}}}``."""
        return {"parameters": {k: p.to_dict() for k, p in self.parameters.items()}}


class _Pinned:
    """The fit problem with free parameter ``index`` held at ``at`` (optimiser coordinates)."""

    def __init__(self, problem: FitProblem, index: int, at: float) -> None:
        self.problem, self.index, self.at = problem, index, at
        self.y = problem.y
        self.noise_model = problem.noise_model
        self.backend = problem.backend

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        lower, upper = self.problem.bounds()
        return np.delete(lower, self.index), np.delete(upper, self.index)

    def residual(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        return self.problem.residual(np.insert(theta, self.index, self.at), rows)


def _objective(problem: FitProblem, theta: np.ndarray) -> float:
    residual = problem.residual(theta)
    return float(residual @ residual)


class _Walker:
    """Re-optimises the other parameters at fixed values of one, counting refits."""

    def __init__(self, problem: FitProblem, options: FitOptions) -> None:
        self.problem, self.options = problem, options
        self.refits = 0

    def at(self, index: int, x: float, warm: np.ndarray) -> tuple[np.ndarray, float]:
        """Give (theta, objective) of the best fit with parameter ``index`` held at ``x``."""
        self.refits += 1
        theta = warm.copy()
        theta[index] = x
        if len(theta) == 1:
            return theta, _objective(self.problem, theta)
        pinned = _Pinned(self.problem, index, x)
        solution = least_squares(cast(FitProblem, pinned), np.delete(warm, index), self.options)
        theta = np.insert(np.asarray(solution.x), index, x)
        return theta, float(2 * solution.cost)


def _side(
    walker: _Walker, index: int, best: np.ndarray, optimum: float, direction: float,
    first_step: float, threshold: float,
) -> tuple[list[tuple[float, float]], float | None, str]:  # fmt: skip
    """Walk one side; give (points in optimiser coordinates, crossing or None, why it stopped)."""
    lower, upper = walker.problem.bounds()
    edge = upper[index] if direction > 0 else lower[index]
    points: list[tuple[float, float]] = []
    x, theta, previous = float(best[index]), best.copy(), optimum
    step = first_step
    rise_wanted = threshold / 4  # about four to eight steps to the crossing
    for _ in range(MAX_STEPS):
        target = x + direction * step
        at_edge = math.isfinite(edge) and (target - edge) * direction >= 0
        if at_edge:
            target = edge - direction * 1e-12 * max(1.0, abs(edge))
        try:
            trial, value = walker.at(index, target, theta)
        except (InputError, ArithmeticError) as err:
            return points, None, f"model failed ({str(err).splitlines()[0][:80]})"
        if value - previous > 2 * rise_wanted and step > 1e-8 and value - optimum < threshold * 4:
            step /= 2  # rose too fast for a faithful picture: a smaller step
            continue
        if value - optimum >= threshold:
            points.append((target, value))
            pinned_by = _others_at_bounds(walker.problem, index, trial)
            if pinned_by:
                # it rose only because a compensating parameter could go no further: the bound,
                # not the data, ends the interval there
                return points, None, f"{', '.join(pinned_by)} at a bound"

            def rise(z: float, warm: np.ndarray = theta) -> float:
                return walker.at(index, z, warm)[1] - optimum - threshold

            low, high = sorted((x, target))
            try:
                # to 1e-5 of the last step: far finer than any interval is read (a few digits)
                crossing = optimize.brentq(rise, low, high, xtol=1e-5 * (high - low), rtol=1e-10,
                                           maxiter=60)  # fmt: skip
            except (ValueError, InputError, ArithmeticError):
                crossing = x + (target - x) * (threshold - (previous - optimum)) / (
                    value - previous
                )
            return points, float(crossing), "crossed"
        points.append((target, value))
        if at_edge:
            return points, None, "bound"
        pinned_by = _others_at_bounds(walker.problem, index, trial)
        if pinned_by and value - optimum >= FLAT_FRACTION * threshold:
            return points, None, f"{', '.join(pinned_by)} at a bound"
        if value - previous < rise_wanted / 2:
            step = min(step * 2, STEP_LIMIT)
        x, theta, previous = target, trial, value
    return points, None, "steps"


def _others_at_bounds(problem: FitProblem, index: int, theta: np.ndarray) -> list[str]:
    """Give the other free parameters that sit on a bound at ``theta``."""
    lower, upper = problem.bounds()
    near = 1e-6 * np.maximum(1.0, np.abs(theta))
    return [
        p.name
        for k, p in enumerate(problem.free)
        if k != index and (theta[k] - lower[k] <= near[k] or upper[k] - theta[k] <= near[k])
    ]


def _elsewhere(found: ParameterProfile, best: FitResult, optimum: float, threshold: float,
               level: float) -> list[str]:  # fmt: skip
    """Give a note for each other optimum the fit's starts found within the threshold with the
    parameter outside its interval. The profile there lies at or below that fit's objective
    (it minimises over the others), so the confidence set is not one interval there: the walked
    interval is only the part around the best fit."""
    low = -math.inf if found.lower is None else found.lower
    high = math.inf if found.upper is None else found.upper
    seen: list[tuple[float, float, int]] = []  # value, rise, starts ending there
    for record in best.starts:
        value = (record.get("optimum") or {}).get(found.name)
        objective = record.get("objective")
        if value is None or objective is None or not math.isfinite(objective):
            continue
        rise = float(objective) - optimum
        span = max(abs(high - low) if math.isfinite(high - low) else 0.0, 1e-12)
        if rise > threshold or low - 1e-3 * span <= value <= high + 1e-3 * span:
            continue
        for k, (other, other_rise, count) in enumerate(seen):
            if abs(other - value) <= 1e-3 * max(abs(other), abs(value), 1e-300):
                seen[k] = (other, min(other_rise, rise), count + 1)
                break
        else:
            seen.append((float(value), rise, 1))
    return [
        f"{found.name}: {count} start{'s' if count > 1 else ''} of the fit ended at "
        f"{found.name} = {value:.4g}, {max(rise, 0.0):.3g} above the optimum (within "
        f"{threshold:.3g}), outside the interval: the {100 * level:g} % confidence set of "
        f"{found.name} is not one interval; the one given is the part around the best fit "
        "(`curate ensemble` finds every family of good fits)"
        for value, rise, count in sorted(seen)
    ]


def _natural(problem: FitProblem, index: int, x: float) -> float:
    parameter = problem.free[index]
    return float(math.exp(x)) if parameter.log else float(x * problem.typical[index])


def profile(
    problem: FitProblem,
    best: FitResult,
    names: Sequence[str] | None = None,
    *,
    level: float = 0.95,
    options: FitOptions | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> ProfileResult:
    """Give the profile likelihood of each named free parameter (default: all) around ``best``."""
    options = options or FitOptions()
    threshold = profile_threshold(level)
    free = [p.name for p in problem.free]
    chosen = list(names) if names else free
    for name in chosen:
        if name not in free:
            known = {p.name for p in problem.spec.parameters}
            what = "is fixed in the spec" if name in known else "is not a parameter of the spec"
            raise InputError(
                f"profile --parameter {name}: it {what}; free parameters: {', '.join(free) or 'none'}"
            )
    first = problem.calls
    theta_best = np.asarray(best.theta, dtype=float)
    optimum = _objective(problem, theta_best)
    walker = _Walker(problem, options)
    result = ProfileResult(
        parameters={}, optimum=optimum, threshold=threshold, level=level,
        objective="2 nllh" if problem.noise_model else "chi2",
    )  # fmt: skip
    internal = np.sqrt(np.abs(np.diag(best.internal_covariance)))
    for done, name in enumerate(chosen):
        if progress is not None:
            progress(done, len(chosen), f"profile {name}")
        index = free.index(name)
        se = float(internal[index]) if index < len(internal) else math.nan
        first_step = 0.5 * se if math.isfinite(se) and se > 0 else 0.1
        first_step = min(first_step, STEP_LIMIT)
        sides = {}
        for direction in (-1.0, 1.0):
            sides[direction] = _side(walker, index, theta_best, optimum, direction, first_step,
                                     threshold)  # fmt: skip
        walked = [*sides[-1.0][0], (float(theta_best[index]), optimum), *sides[1.0][0]]
        rises = [v - optimum for _, v in walked]
        # where a side stopped because another parameter reached its bound, its last point rose
        # for that reason alone: the flatness is judged on the points before it
        judged = [*sides[-1.0][0][: -1 if "at a bound" in sides[-1.0][2] and sides[-1.0][2] != "bound" else None],
                  (float(theta_best[index]), optimum),
                  *sides[1.0][0][: -1 if "at a bound" in sides[1.0][2] and sides[1.0][2] != "bound" else None]]  # fmt: skip
        flat = max(v - optimum for _, v in judged) < FLAT_FRACTION * threshold
        if min(rises) < -1e-6 * max(1.0, abs(optimum)):
            result.notes.append(
                f"{name}: the profile went {-min(rises):.3g} below the fit's optimum; the fit had "
                "not found the best optimum (refit from a better start)"
            )
        low, high = sides[-1.0][1], sides[1.0][1]
        if low is not None and high is not None:
            verdict = VERDICTS[0]
        elif flat:
            verdict = VERDICTS[2]
        else:
            verdict = VERDICTS[1]
        points = sorted((_natural(problem, index, x), v) for x, v in walked)
        result.parameters[name] = ParameterProfile(
            name=name, value=_natural(problem, index, float(theta_best[index])),
            lower=None if low is None else _natural(problem, index, low),
            upper=None if high is None else _natural(problem, index, high),
            verdict=verdict, points=points, lower_end=sides[-1.0][2], upper_end=sides[1.0][2],
        )  # fmt: skip
        result.notes += _elsewhere(result.parameters[name], best, optimum, threshold, level)
    if progress is not None:
        progress(len(chosen), len(chosen), "profiles")
    result.refits = walker.refits
    result.evaluations = problem.calls - first
    return result
