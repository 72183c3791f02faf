"""Noise estimators: numpy arrays in, typed estimates out. Nothing here touches the catalog.

- replicate SD per time point (ddof=1) and the pooled SD;
- reported uncertainties converted to SD (SEM with n, CI half-widths, percentages);
- difference-based estimators for series without replicates, which cancel a smooth signal:
  Rice (1984), Gasser, Sroka & Jennen-Steinmetz (1986), Hall, Kay & Titterington (1990), and
  a robust median-absolute-deviation variant;
- the additive + proportional error model sigma_i^2 = a^2 + (b * mu_i)^2 by maximum likelihood;
- noise floors, so that no sd is ever zero.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, stats

from curate.errors import InputError

__all__ = [
    "HKT_SEQUENCES",
    "MINIMUM_POINTS",
    "ErrorModel",
    "NoiseResult",
    "ReplicateSD",
    "apply_floor",
    "choose_and_estimate",
    "error_model",
    "gasser_sroka",
    "hall_kay_titterington",
    "mad_pseudo_residuals",
    "replicate_sd",
    "reported_to_sd",
    "rice",
]

# Optimal difference sequences of Hall, Kay & Titterington (1990, Biometrika 77:521, Table 1),
# values as recalled from memory; each sums to 0 and has unit sum of squares (tested).
HKT_SEQUENCES = {
    1: (0.7071, -0.7071),
    2: (0.8090, -0.5000, -0.3090),
    3: (0.1942, 0.2809, 0.3832, -0.8582),
}

MINIMUM_POINTS = {"rice": 4, "gsj": 4, "hkt2": 5, "hkt3": 6, "mad": 6}

# 1 / Phi^-1(3/4): makes the MAD a consistent estimator of a normal SD
_MAD_TO_SD = 1.0 / stats.norm.ppf(0.75)


@dataclass(frozen=True)
class NoiseResult:
    """One noise estimate: the SD, how it was made, and what to watch for."""

    sd: float
    method: str
    dof: int
    parameters: dict[str, Any] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Give the estimate as plain data."""
        return {
            "sd": self.sd,
            "method": self.method,
            "dof": self.dof,
            "parameters": self.parameters,
            "warnings": list(self.warnings),
        }


def _need(method: str, n: int, origin: str) -> None:
    minimum = MINIMUM_POINTS[method]
    if n < minimum:
        raise InputError(
            f"{origin}: {n} points; the {method} estimator needs at least {minimum} "
            "(choose another --method or add data)"
        )


def rice(value: np.ndarray, *, origin: str = "series") -> NoiseResult:
    """Give Rice's (1984) first-difference estimate: sigma^2 = sum (y_{i+1} - y_i)^2 / (2(n-1)).

    Rice, J. (1984), Bandwidth choice for nonparametric regression, Ann. Stat. 12:1215.
    Assumes equally informative neighbours; the signal's slope biases it upward.
    """
    y = np.asarray(value, dtype=float)
    _need("rice", len(y), origin)
    d = np.diff(y)
    variance = float(np.sum(d**2) / (2 * (len(y) - 1)))
    return NoiseResult(sd=float(np.sqrt(variance)), method="rice", dof=len(y) - 1)


