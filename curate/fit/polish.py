"""The last stretch of a fit: Gauss-Newton steps with an accurate Jacobian until the step is
negligible. Pure computation (no catalog, no files).

Why: a trust-region search stops when the objective stops changing (relative change below its
tolerance). Along a flat valley (an ill-conditioned Jacobian: close exponential rates, data
given to few digits, parameters spanning many decades) the objective changes by 1e-10 while the
parameters still move in their fifth digit, so a stop on the objective alone leaves them there.
The polish instead stops on the scaled step (every parameter's Gauss-Newton step below the
tolerance, relative to the parameter: ln p for log parameters, p / |start| otherwise) or on the
projected gradient (every column of J at an angle to the residual whose cosine is below the
tolerance, parameters held at a bound by the gradient left out: the test of More's MINPACK).

- Steps: the Gauss-Newton step solved by SVD least squares (never the normal equations, which
  square the condition number), damped Levenberg-Marquardt style (Marquardt 1963, scaled by the
  column norms of J) only when a full step fails to lower the objective; bounds by projection.
- Jacobian: the complex step, Im f(x + i h) / h with h = 1e-20 (Squire & Trapp 1998), exact to
  rounding, where the model takes complex parameters: found by trying once per problem (the
  answer must be complex, finite, carry the real prediction, and agree with central differences
  to 1e-5); otherwise fourth-order central differences, (8 (f(x+h) - f(x-h)) - (f(x+2h) -
  f(x-2h))) / 12 h with h = eps^(1/5) max(1, |x|), about 1e-12 relative error for a smooth model.
- It never ends worse than it began: a step is kept only if it lowers the objective (or leaves
  it within rounding, 8 eps relative, which is where the last Gauss-Newton steps live).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from curate.errors import InputError
from curate.fit.problem import FitProblem

__all__ = ["Polished", "accurate_jacobian", "polish", "supports_complex_step"]

EPS = float(np.finfo(float).eps)
COMPLEX_STEP = 1e-20
# each try costs one model evaluation, each step taken one Jacobian more: p evaluations by
# complex step (a closed form, usually cheap), 4 p by differences (often an ODE solve, whose own noise the polish cannot
# beat: a few steps from where the search stopped take what there is to take)
MAX_TRIES = {"complex step": 12, "fourth-order differences": 3}


@dataclass(frozen=True)
class Polished:
    """Where the polish ended, the accurate Jacobian there, and how it got there."""

    theta: np.ndarray
    jacobian: np.ndarray | None  # at theta, by ``method`` (None: the budget left none)
    cost: float  # sum of squared residuals at theta
    reason: str  # 'scaled step', 'projected gradient', 'rounding', 'no descent',
    # 'tries' (all spent), 'budget'
    method: str  # 'complex step' or 'fourth-order differences'
    tries: int  # steps tried, damped retries included
    accepted: int


def _complex_residual(problem: FitProblem, theta: np.ndarray) -> np.ndarray | None:
    """Give the residual at complex ``theta`` or None when the model does not carry complex
    numbers through (it raises, warns, or answers in reals)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            found = problem.complex_residual(theta)
    except (InputError, ArithmeticError, TypeError, ValueError, Warning, AttributeError):
        return None
    except Exception:  # a model written for floats may fail in any way on complex input
        return None
    if found is None or not np.iscomplexobj(found) or not np.all(np.isfinite(found)):
        return None
    return found


def _complex_columns(problem: FitProblem, theta: np.ndarray) -> np.ndarray | None:
    """Give the complex-step Jacobian, or None where the model does not carry it through."""
    columns = []
    for k in range(len(theta)):
        shifted = theta.astype(complex)
        shifted[k] += 1j * COMPLEX_STEP
        found = _complex_residual(problem, shifted)
        if found is None:
            return None
        columns.append(found.imag / COMPLEX_STEP)
    return np.column_stack(columns) if columns else np.zeros((len(problem.y), 0))


def supports_complex_step(problem: FitProblem, theta: np.ndarray) -> bool:
    """Tell whether the complex-step derivative works for this problem (found by trying at
    ``theta`` once per problem; the answer is kept on it)."""
    if problem.complex_step is None:
        accurate_jacobian(problem, theta)
    return bool(problem.complex_step)


