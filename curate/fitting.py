"""Weighted least squares on the weighted long table. Pure computation (no catalog, no files).

Residual of point i:  r_i = sqrt(w_i) * (y_i - s_g * f_i(theta)),  objective sum r_i^2.

- A model is ``function(params: dict[str, float], points: DataFrame) -> ndarray`` (one
  prediction per row), loaded from ``module:function`` or ``path/to/file.py:function``.
- A parameter spec (TOML) gives per parameter ``start``, ``lower``, ``upper`` (inf allowed),
  ``log = true`` (fitted as ln p) and ``fixed = true``.
- Relative-unit rows get one scale factor per calibration group, solved in closed form inside
  the residual, s* = sum(w y h) / sum(w h^2) (h the model prediction): the variable-projection
  idea of Golub & Pereyra (1973), so the optimiser sees only the shared parameters.
- scipy.optimize.least_squares (trust-region reflective) with bounds; multi-start from a Latin
  hypercube (scipy.stats.qmc) inside the bounds, best kept, every start reported; optional
  global search by differential evolution (Storn & Price 1997) polished by least_squares.
- Covariance (J^T J)^-1 from the Jacobian of the projected residual at the optimum, mapped to
  natural parameters (dp = p d ln p for log parameters); optionally scaled by the reduced
  chi2 when the sigmas are only relative.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import math
import sys
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize
from scipy.stats import qmc

from curate.errors import InputError

__all__ = [
    "FitOptions",
    "FitProblem",
    "FitResult",
    "ParameterSpec",
    "fit",
    "jacobian",
    "load_model",
    "load_spec",
    "model_sha256",
]

Model = Callable[[dict[str, float], pd.DataFrame], np.ndarray]


@dataclass(frozen=True)
class Parameter:
    """One model parameter's start, bounds and treatment."""

    name: str
    start: float
    lower: float = -math.inf
    upper: float = math.inf
    log: bool = False
    fixed: bool = False


@dataclass(frozen=True)
class ParameterSpec:
    """The parameters of a model and whether relative data get closed-form scale factors."""

    parameters: tuple[Parameter, ...]
    scale_factors: bool = True
    origin: str = "spec"
    sha256: str = ""

    @property
    def free(self) -> tuple[Parameter, ...]:
        """Give the parameters that are fitted."""
        return tuple(p for p in self.parameters if not p.fixed)

    def to_dict(self) -> dict[str, Any]:
        """Give the spec as plain data."""
        return {
            "parameters": {p.name: {"start": p.start, "lower": p.lower, "upper": p.upper, "log": p.log, "fixed": p.fixed}
                           for p in self.parameters},
            "scale_factors": self.scale_factors, "origin": self.origin, "sha256": self.sha256,
        }  # fmt: skip


def _float(origin: str, name: str, key: str, value: Any, default: float) -> float:
    if value is None:
        return default
    if isinstance(value, str) and value.strip().lower() in ("inf", "+inf", "-inf"):
        return float(value)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(
            f"{origin}, field 'parameters.{name}.{key}': expected a number (or \"inf\"), got {value!r}"
        )
    return float(value)


def spec_from_dict(
    content: dict[str, Any], *, origin: str = "spec", sha256: str = ""
) -> ParameterSpec:
    """Give a validated spec from its TOML content."""
    raw = content.get("parameters")
    if not isinstance(raw, dict) or not raw:
        raise InputError(f"{origin}: expected [parameters.NAME] tables with start, lower, upper")
    unknown_top = set(content) - {"parameters", "options"}
    if unknown_top:
        raise InputError(
            f"{origin}, field '{sorted(unknown_top)[0]}': unknown; expected [parameters.NAME] and [options]"
        )
    parameters = []
    for name, entry in raw.items():
        if not isinstance(entry, dict):
            raise InputError(
                f"{origin}, field 'parameters.{name}': expected a table with start, lower, upper"
            )
        extra = set(entry) - {"start", "lower", "upper", "log", "fixed"}
        if extra:
            raise InputError(
                f"{origin}, field 'parameters.{name}.{sorted(extra)[0]}': unknown; expected start, lower, upper, log, fixed"
            )
        if "start" not in entry:
            raise InputError(f"{origin}, field 'parameters.{name}.start': required")
        start = _float(origin, name, "start", entry["start"], 0.0)
        lower = _float(origin, name, "lower", entry.get("lower"), -math.inf)
        upper = _float(origin, name, "upper", entry.get("upper"), math.inf)
        log = bool(entry.get("log", False))
        if lower >= upper:
            raise InputError(
                f"{origin}, parameter '{name}': lower {lower:g} is not below upper {upper:g}"
            )
        if not lower <= start <= upper:
            raise InputError(
                f"{origin}, parameter '{name}': start {start:g} is outside its bounds [{lower:g}, {upper:g}]"
            )
        if log and (start <= 0 or lower < 0):
            raise InputError(
                f"{origin}, parameter '{name}': a log-scale parameter needs start > 0 and lower >= 0"
            )
        parameters.append(
            Parameter(name, start, lower, upper, log, bool(entry.get("fixed", False)))
        )
    options = content.get("options", {})
    if not isinstance(options, dict) or set(options) - {"scale_factors"}:
        raise InputError(f"{origin}, field 'options': only scale_factors = true/false is known")
    spec = ParameterSpec(
        tuple(parameters), bool(options.get("scale_factors", True)), origin, sha256
    )
    if not spec.free:
        raise InputError(f"{origin}: every parameter is fixed; nothing to fit")
    return spec


