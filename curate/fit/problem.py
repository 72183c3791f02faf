"""The fitting problem: points, weights, a model backend and a parameter spec, and its residual.

Residual of point i:  r_i = sqrt(w_i) * (y_i - s_g * f_i(theta)),  objective sum r_i^2.

Relative-unit rows get one scale factor per calibration group, solved in closed form inside the
residual, s* = sum(w y h) / sum(w h^2) (h the model prediction): the variable-projection idea of
Golub & Pereyra (1973), so the optimiser sees only the shared parameters. The optimiser works on
O(1) numbers: ln p for log parameters, p / |start| otherwise.

A backend with its own noise model (``backend.noise_model``: a PEtab problem's noise formulas,
perhaps with estimated noise parameters) is fitted by its negative log-likelihood instead
(:mod:`curate.fit.likelihood`): the residual is then [r_1..r_n, q_1..q_n], the scaled residuals
and the noise residuals, with sigma_eff = sigma_model * sqrt(inflation / balance) (trust acts on
sigma; the weight column is not used). :meth:`FitProblem.residual_index` maps point rows to
residual rows in either case.

Censored points (a ``censored`` column: 'below' or 'above' the limit held in ``value``) enter
with the censored-normal term of :mod:`curate.fit.censored`, r = sqrt(-2 log Phi(z)); they take
no part in the closed-form scale factors (a limit is not a measured level), which are solved
from the observed points and then applied to the censored ones too. A noise-model backend
refuses them: its PEtab likelihood has no censored term here.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit import likelihood
from curate.fit.backends import ModelBackend, PointEvaluation, PythonFunction
from curate.fit.censored import censoring_codes, residuals_with_censoring
from curate.fit.spec import ParameterSpec

__all__ = ["FitProblem"]


@dataclass
class FitProblem:
    """Points, weights, model and spec: what a fit needs, with the projected residual.

    ``model`` is a :class:`~curate.fit.backends.ModelBackend`, or a plain function
    ``f(params, points) -> ndarray``, which is taken as an in-process Python backend.
    """

    points: pd.DataFrame
    model: ModelBackend | Callable[[dict[str, float], pd.DataFrame], Any]
    spec: ParameterSpec
    _groups: np.ndarray = field(init=False, repr=False)
    _group_names: list[str] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.backend: ModelBackend = (
            self.model if isinstance(self.model, ModelBackend) else PythonFunction(self.model)
        )
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
        if self.backend.noise_model:
            relative = np.zeros(len(self.y), bool)  # PEtab writes its scalings into formulas
        labels = np.where(relative, key.astype(str).to_numpy(), "")
        self._group_names = sorted(set(labels) - {""})
        index = {name: k for k, name in enumerate(self._group_names)}
        self._groups = np.array([index.get(label, -1) for label in labels])
        self.noise_model = bool(self.backend.noise_model)
        self.censored = censoring_codes(self.points)
        if self.noise_model and self.censored.any():
            raise InputError(
                f"{int(np.count_nonzero(self.censored))} censored points: a PEtab problem's "
                'likelihood has no censored term in curate; set censored = "omit" in the '
                "policy to fit without them"
            )
        self._observed = self.censored == 0
        # trust acts on sigma: sigma_eff = sigma_model * sqrt(v_grade / b_d)
        inflation = (
            self.points["inflation"].to_numpy(dtype=float) if "inflation" in self.points else 1.0
        )
        balance = self.points["balance"].to_numpy(dtype=float) if "balance" in self.points else 1.0
        self.trust_factor = np.broadcast_to(np.sqrt(inflation / balance), self.y.shape).copy()
        self.free = self.spec.free
        self._scales: dict[bytes | None, likelihood.PointScales] = {}
        self._evaluations: dict[bytes | None, Callable[[dict[str, float]], PointEvaluation]] = {}
        self.calls = 0  # model evaluations so far (the fit's budget counts these)
        self.fixed = {p.name: p.start for p in self.spec.parameters if p.fixed}
        # the optimiser works on O(1) numbers: ln p for log parameters, p / |start| otherwise
        # (finite-difference Jacobians lose digits when parameters span many decades)
        self.typical = np.array([1.0 if p.log or p.start == 0 else abs(p.start) for p in self.free])
        # whether the model carries complex parameters through (complex-step derivatives):
        # None until curate.fit.polish has tried
        self.complex_step: bool | None = None

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
        self.calls += 1
        try:
            output = self.backend.predict(params, frame)
        except InputError:
            raise
        except Exception as err:
            raise InputError(
                f"the model failed: {_reason(err)} (call it on the points yourself to see where)"
            ) from None
        prediction = _as_numbers(output) if np.ndim(output) else np.array([])
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

    def evaluate(self, theta: np.ndarray, rows: np.ndarray | None = None) -> PointEvaluation:
        """Give a noise-model backend's evaluation (sigma already times the trust factor)."""
        params = self.to_natural(theta)
        self.calls += 1
        try:
            found = self._prepared(rows)(params)
        except InputError:
            raise
        except Exception as err:
            raise InputError(f"the model failed: {_reason(err)}") from None
        simulation = np.asarray(found.simulation, dtype=float)
        sigma = np.asarray(found.sigma, dtype=float)
        factor = self.trust_factor if rows is None else self.trust_factor[rows]
        count = len(self.y) if rows is None else len(rows)
        if simulation.shape != (count,) or sigma.shape != (count,):
            raise InputError(
                f"the model gave {simulation.size} simulations and {sigma.size} sigmas for "
                f"{count} rows; expected one of each per row"
            )
        return PointEvaluation(simulation, sigma * factor, np.asarray(found.transformation),
                               np.asarray(found.distribution))  # fmt: skip

    def _prepared(self, rows: np.ndarray | None) -> Callable[[dict[str, float]], PointEvaluation]:
        """Give the backend's evaluation of the (chosen) rows, prepared once per set of rows."""
        key = None if rows is None else np.asarray(rows, dtype=np.int64).tobytes()
        found = self._evaluations.get(key)
        if found is None:
            if len(self._evaluations) > 64:  # many different row sets: keep memory bounded
                self._evaluations.clear()
            frame = self.points if rows is None else self.points.iloc[rows]
            found = self._evaluations[key] = self.backend.prepare(frame)
        return found

    def nllh(self, theta: np.ndarray, rows: np.ndarray | None = None) -> float:
        """Give the negative log-likelihood of the (chosen) points.

        With a noise-model backend, PEtab's (see :mod:`curate.fit.likelihood`); otherwise the
        normal likelihood with sigma_i = 1 / sqrt(w_i): 0.5 chi2 + sum ln sigma_i + n/2 ln 2 pi.
        """
        y = self.y if rows is None else self.y[rows]
        if self.noise_model:
            found = self.evaluate(theta, rows)
            return likelihood.negative_log_likelihood(
                y, found.simulation, found.sigma, found.transformation, found.distribution
            )
        residual = self.residual(theta, rows)
        # a censored point's term is a probability, -log Phi(z): no density constant of its own
        observed = self._observed if rows is None else self._observed[rows]
        w = (self.w if rows is None else self.w[rows])[observed]
        return float(0.5 * residual @ residual - 0.5 * np.sum(np.log(w))
                     + 0.5 * len(w) * math.log(2 * math.pi))  # fmt: skip

    def point_residual(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Give one scaled residual per (chosen) point; their squares sum to chi2."""
        if not self.noise_model:
            return self.residual(theta, rows)
        return self.residual(theta, rows)[: len(self.y) if rows is None else len(rows)]

    def residual_index(self, rows: np.ndarray) -> np.ndarray:
        """Give the residual rows of the chosen point rows (a noise model has two per point)."""
        rows = np.asarray(rows, dtype=int)
        return np.concatenate([rows, rows + len(self.y)]) if self.noise_model else rows

    def scales(self, prediction: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Give the closed-form scale factor of each calibration group, s* = sum(w y h) / sum(w h^2)."""
        groups = self._groups if rows is None else self._groups[rows]
        y = self.y if rows is None else self.y[rows]
        w = self.w if rows is None else self.w[rows]
        w = w * (self._observed if rows is None else self._observed[rows])  # limits do not count
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

    def residual(
        self, theta: np.ndarray, rows: np.ndarray | None = None, *, raw: bool = False
    ) -> np.ndarray:
        """Give sqrt(w) (y - s h) with the scale factors projected out.

        A censored point's entry is sqrt(-2 log Phi(z)) unless ``raw``, which gives every
        point's z-like sqrt(w) (y - s h) (what the covariance's curvature is taken along).

        With a noise-model backend: [r, q], the scaled and the noise residuals, so that half
        their sum of squares is the nllh up to a constant.
        """
        if self.noise_model:
            found = self.evaluate(theta, rows)
            key = None if rows is None else np.asarray(rows, dtype=np.int64).tobytes()
            scales = self._scales.get(key)
            if scales is None:  # the points' transformations and distributions, read once
                if len(self._scales) > 64:
                    self._scales.clear()
                y_rows = self.y if rows is None else self.y[rows]
                scales = self._scales[key] = likelihood.PointScales(
                    y_rows, found.transformation, found.distribution
                )
            with np.errstate(divide="ignore", invalid="ignore"):
                both = scales.residuals(found.simulation, found.sigma)
            if not np.all(np.isfinite(both)):
                r = both[: len(both) // 2]
                position = int(np.argmax(~np.isfinite(both))) % len(r)
                shown = ", ".join(f"{k}={v:.4g}" for k, v in self.to_natural(theta).items())
                raise InputError(
                    f"the likelihood is not finite at row {position + 1} (sigma "
                    f"{found.sigma[position]:.4g}, simulation {found.simulation[position]:.4g}) "
                    f"for parameters {shown}"
                )
            return both
        prediction = self.predict(theta, rows)
        groups = self._groups if rows is None else self._groups[rows]
        factor = np.ones(len(prediction))
        if self._group_names:
            scale = self.scales(prediction, rows)
            has = groups >= 0
            factor[has] = scale[groups[has]]
        y = self.y if rows is None else self.y[rows]
        sqrt_w = self.sqrt_w if rows is None else self.sqrt_w[rows]
        residual = np.asarray(sqrt_w * (y - factor * prediction), dtype=float)
        if raw:
            return residual
        return residuals_with_censoring(
            residual, self.censored if rows is None else self.censored[rows]
        )

    def complex_residual(self, theta: np.ndarray) -> np.ndarray:
        """Give :meth:`residual` of every row at complex ``theta`` (for complex-step derivatives;
        observed points without a noise model only). The model is called as it is, so a model
        written for floats may raise anything here: the caller decides what that means."""
        values: dict[str, Any] = dict(self.fixed)
        for p, x, t in zip(self.free, theta, self.typical, strict=True):
            values[p.name] = np.exp(x) if p.log else x * t
        self.calls += 1
        prediction = np.asarray(self.backend.predict(values, self.points))
        if prediction.shape != self.y.shape:
            raise InputError(f"the model returned {prediction.size} values for {len(self.y)} rows")
        factor: np.ndarray = np.ones(len(prediction))
        if self._group_names:  # s* = sum(w y h) / sum(w h^2), analytic in h: no float() here
            factor = factor.astype(complex)
            for k in range(len(self._group_names)):
                part = self._groups == k
                denominator = np.sum(self.w[part] * prediction[part] ** 2)
                factor[part] = np.sum(self.w[part] * self.y[part] * prediction[part]) / denominator
        return np.asarray(self.sqrt_w * (self.y - factor * prediction))

    def group_index(self, rows: np.ndarray | None = None) -> np.ndarray:
        """Give each row's scale-group number (-1 for rows without a scale factor)."""
        return self._groups if rows is None else self._groups[rows]

    def n_scale_factors(self, rows: np.ndarray | None = None) -> int:
        """Give how many scale groups have rows (each costs one degree of freedom)."""
        groups = self._groups if rows is None else self._groups[rows]
        return len(set(groups[groups >= 0].tolist()))


def _reason(err: Exception) -> str:
    """Give an exception's message in words (a missing key says so; never the class name)."""
    if isinstance(err, KeyError) and err.args:
        return f"no column or parameter {err.args[0]!r}"
    return str(err).strip() or "it raised an error without a message"


def _as_numbers(output: Any) -> np.ndarray:
    """Give the model's output as a flat float array; text or other non-numbers are refused."""
    raw = np.asarray(output)
    flat = raw.reshape(-1)
    if raw.dtype.kind in "USO":
        for row, item in enumerate(flat):
            if isinstance(item, str | bytes) or not _is_number(item):
                shown = f"'{item}'" if isinstance(item, str) else repr(item)
                raise InputError(
                    f"the model returned {shown} at row {row + 1}, which is not a number; "
                    "predict must give one float per row (e.g. a numpy float array)"
                )
    return np.asarray(flat, dtype=float)


def _is_number(item: Any) -> bool:
    try:
        float(item)
    except (TypeError, ValueError):
        return False
    return True
