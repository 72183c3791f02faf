"""Mechanistic model of the invented example scenario (demo data only).

Scenario: cells of an invented line are stimulated with an invented drug, lumatrope, at dose D.
The drug activates a receptor (active fraction A); active receptor drives synthesis of an
invented signalling protein, velarin (V, nM), which is degraded at first order. A genetically
encoded reporter, Glint, reads velarin out in arbitrary units (one scale factor per dataset).
Every rate scales with temperature by a Q10 law, rate(T) = rate(37 °C) * q10 ** ((T - 37) / 10).

    dA/dt = f(T) * (k_on * D / (D + K_d) * (1 - A) - k_off * A),   A(0) = 0
    dV/dt = f(T) * (k_syn * A - k_deg * V),                          V(0) = 0

Rates are per minute, K_d in nM (the catalog's canonical concentration). The catalog stores
time in seconds; :func:`predict` converts. Both observables predict V; the fitting engine
solves the Glint scale factor of each relative-unit dataset in closed form.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.integrate import solve_ivp

PARAMETERS = ("k_on", "K_d", "k_off", "k_syn", "k_deg", "q10")

# the values the example data were generated with
TRUTH = {"k_on": 0.2, "K_d": 2000.0, "k_off": 0.1, "k_syn": 2.0, "k_deg": 0.05, "q10": 2.2}


def velarin(
    params: dict[str, float], dose_nM: float, temperature_C: float, times_min: np.ndarray
) -> np.ndarray:
    """Give V (nM) at ``times_min`` for one dose and temperature."""
    f = params["q10"] ** ((temperature_C - 37.0) / 10.0)
    drive = params["k_on"] * dose_nM / (dose_nM + params["K_d"])

    def rhs(_t: float, y: np.ndarray) -> list[float]:
        a, v = y
        return [
            f * (drive * (1.0 - a) - params["k_off"] * a),
            f * (params["k_syn"] * a - params["k_deg"] * v),
        ]

    times = np.asarray(times_min, dtype=float)
    unique = np.unique(times)
    t_end = float(unique[-1]) if len(unique) else 0.0
    if t_end <= 0:
        return np.zeros_like(times)
    solution = solve_ivp(
        rhs, (0.0, t_end), [0.0, 0.0], t_eval=unique, method="LSODA", rtol=1e-8, atol=1e-10
    )
    values = solution.y[1]
    return np.asarray(values[np.searchsorted(unique, times)], dtype=float)


def predict(params: dict[str, float], points: Any) -> np.ndarray:
    """Give one prediction per row of the weighted long table (time in s, dose in nM)."""
    out = np.empty(len(points), dtype=float)
    time_min = points["time"].to_numpy(dtype=float) / 60.0
    keys = points[["dose", "temperature"]].to_numpy(dtype=float)
    for dose, temperature in np.unique(keys, axis=0):
        rows = np.flatnonzero((keys[:, 0] == dose) & (keys[:, 1] == temperature))
        out[rows] = velarin(params, dose, temperature, time_min[rows])
    return out