def load_spec(path: str | Path) -> ParameterSpec:
    """Give the parameter spec in a TOML file."""
    file = Path(path)
    if not file.is_file():
        raise InputError(f"{file}: no such parameter spec file")
    text = file.read_bytes()
    try:
        content = tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{file}: not valid TOML ({err})") from None
    return spec_from_dict(content, origin=str(file), sha256=hashlib.sha256(text).hexdigest())


def load_model(reference: str) -> Model:
    """Give the model callable named by ``module:function`` or ``file.py:function``."""
    target, sep, name = reference.rpartition(":")
    if not sep or not target or not name:
        raise InputError(
            f"--model '{reference}': expected module:function or path/to/model.py:function"
        )
    if target.endswith(".py"):
        path = Path(target)
        if not path.is_file():
            raise InputError(f"--model '{reference}': no such file {path}")
        module_name = (
            f"curate_model_{hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:12]}"
        )
        module = sys.modules.get(module_name)
        if module is None:
            spec = importlib.util.spec_from_file_location(module_name, path)
            if spec is None or spec.loader is None:
                raise InputError(f"--model '{reference}': cannot load {path}")
            module = importlib.util.module_from_spec(spec)
            sys.modules[module_name] = module
            try:
                spec.loader.exec_module(module)
            except Exception as err:
                del sys.modules[module_name]
                raise InputError(
                    f"--model '{reference}': loading {path} failed ({type(err).__name__}: {err})"
                ) from None
    else:
        try:
            module = importlib.import_module(target)
        except ImportError as err:
            raise InputError(f"--model '{reference}': cannot import {target} ({err})") from None
    function = getattr(module, name, None)
    if not callable(function):
        raise InputError(f"--model '{reference}': {target} defines no function '{name}'")
    return function  # type: ignore[no-any-return]


def model_sha256(reference: str) -> str | None:
    """Give the sha256 of a model file (None for an installed module)."""
    target = reference.rpartition(":")[0]
    path = Path(target)
    return (
        hashlib.sha256(path.read_bytes()).hexdigest()
        if target.endswith(".py") and path.is_file()
        else None
    )


@dataclass(frozen=True)
class FitOptions:
    """How to search."""

    starts: int = 1
    seed: int = 0
    global_search: bool = False
    scale_covariance: bool = False
    tolerance: float = 1e-10
    max_evaluations: int | None = None


