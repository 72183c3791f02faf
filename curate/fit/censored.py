"""Censored points in a fit: the censored-normal (Tobit-type) likelihood term, as a residual.

A point known only to lie below its limit L (left-censored: below a detection limit) adds the
probability mass of the normal model below L to the likelihood; one above L (right-censored: a
saturated reading) the mass above it:

    below:  -log Phi((L - f) / sigma)        above:  -log Phi((f - L) / sigma)

with f the (scaled) prediction and sigma the point's effective sigma, 1 / sqrt(weight). This is
the censored-normal model of Tobin (1958, Econometrica 26:24); for concentrations below a
quantification limit in pharmacokinetics it is known as Beal's "M3" method (Beal 2001,
J Pharmacokinet Pharmacodyn 28:481; the journal reference from memory). Observed points add
0.5 z^2 (z = (y - f) / sigma), so a censored point enters the least-squares form with the
residual r = sqrt(-2 log Phi(z)), whose half square is its term. ``scipy.special.log_ndtr``
keeps log Phi accurate far in the lower tail, where Phi itself underflows.

Since the row's ``value`` holds the limit, the ordinary scaled residual sqrt(w) (L - f) is
already the z of a point below its limit, and its negative the z of a point above.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import pandas as pd
from scipy.special import log_ndtr

__all__ = ["censored_terms", "censoring_codes", "fit_points", "residuals_with_censoring"]

_CODE = {"below": 1, "above": 2}


def censoring_codes(points: pd.DataFrame) -> np.ndarray:
    """Give each row's censoring code: 0 observed, 1 below its limit, 2 above (no column: 0)."""
    if "censored" not in points.columns:
        return np.zeros(len(points), dtype=np.int8)
    words = points["censored"].astype(object).to_numpy()
    return np.array([_CODE.get(str(w), 0) if w is not None else 0 for w in words], dtype=np.int8)


def censored_terms(z: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Give -log Phi(z) for points below their limit and -log Phi(-z) above (z = sqrt(w) (L - f))."""
    signed = np.where(codes == 2, -z, z)
    return np.asarray(-log_ndtr(signed), dtype=float)


def censored_curvature(z: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Give d^2/dz^2 of each point's term: 1 for an observed point (0.5 z^2), and for a
    censored one lambda (lambda + u) with u = z (below) or -z (above) and lambda = phi(u) /
    Phi(u), the inverse Mills ratio (the second derivative of -log Phi(u))."""
    curvature = np.ones(len(z))
    censored = codes != 0
    if censored.any():
        u = np.where(codes[censored] == 2, -z[censored], z[censored])
        mills = np.exp(-0.5 * u * u - 0.5 * np.log(2 * np.pi) - log_ndtr(u))
        curvature[censored] = np.maximum(mills * (mills + u), 0.0)
    return curvature


def residuals_with_censoring(residual: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Give the residuals with each censored point's replaced by sqrt(-2 log Phi(.))."""
    censored = codes != 0
    if not censored.any():
        return residual
    result = np.array(residual, dtype=float)
    terms = censored_terms(result[censored], codes[censored])
    result[censored] = np.sqrt(2.0 * np.maximum(terms, 0.0))
    return result


def fit_points(
    table: pd.DataFrame, mode: Literal["likelihood", "omit"]
) -> tuple[pd.DataFrame, list[str]]:
    """Give the rows a fit uses under the policy's ``censored`` mode, and a note saying so."""
    codes = censoring_codes(table)
    count = int(np.count_nonzero(codes))
    if count == 0:
        return table, []
    if mode == "omit":
        kept = table.loc[codes == 0].reset_index(drop=True)
        return kept, [f'{count} censored points left out of the fit (policy: censored = "omit")']
    return table, [
        f"{count} censored points enter as the probability beyond their limit "
        '(censored-normal likelihood; policy: censored = "likelihood")'
    ]