def _central(problem: FitProblem, theta: np.ndarray, order: int) -> np.ndarray:
    """Give central differences of the residual, second or fourth order."""
    exponent = 1 / 3 if order == 2 else 1 / 5
    step = EPS**exponent * np.maximum(1.0, np.abs(theta))
    columns = []
    for k in range(len(theta)):
        e = np.zeros(len(theta))
        e[k] = step[k]
        first = problem.residual(theta + e) - problem.residual(theta - e)
        if order == 2:
            columns.append(first / (2 * step[k]))
        else:
            second = problem.residual(theta + 2 * e) - problem.residual(theta - 2 * e)
            columns.append((8 * first - second) / (12 * step[k]))
    return np.column_stack(columns) if columns else np.zeros((len(problem.y), 0))


def accurate_jacobian(problem: FitProblem, theta: np.ndarray) -> tuple[np.ndarray, str]:
    """Give the Jacobian of the residual at ``theta`` and how it was taken: by complex step
    where the model allows it, else by fourth-order central differences."""
    if problem.complex_step is None:  # find out by trying, once per problem
        problem.complex_step = False
        if not problem.noise_model and not problem.censored.any() and len(theta):
            real = problem.residual(theta)
            found = _complex_columns(problem, theta)
            shifted = theta.astype(complex)
            shifted[0] += 1j * COMPLEX_STEP
            carried = _complex_residual(problem, shifted)  # its real part must be the residual
            if (
                found is not None
                and carried is not None
                and np.allclose(
                    carried.real,
                    real,
                    rtol=1e-10,
                    atol=1e-10 * float(np.max(np.abs(problem.sqrt_w * problem.y))),
                )
            ):
                # a model can carry complex numbers and still lose the derivative (abs, a
                # branch on the value): check against central differences, column by column
                central = _central(problem, theta, order=2)
                scale = np.maximum(np.linalg.norm(central, axis=0), 1e-300)
                error = np.linalg.norm(found - central, axis=0)
                if np.all(error <= 1e-5 * scale):
                    problem.complex_step = True
                    return found, "complex step"
    elif problem.complex_step:
        found = _complex_columns(problem, theta)
        if found is not None:
            return found, "complex step"
        problem.complex_step = False  # it worked at the first point, not here: differences
    return _central(problem, theta, order=4), "fourth-order differences"