@dataclass
class FitProblem:
    """Points, weights, model and spec: what a fit needs, with the projected residual."""

    points: pd.DataFrame
    model: Model
    spec: ParameterSpec
    _groups: np.ndarray = field(init=False, repr=False)
    _group_names: list[str] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        for column in ("value", "weight"):
            if column not in self.points.columns:
                raise InputError(f"the points need a '{column}' column")
        self.y = self.points["value"].to_numpy(dtype=float)
        self.w = self.points["weight"].to_numpy(dtype=float)
        self.sqrt_w = np.sqrt(self.w)
        relative = (
            self.points["relative"].to_numpy(dtype=bool)
            if "relative" in self.points
            else np.zeros(len(self.y), bool)
        )
        if not self.spec.scale_factors:
            relative = np.zeros(len(self.y), bool)
        key = (
            self.points["calibration_group"]
            if "calibration_group" in self.points
            else self.points.get("dataset_id", pd.Series(["all"] * len(self.y)))
        )
        labels = np.where(relative, key.astype(str).to_numpy(), "")
        self._group_names = sorted(set(labels) - {""})
        index = {name: k for k, name in enumerate(self._group_names)}
        self._groups = np.array([index.get(label, -1) for label in labels])
        self.free = self.spec.free
        self.fixed = {p.name: p.start for p in self.spec.parameters if p.fixed}
        # the optimiser works on O(1) numbers: ln p for log parameters, p / |start| otherwise
        # (finite-difference Jacobians lose digits when parameters span many decades)
        self.typical = np.array([1.0 if p.log or p.start == 0 else abs(p.start) for p in self.free])

    @property
    def scale_groups(self) -> list[str]:
        """Give the calibration groups that get a closed-form scale factor."""
        return list(self._group_names)

    def to_internal(self, natural: dict[str, float]) -> np.ndarray:
        """Give the optimiser's vector (ln p for log parameters) for natural values."""
        return np.array(
            [
                math.log(natural[p.name]) if p.log else natural[p.name] / t
                for p, t in zip(self.free, self.typical, strict=True)
            ]
        )

    def to_natural(self, theta: np.ndarray) -> dict[str, float]:
        """Give every parameter's natural value for an optimiser vector."""
        values = dict(self.fixed)
        for p, x, t in zip(self.free, theta, self.typical, strict=True):
            values[p.name] = float(math.exp(x)) if p.log else float(x * t)
        return values

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Give the optimiser's bounds."""
        lower, upper = [], []
        for p, t in zip(self.free, self.typical, strict=True):
            if p.log:
                lower.append(math.log(p.lower) if p.lower > 0 else -math.inf)
                upper.append(math.log(p.upper) if math.isfinite(p.upper) else math.inf)
            else:
                lower.append(p.lower / t)
                upper.append(p.upper / t)
        return np.array(lower), np.array(upper)

    def predict(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Give the model prediction (before scale factors) for every row, or the chosen rows."""
        frame = self.points if rows is None else self.points.iloc[rows]
        params = self.to_natural(theta)
        try:
            output = self.model(params, frame)
        except InputError:
            raise
        except Exception as err:
            raise InputError(f"the model raised {type(err).__name__}: {err}") from None
        prediction = (
            np.asarray(output, dtype=float).reshape(-1) if np.ndim(output) else np.array([])
        )
        if prediction.shape != (len(frame),):
            raise InputError(
                f"the model returned {np.size(output)} values for {len(frame)} rows; expected one per row"
            )
        bad = ~np.isfinite(prediction)
        if bad.any():
            position = int(np.argmax(bad))
            shown = ", ".join(f"{k}={v:.4g}" for k, v in params.items())
            raise InputError(
                f"the model returned {prediction[position]} at row {position + 1} for parameters {shown}"
            )
        return prediction

    def scales(self, prediction: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Give the closed-form scale factor of each calibration group, s* = sum(w y h) / sum(w h^2)."""
        groups = self._groups if rows is None else self._groups[rows]
        y = self.y if rows is None else self.y[rows]
        w = self.w if rows is None else self.w[rows]
        result = np.ones(len(self._group_names))
        for k in range(len(self._group_names)):
            part = groups == k
            if part.any():
                denominator = float(np.sum(w[part] * prediction[part] ** 2))
                result[k] = (
                    float(np.sum(w[part] * y[part] * prediction[part]) / denominator)
                    if denominator > 0
                    else 1.0
                )
        return result

    def residual(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Give sqrt(w) (y - s h) with the scale factors projected out."""
        prediction = self.predict(theta, rows)
        groups = self._groups if rows is None else self._groups[rows]
        factor = np.ones(len(prediction))
        if self._group_names:
            scale = self.scales(prediction, rows)
            has = groups >= 0
            factor[has] = scale[groups[has]]
        y = self.y if rows is None else self.y[rows]
        sqrt_w = self.sqrt_w if rows is None else self.sqrt_w[rows]
        return np.asarray(sqrt_w * (y - factor * prediction), dtype=float)

    def n_scale_factors(self, rows: np.ndarray | None = None) -> int:
        """Give how many scale groups have rows (each costs one degree of freedom)."""
        groups = self._groups if rows is None else self._groups[rows]
        return len(set(groups[groups >= 0].tolist()))


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
            "dof": self.dof,
            "n_points": self.n_points,
            "converged": self.converged,
            "starts": self.starts,
            "reduced_chi2": self.reduced_chi2,
            "message": self.message,
            "options": self.options,
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


def _least_squares(
    problem: FitProblem, x0: np.ndarray, options: FitOptions, rows: np.ndarray | None = None
) -> Any:
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
    return optimize.least_squares(
        lambda theta: problem.residual(theta, rows), x0, bounds=(lower, upper),
        method="lm" if unbounded and len(problem.y) >= len(x0) else "trf", x_scale="jac",
        ftol=options.tolerance, xtol=options.tolerance, gtol=options.tolerance, max_nfev=options.max_evaluations,
    )  # fmt: skip


def jacobian(problem: FitProblem, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
    """Give the Jacobian of the projected residual by central differences.

    Steps of eps^(1/3) relative size balance truncation and rounding (about 1e-10 relative
    error for smooth models), better than the optimiser's own forward differences.
    """
    step = 6e-6 * np.maximum(1.0, np.abs(theta))
    columns = []
    for k in range(len(theta)):
        e = np.zeros(len(theta))
        e[k] = step[k]
        columns.append(
            (problem.residual(theta + e, rows) - problem.residual(theta - e, rows)) / (2 * step[k])
        )
    return np.column_stack(columns)


def covariance_from_jacobian(jacobian: np.ndarray) -> np.ndarray:
    """Give (J^T J)^-1 by SVD (pseudo-inverse where J is rank deficient)."""
    _, singular, vt = np.linalg.svd(jacobian, full_matrices=False)
    threshold = np.finfo(float).eps * max(jacobian.shape) * (singular[0] if len(singular) else 0.0)
    keep = singular > threshold
    inverse = np.zeros_like(singular)
    inverse[keep] = 1.0 / singular[keep] ** 2
    return np.asarray((vt.T * inverse) @ vt, dtype=float)


def summarise(problem: FitProblem, theta: np.ndarray, jacobian: np.ndarray, *, converged: bool, starts: list[dict[str, Any]],
              message: str, options: FitOptions, rows: np.ndarray | None = None) -> FitResult:  # fmt: skip
    """Give the FitResult at an optimum: values, standard errors, scale factors, chi2, dof."""
    residual = problem.residual(theta, rows)
    chi2 = float(residual @ residual)
    n_points = len(residual)
    dof = n_points - len(theta) - problem.n_scale_factors(rows)
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
    scale_factors: dict[str, float] = {}
    if problem.scale_groups:
        prediction = problem.predict(theta, rows)
        scales = problem.scales(prediction, rows)
        frame = problem.points if rows is None else problem.points.iloc[rows]
        groups = problem._groups if rows is None else problem._groups[rows]
        ids = (
            frame["dataset_id"].astype(str).to_numpy()
            if "dataset_id" in frame
            else np.array(problem.scale_groups)
        )
        for ident, group in zip(ids, groups, strict=True):
            if group >= 0:
                scale_factors[str(ident)] = float(scales[group])
    return FitResult(
        parameters=parameters, scale_factors=scale_factors, chi2=chi2, dof=dof, n_points=n_points,
        converged=converged, starts=starts, covariance=covariance, internal_covariance=internal, theta=theta,
        free=[p.name for p in problem.free], message=message,
        options={"starts": options.starts, "seed": options.seed, "global_search": options.global_search,
                 "scale_covariance": options.scale_covariance, "tolerance": options.tolerance},
    )  # fmt: skip


def fit(problem: FitProblem, options: FitOptions | None = None) -> FitResult:
    """Give the best weighted least-squares fit over all starts (and the global search if asked)."""
    options = options or FitOptions()
    if len(problem.y) <= len(problem.free):
        raise InputError(
            f"{len(problem.y)} points cannot determine {len(problem.free)} free parameters"
        )
    candidates = _start_points(problem, options)
    if options.global_search:
        lower, upper = problem.bounds()
        if not (np.all(np.isfinite(lower)) and np.all(np.isfinite(upper))):
            raise InputError(
                "the global search needs finite lower and upper bounds for every free parameter"
            )
        found = optimize.differential_evolution(
            lambda theta: float(np.sum(problem.residual(theta) ** 2)), list(zip(lower, upper, strict=True)),
            seed=options.seed, polish=False, tol=1e-8, maxiter=300,
        )  # fmt: skip
        candidates = [np.asarray(found.x), *candidates]
    starts: list[dict[str, Any]] = []
    best = None
    for number, x0 in enumerate(candidates):
        try:
            solution = _least_squares(problem, x0, options)
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
        chi2 = float(2 * solution.cost)
        record: dict[str, Any] = {"start": problem.to_natural(x0), "chi2": chi2, "converged": bool(solution.success),
                  "message": str(solution.message), "from": "global search" if options.global_search and number == 0 else "start"}  # fmt: skip
        starts.append(record)
        if best is None or chi2 < 2 * best.cost:
            best = solution
    if best is None:
        raise InputError("no start converged: " + "; ".join(str(s["message"]) for s in starts[:3]))
    return summarise(problem, best.x, jacobian(problem, best.x), converged=bool(best.success), starts=starts,
                     message=str(best.message), options=options)  # fmt: skip
