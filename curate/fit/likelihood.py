"""The likelihood of points whose noise model is part of the model. Pure numpy.

Where a model backend gives each point's sigma (a PEtab noise formula, perhaps with estimated
noise parameters), weighted least squares with fixed weights is the wrong objective: the fit
minimises the negative log-likelihood instead, as PEtab v1 defines it on the transformed scale
(t = identity, ln or log10):

- normal:  nllh_i = 0.5 ln(2 pi sigma_i^2) + 0.5 ((t(y_i) - t(h_i)) / sigma_i)^2
- Laplace: nllh_i = ln(2 sigma_i) + |t(y_i) - t(h_i)| / sigma_i

plus, for log-transformed points, the change of variables back to y: ln y_i (ln) or
ln(y_i ln 10) (log10). Trust acts on sigma: sigma_eff = sigma_model * sqrt(v_grade / b_d).

For the least-squares engine the objective is written as half a sum of squares,
2 nllh = sum r_i^2 + sum q_i^2 + const, with the scaled residual r_i and a noise residual
q_i = sqrt(2 (ln sigma_i + C)) (normal) or sqrt(2 (ln(2 sigma_i) + C)) (Laplace); the offset C
keeps the root real for any sigma above e^-C. The gradient of this form is the exact gradient of
the nllh, so the Gauss-Newton / trust-region machinery, its multi-starts and the sensitivity
refits work unchanged (the same construction as the "sigma residuals" of AMICI, Fröhlich et al.
2021, and pyPESTO).
"""

from __future__ import annotations

import math

import numpy as np

from curate.errors import InputError

__all__ = [
    "NOISE_OFFSET",
    "TRANSFORMATIONS",
    "PointScales",
    "negative_log_likelihood",
    "noise_residuals",
    "point_nllh",
    "scaled_residuals",
    "transformed",
]

NOISE_OFFSET = 50.0  # C above: sigma may fall to e^-50 (about 2e-22) before the root fails
TRANSFORMATIONS = ("lin", "log", "log10")
_DISTRIBUTIONS = ("normal", "laplace")


def transformed(values: np.ndarray, transformation: np.ndarray) -> np.ndarray:
    """Give each value on its point's scale: itself (lin), ln (log) or log10 (log10)."""
    values = np.asarray(values, dtype=float)
    kinds = np.asarray(transformation).astype(str)
    unknown = set(kinds.tolist()) - set(TRANSFORMATIONS)
    if unknown:
        raise InputError(
            f"observable transformation '{sorted(unknown)[0]}'; expected one of {', '.join(TRANSFORMATIONS)}"
        )
    out = values.copy()
    with np.errstate(divide="ignore", invalid="ignore"):
        log = kinds == "log"
        out[log] = np.log(values[log])
        log10 = kinds == "log10"
        out[log10] = np.log10(values[log10])
    return out


def _kinds(distribution: np.ndarray) -> np.ndarray:
    kinds = np.asarray(distribution).astype(str)
    unknown = set(kinds.tolist()) - set(_DISTRIBUTIONS)
    if unknown:
        raise InputError(
            f"noise distribution '{sorted(unknown)[0]}'; expected one of {', '.join(_DISTRIBUTIONS)}"
        )
    return kinds


def scaled_residuals(measurement: np.ndarray, simulation: np.ndarray, sigma: np.ndarray,
                     transformation: np.ndarray, distribution: np.ndarray) -> np.ndarray:  # fmt: skip
    """Give r_i: (t(y) - t(h)) / sigma (normal), sign * sqrt(2 |t(y) - t(h)| / sigma) (Laplace).

    Half the sum of r_i^2 is the data part of the nllh in either case.
    """
    difference = transformed(measurement, transformation) - transformed(simulation, transformation)
    sigma = np.asarray(sigma, dtype=float)
    kinds = _kinds(distribution)
    out = difference / sigma
    laplace = kinds == "laplace"
    out[laplace] = np.sign(difference[laplace]) * np.sqrt(2 * np.abs(out[laplace]))
    return np.asarray(out, dtype=float)


def noise_residuals(sigma: np.ndarray, distribution: np.ndarray) -> np.ndarray:
    """Give q_i = sqrt(2 (ln sigma + C)) (normal) or sqrt(2 (ln 2 sigma + C)) (Laplace)."""
    sigma = np.asarray(sigma, dtype=float)
    kinds = _kinds(distribution)
    log_term = np.log(np.where(kinds == "laplace", 2 * sigma, sigma))
    return np.asarray(np.sqrt(np.maximum(2 * (log_term + NOISE_OFFSET), 0.0)), dtype=float)


def point_nllh(measurement: np.ndarray, simulation: np.ndarray, sigma: np.ndarray,
               transformation: np.ndarray, distribution: np.ndarray) -> np.ndarray:  # fmt: skip
    """Give each point's PEtab v1 negative log-likelihood (the module docstring's formulas)."""
    y = np.asarray(measurement, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    kinds = _kinds(distribution)
    r = scaled_residuals(y, simulation, sigma, transformation, distribution)
    laplace = kinds == "laplace"
    terms = np.where(
        laplace,
        np.log(2 * sigma) + 0.5 * r**2,
        0.5 * math.log(2 * math.pi) + np.log(sigma) + 0.5 * r**2,
    )
    scale = np.asarray(transformation).astype(str)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = terms + np.where(scale == "log", np.log(y), 0.0)
        terms = terms + np.where(scale == "log10", np.log(y * math.log(10)), 0.0)
    return np.asarray(terms, dtype=float)


def negative_log_likelihood(measurement: np.ndarray, simulation: np.ndarray, sigma: np.ndarray,
                            transformation: np.ndarray, distribution: np.ndarray) -> float:  # fmt: skip
    """Give the sum of :func:`point_nllh`."""
    return float(np.sum(point_nllh(measurement, simulation, sigma, transformation, distribution)))


class PointScales:
    """The transformation and distribution of a fixed set of points, read once: their scaled and
    noise residuals for many simulations and sigmas (what a fit evaluates again and again).

    Gives the same numbers as :func:`scaled_residuals` and :func:`noise_residuals`.
    """

    def __init__(self, measurement: np.ndarray, transformation: np.ndarray,
                 distribution: np.ndarray) -> None:  # fmt: skip
        kinds = _kinds(distribution)
        self.laplace = kinds == "laplace"
        self.any_laplace = bool(self.laplace.any())
        self.transformed_measurement = transformed(measurement, transformation)
        scale = np.asarray(transformation).astype(str)
        self.log, self.log10 = scale == "log", scale == "log10"
        self.any_log = bool(self.log.any() or self.log10.any())

    def _transformed(self, values: np.ndarray) -> np.ndarray:
        if not self.any_log:
            return values
        out = np.array(values, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[self.log] = np.log(out[self.log])
            out[self.log10] = np.log10(out[self.log10])
        return out

    def residuals(self, simulation: np.ndarray, sigma: np.ndarray) -> np.ndarray:
        """Give [r, q]: the scaled residuals and the noise residuals, one of each per point."""
        difference = self.transformed_measurement - self._transformed(simulation)
        r = difference / sigma
        log_term = np.log(sigma)
        if self.any_laplace:
            laplace = self.laplace
            r[laplace] = np.sign(difference[laplace]) * np.sqrt(2 * np.abs(r[laplace]))
            log_term[laplace] += math.log(2)
        q = np.sqrt(np.maximum(2 * (log_term + NOISE_OFFSET), 0.0))
        return np.concatenate([r, q])