def _gsj_residuals(time: np.ndarray, value: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(time, dtype=float)
    y = np.asarray(value, dtype=float)
    span = x[2:] - x[:-2]
    if np.any(span <= 0):
        raise InputError(
            "three consecutive points share one time; pseudo-residuals need distinct times"
        )
    a = (x[2:] - x[1:-1]) / span
    b = (x[1:-1] - x[:-2]) / span
    residual = a * y[:-2] + b * y[2:] - y[1:-1]
    c2 = 1.0 / (a**2 + b**2 + 1.0)
    return residual, c2


def gasser_sroka(time: np.ndarray, value: np.ndarray, *, origin: str = "series") -> NoiseResult:
    """Give the Gasser, Sroka & Jennen-Steinmetz (1986) pseudo-residual estimate.

    e_i = a_i y_{i-1} + b_i y_{i+1} - y_i with a_i = (x_{i+1}-x_i)/(x_{i+1}-x_{i-1}),
    b_i = (x_i-x_{i-1})/(x_{i+1}-x_{i-1}); sigma^2 = sum c_i^2 e_i^2 / (n-2) with
    c_i^2 = 1/(a_i^2 + b_i^2 + 1). Exact for a locally linear signal; handles uneven spacing.
    Gasser, Sroka & Jennen-Steinmetz (1986), Biometrika 73:625.
    """
    _need("gsj", len(value), origin)
    residual, c2 = _gsj_residuals(time, value)
    variance = float(np.sum(c2 * residual**2) / (len(value) - 2))
    return NoiseResult(sd=float(np.sqrt(variance)), method="gsj", dof=len(value) - 2)


def hall_kay_titterington(
    value: np.ndarray, *, order: int = 2, origin: str = "series"
) -> NoiseResult:
    """Give the optimal-difference-sequence estimate of Hall, Kay & Titterington (1990).

    sigma^2 = sum_k (sum_j d_j y_{k+j})^2 / (n - m) for the order-m sequence d (equal spacing).
    """
    if order not in (2, 3):
        raise InputError(f"{origin}: Hall-Kay-Titterington order {order}; expected 2 or 3")
    method = f"hkt{order}"
    y = np.asarray(value, dtype=float)
    _need(method, len(y), origin)
    d = np.asarray(HKT_SEQUENCES[order])
    combos = np.convolve(y, d[::-1], mode="valid")
    variance = float(np.sum(combos**2) / (len(y) - order))
    return NoiseResult(sd=float(np.sqrt(variance)), method=method, dof=len(y) - order)


def mad_pseudo_residuals(
    time: np.ndarray, value: np.ndarray, *, origin: str = "series"
) -> NoiseResult:
    """Give a robust SD: 1.4826 * median |c_i e_i| of the normalised GSJ pseudo-residuals.

    Robust to a few outliers or steps; the factor 1/Phi^-1(3/4) = 1.4826 makes it consistent
    for normal noise (common practice for the MAD; the residuals have median 0 by symmetry).
    """
    _need("mad", len(value), origin)
    residual, c2 = _gsj_residuals(time, value)
    scaled = np.sqrt(c2) * residual
    sd = float(_MAD_TO_SD * np.median(np.abs(scaled)))
    return NoiseResult(sd=sd, method="mad", dof=len(value) - 2)


@dataclass(frozen=True)
class ReplicateSD:
    """Per-time-point replicate SDs and their pooled value."""

    times: np.ndarray
    means: np.ndarray
    sds: np.ndarray  # NaN where a time has one value only
    counts: np.ndarray
    pooled_sd: float
    dof: int

    def result(self) -> NoiseResult:
        """Give the pooled SD as a NoiseResult, flagging thin replication."""
        warnings = []
        replicated = self.counts >= 2
        if np.any(replicated & (self.counts < 3)):
            warnings.append(
                f"{int(np.sum(replicated & (self.counts < 3)))} time point(s) have only 2 replicates: "
                "per-point SDs from n < 3 are very uncertain"
            )
        return NoiseResult(
            sd=self.pooled_sd,
            method="replicates",
            dof=self.dof,
            parameters={
                "time_points_replicated": int(replicated.sum()),
                "max_replicates": int(self.counts.max()),
            },
            warnings=tuple(warnings),
        )


def replicate_sd(time: np.ndarray, value: np.ndarray, *, origin: str = "series") -> ReplicateSD:
    """Give replicate SDs per time point (ddof=1) and the pooled SD sqrt(sum SS / sum (n_t - 1))."""
    t = np.asarray(time, dtype=float)
    y = np.asarray(value, dtype=float)
    times, inverse, counts = np.unique(t, return_inverse=True, return_counts=True)
    sums = np.bincount(inverse, weights=y)
    means = sums / counts
    squares = np.bincount(inverse, weights=(y - means[inverse]) ** 2)
    dof_each = counts - 1
    dof = int(dof_each.sum())
    if dof == 0:
        raise InputError(
            f"{origin}: no time point has two or more values; replicate SDs need replicates"
        )
    with np.errstate(invalid="ignore", divide="ignore"):
        sds = np.where(dof_each > 0, np.sqrt(squares / np.maximum(dof_each, 1)), np.nan)
    pooled = float(np.sqrt(squares.sum() / dof))
    return ReplicateSD(times=times, means=means, sds=sds, counts=counts, pooled_sd=pooled, dof=dof)


def reported_to_sd(
    uncertainty: np.ndarray,
    *,
    kind: str,
    value: np.ndarray | None = None,
    n: np.ndarray | int | None = None,
    level: float | None = None,
) -> np.ndarray:
    """Give reported uncertainties as SDs of single measurements.

    sd: as is; sem: sem * sqrt(n); ci of a mean of n: half-width / t_{n-1}((1+level)/2) is its
    SEM, so the SD is that * sqrt(n); ci without n: half-width / z((1+level)/2); percent:
    pct / 100 * |value|; estimated, assumed: as is.
    """
    u = np.asarray(uncertainty, dtype=float)
    if kind in ("sd", "estimated", "assumed"):
        return u.copy()
    if kind == "sem":
        if n is None:
            raise InputError("an SEM converts to an SD only with its n")
        return np.asarray(u * np.sqrt(np.asarray(n, dtype=float)), dtype=float)
    if kind == "ci":
        if level is None:
            raise InputError("a confidence interval converts to an SD only with its level")
        q = (1.0 + level) / 2.0
        if n is None:
            return np.asarray(u / stats.norm.ppf(q), dtype=float)
        count = np.asarray(n, dtype=float)
        return np.asarray(u / stats.t.ppf(q, count - 1.0) * np.sqrt(count), dtype=float)
    if kind == "percent":
        if value is None:
            raise InputError("a percentage uncertainty converts to an SD only with the values")
        return np.asarray(u / 100.0 * np.abs(np.asarray(value, dtype=float)), dtype=float)
    raise InputError(f"unknown uncertainty type '{kind}'")


@dataclass(frozen=True)
class ErrorModel:
    """sigma_i^2 = a^2 + (b mu_i)^2 fitted by maximum likelihood, with standard errors."""

    a: float
    b: float
    a_stderr: float
    b_stderr: float
    groups: int
    log_likelihood: float

    def sigma(self, mu: np.ndarray) -> np.ndarray:
        """Give the model SD at mean level(s) mu."""
        return np.sqrt(self.a**2 + (self.b * np.asarray(mu, dtype=float)) ** 2)


def error_model(time: np.ndarray, value: np.ndarray, *, origin: str = "series") -> ErrorModel:
    """Give the additive + proportional error model fitted to replicate scatter by ML.

    At each replicated time t the sum of squares about the replicate mean, SS_t, is
    sigma_t^2 * chi2(n_t - 1) with sigma_t^2 = a^2 + (b ybar_t)^2, so
    log L = sum_t [-(k_t/2) log sigma_t^2 - SS_t / (2 sigma_t^2)] + const, k_t = n_t - 1.
    Standard errors from the inverse of the observed information (numerical Hessian).
    """
    rep = replicate_sd(time, value, origin=origin)
    use = rep.counts >= 2
    if use.sum() < 3:
        raise InputError(
            f"{origin}: {int(use.sum())} replicated time point(s); the error model needs at least 3"
        )
    k = (rep.counts[use] - 1).astype(float)
    ss = (rep.sds[use] ** 2) * k
    mu = rep.means[use]

    def negative_log_likelihood(theta: np.ndarray) -> float:
        a, b = theta
        var = a**2 + (b * mu) ** 2
        if np.any(var <= 0):
            return 1e300
        return float(np.sum(0.5 * k * np.log(var) + ss / (2.0 * var)))

    scale = max(rep.pooled_sd, 1e-300)
    level = max(float(np.mean(np.abs(mu))), 1e-300)
    starts = [(scale, 0.0), (scale * 0.5, 0.5 * scale / level), (scale * 1e-3, scale / level)]
    best = None
    for start in starts:
        fit = optimize.minimize(
            negative_log_likelihood,
            np.asarray(start),
            method="L-BFGS-B",
            bounds=[(0.0, None), (0.0, None)],
        )
        if best is None or fit.fun < best.fun:
            best = fit
    assert best is not None
    a, b = (float(x) for x in best.x)
    a_se, b_se = _hessian_stderr(negative_log_likelihood, np.array([a, b]))
    return ErrorModel(
        a=a,
        b=b,
        a_stderr=a_se,
        b_stderr=b_se,
        groups=int(use.sum()),
        log_likelihood=-float(best.fun),
    )


def _hessian_stderr(
    function: Callable[[np.ndarray], float], theta: np.ndarray
) -> tuple[float, float]:
    """Give sqrt(diag(H^-1)) by central differences; NaN where a parameter sits on its bound."""
    h = np.maximum(np.abs(theta) * 1e-4, 1e-8)
    size = len(theta)
    hessian = np.zeros((size, size))
    for i in range(size):
        for j in range(size):
            ei = np.eye(size)[i] * h[i]
            ej = np.eye(size)[j] * h[j]
            hessian[i, j] = (
                function(theta + ei + ej)
                - function(theta + ei - ej)
                - function(theta - ei + ej)
                + function(theta - ei - ej)
            ) / (4 * h[i] * h[j])
    result = [float("nan")] * size
    on_bound = theta <= h
    free = ~on_bound
    if free.any():
        try:
            covariance = np.linalg.inv(hessian[np.ix_(free, free)])
            diagonal = np.sqrt(np.clip(np.diag(covariance), 0, None))
            for position, index in enumerate(np.flatnonzero(free)):
                result[index] = float(diagonal[position])
        except np.linalg.LinAlgError:
            pass
    return result[0], result[1]


def apply_floor(
    sd: np.ndarray, value: np.ndarray, *, absolute: float, relative: float
) -> np.ndarray:
    """Give sd_i = max(sd_i, absolute, relative * |y_i|), so no weight is ever infinite."""
    floored = np.maximum(np.asarray(sd, dtype=float), absolute)
    return np.asarray(
        np.maximum(floored, relative * np.abs(np.asarray(value, dtype=float))), dtype=float
    )


# Estimators of one series without replicates: (time, value, origin) -> NoiseResult. A new one
# is a function above and one entry here; --method and METHODS follow.
DIFFERENCE_ESTIMATORS: dict[str, Callable[[np.ndarray, np.ndarray, str], NoiseResult]] = {
    "rice": lambda t, y, origin: rice(y, origin=origin),
    "gsj": lambda t, y, origin: gasser_sroka(t, y, origin=origin),
    "hkt2": lambda t, y, origin: hall_kay_titterington(y, order=2, origin=origin),
    "hkt3": lambda t, y, origin: hall_kay_titterington(y, order=3, origin=origin),
    "mad": lambda t, y, origin: mad_pseudo_residuals(t, y, origin=origin),
}
METHODS = ("auto", "replicates", "reported", *DIFFERENCE_ESTIMATORS, "error-model")


def _per_replicate(
    estimator: Callable[[np.ndarray, np.ndarray], NoiseResult],
    time: np.ndarray,
    value: np.ndarray,
    replicate: np.ndarray | None,
) -> NoiseResult:
    """Apply a difference estimator to each replicate's own series and pool by dof."""
    if replicate is None:
        return estimator(time, value)
    results = [estimator(time[replicate == r], value[replicate == r]) for r in np.unique(replicate)]
    dof = sum(r.dof for r in results)
    pooled = float(np.sqrt(sum(r.sd**2 * r.dof for r in results) / dof))
    return NoiseResult(
        sd=pooled,
        method=results[0].method,
        dof=dof,
        parameters={"replicate_series": len(results)},
    )


def choose_and_estimate(
    time: np.ndarray,
    value: np.ndarray,
    *,
    method: str = "auto",
    replicate: np.ndarray | None = None,
    reported_sd: np.ndarray | None = None,
    origin: str = "series",
) -> NoiseResult:
    """Give the noise estimate by ``method``; 'auto' takes replicates, else reported SDs, else GSJ.

    ``reported_sd`` must already be SDs (see :func:`reported_to_sd`). The choice and its reason
    are recorded in the result's parameters.
    """
    if method not in METHODS:
        raise InputError(f"unknown noise method '{method}'; expected one of {', '.join(METHODS)}")
    t = np.asarray(time, dtype=float)
    y = np.asarray(value, dtype=float)
    reason = f"asked for {method}"
    if method == "auto":
        _, counts = np.unique(t, return_counts=True)
        if np.any(counts >= 2):
            method, reason = "replicates", "automatic: the dataset has replicates"
        elif reported_sd is not None and np.isfinite(reported_sd).any():
            method, reason = "reported", "automatic: no replicates; the lab reported uncertainties"
        else:
            method, reason = "gsj", "automatic: no replicates, no reported uncertainty"
    if method == "replicates":
        result = replicate_sd(t, y, origin=origin).result()
    elif method == "reported":
        if reported_sd is None or not np.isfinite(reported_sd).any():
            raise InputError(f"{origin}: no reported uncertainties to use; choose another --method")
        known = reported_sd[np.isfinite(reported_sd)]
        result = NoiseResult(
            sd=float(np.sqrt(np.mean(known**2))),
            method="reported",
            dof=len(known),
            parameters={
                "points_with_sd": len(known),
                "min_sd": float(known.min()),
                "max_sd": float(known.max()),
            },
        )
    elif method == "error-model":
        model = error_model(t, y, origin=origin)
        result = NoiseResult(
            sd=float(np.sqrt(np.mean(model.sigma(y) ** 2))),
            method="error-model",
            dof=model.groups,
            parameters={
                "a": model.a,
                "b": model.b,
                "a_stderr": model.a_stderr,
                "b_stderr": model.b_stderr,
                "log_likelihood": model.log_likelihood,
            },
        )
    else:
        estimator = DIFFERENCE_ESTIMATORS[method]
        result = _per_replicate(lambda tt, yy: estimator(tt, yy, origin), t, y, replicate)
        spacing = np.diff(np.unique(t))
        if (
            method in ("rice", "hkt2", "hkt3")
            and len(spacing)
            and spacing.max() > 1.5 * spacing.min()
        ):
            result = NoiseResult(
                sd=result.sd,
                method=result.method,
                dof=result.dof,
                parameters=result.parameters,
                warnings=(
                    *result.warnings,
                    "uneven time spacing: gsj handles it, this estimator assumes even spacing",
                ),
            )
    return NoiseResult(
        sd=result.sd,
        method=result.method,
        dof=result.dof,
        parameters={**result.parameters, "choice": reason},
        warnings=result.warnings,
    )