def _held(
    theta: np.ndarray, gradient: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> np.ndarray:
    """Give which parameters sit on a bound the gradient pushes them against."""
    span = 1e-12 * np.maximum(1.0, np.abs(theta))
    at_lower = np.isfinite(lower) & (theta <= lower + span) & (gradient > 0)
    at_upper = np.isfinite(upper) & (theta >= upper - span) & (gradient < 0)
    return np.asarray(at_lower | at_upper)


def _residual_or_none(problem: FitProblem, theta: np.ndarray) -> tuple[np.ndarray | None, float]:
    """Give the residual and its cost at ``theta``, or (None, inf) where the model fails."""
    try:
        found = problem.residual(theta)
    except (InputError, ArithmeticError):
        return None, math.inf
    return found, float(found @ found)


def polish(problem: FitProblem, theta: np.ndarray, *, tolerance: float,
           budget: int | None = None) -> Polished:  # fmt: skip
    """Give the fit polished from ``theta``: Gauss-Newton steps until the scaled step or the
    projected gradient is below ``tolerance`` (floored at 4 eps), at most ``budget`` model
    evaluations (checked before each Jacobian)."""
    tolerance = max(tolerance, 4 * EPS)
    lower, upper = problem.bounds()
    log = np.array([p.log for p in problem.free], dtype=bool)
    first = problem.calls
    theta = np.asarray(theta, dtype=float)
    residual = problem.residual(theta)
    cost = float(residual @ residual)
    jacobian, method = accurate_jacobian(problem, theta)
    per_jacobian = max(problem.calls - first - 1, 1)

    def affordable() -> bool:
        return budget is None or problem.calls - first + per_jacobian <= budget

    at_theta = True  # the Jacobian in hand is the one at theta
    reference = np.abs(problem.sqrt_w * problem.y) if not problem.noise_model else 0.0
    damping, previous, stalled = 0.0, math.inf, 0
    reason, accepted, tries = "tries", 0, 0
    while tries < MAX_TRIES[method]:
        tries += 1
        gradient = jacobian.T @ residual
        free = ~_held(theta, gradient, lower, upper)
        norms = np.linalg.norm(jacobian, axis=0)
        cosine = np.abs(gradient[free]) / np.maximum(norms[free] * math.sqrt(cost), 1e-300)
        if cost == 0 or not free.any() or float(np.max(cosine)) <= tolerance:
            reason = "projected gradient"
            break
        step = np.zeros(len(theta))
        step[free] = _step(jacobian[:, free], residual, norms[free], damping)
        moved = np.clip(theta + step, lower, upper) - theta
        size = float(np.max(np.abs(moved) / np.where(log, 1.0, np.maximum(np.abs(theta), 1e-8))))
        change = jacobian @ moved
        predicted = -(2 * float(residual @ change) + float(change @ change))
        # what rounding does to the cost: each residual carries about eps |sqrt(w) y| of error
        noise = 4 * EPS * float(np.sum(np.abs(residual) * (reference + np.abs(residual))))
        trial, trial_cost = _residual_or_none(problem, theta + moved)
        if trial is None or trial_cost > cost + noise:
            if size <= tolerance:  # negligible and still not descending: nothing left to gain
                reason = "scaled step"
                break
            damping = 1e-3 if damping == 0 else damping * 10  # same Jacobian, a damped step
            if damping > 1e6:
                reason = "no descent"
                break
            continue
        origin, start_slope = theta, float(gradient @ moved)
        theta, residual, cost, at_theta = theta + moved, trial, trial_cost, False
        accepted += 1
        damping = damping / 10 if damping > 1e-6 else 0.0
        if size <= tolerance:
            reason = "scaled step"
            break
        # a converging Gauss-Newton (with the secant below) shrinks its steps. With an exact
        # Jacobian only rounding stops that: steps that no longer shrink while the cost can no
        # longer tell the difference. Differences may stand for a model with noise of its own
        # (an ODE solver's tolerance) that pushes the point about: there, steps that do not
        # halve. Twice in a row, and there is nothing left to gain.
        if method == "complex step":
            stalled = stalled + 1 if predicted <= noise and size >= previous else 0
        else:
            stalled = stalled + 1 if size >= previous / 2 or predicted <= noise else 0
        if stalled == 2:
            reason = "rounding"
            break
        previous = size
        if not affordable():
            reason = "budget"
            break
        jacobian, _ = accurate_jacobian(problem, theta)
        at_theta = True
        # Gauss-Newton converges only linearly where the residual is large against the
        # curvature, often overshooting in turn: a secant on the slope along the step (known to
        # full accuracy from J and r, where the cost itself is lost in rounding) finds where
        # along it the slope vanishes
        slope = float((jacobian.T @ residual) @ moved)
        if start_slope < 0 and start_slope != slope:
            fraction = start_slope / (start_slope - slope)
            if 0 < fraction < 4 and abs(fraction - 1) > 0.1:
                candidate = np.clip(origin + fraction * moved, lower, upper)
                trial, trial_cost = _residual_or_none(problem, candidate)
                if trial is not None and trial_cost <= cost + noise:
                    theta, residual, cost, at_theta = candidate, trial, trial_cost, False
                    if not affordable():
                        reason = "budget"
                        break
                    jacobian, _ = accurate_jacobian(problem, theta)
                    at_theta = True
    if not at_theta and affordable():
        jacobian, _ = accurate_jacobian(problem, theta)  # the covariance wants it at theta
        at_theta = True
    return Polished(theta=theta, jacobian=jacobian if at_theta else None, cost=cost,
                    reason=reason, method=method, tries=tries, accepted=accepted)  # fmt: skip


def _step(
    jacobian: np.ndarray, residual: np.ndarray, norms: np.ndarray, damping: float
) -> np.ndarray:
    """Give the (damped) Gauss-Newton step: min |J s + r|^2 + damping |D s|^2, D the column
    norms of J, solved as one least-squares problem by SVD."""
    scale = np.where(norms > 0, norms, 1.0)
    scaled = jacobian / scale  # columns of unit length: the SVD's cutoff is then meaningful
    if damping > 0:
        scaled = np.vstack([scaled, math.sqrt(damping) * np.eye(scaled.shape[1])])
        residual = np.concatenate([residual, np.zeros(scaled.shape[1])])
    solution, *_ = np.linalg.lstsq(scaled, -residual, rcond=None)
    return np.asarray(solution / scale, dtype=float)
