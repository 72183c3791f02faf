"""Flat-valley test problems made here, with reference values computed in 50-digit arithmetic.

How they were made (``python tests/flat_valley.py`` rewrites tests/data/flat_valley/*.json):

- CloseRates: y = b1 exp(-b2 t) + b3 exp(-b4 t) + b5 t^2, two decays with close rates (0.013 and
  0.019 per unit time) and a small drift (b5 = 2.5e-6), so the parameters span 2.5e-6 .. 820 and
  the Jacobian is ill-conditioned (the two exponentials nearly trade places). 41 times 0..300,
  the truth times (1 + 0.4 % normal noise, seed 7), each value rounded to 3 significant digits.
  The data's own minimum splits the decays otherwise (rates 0.0138 and 0.0345, b3 = 41 +- 16):
  that is how flat the valley is.
- SmallHalfDose: y = b1 + b2 x^b3 / (b4^b3 + x^b3), a dose-response curve with a half-effect
  dose b4 = 3.7e-6 (doses 1e-9 .. 1e-3, log-spaced, 25 points), b1 = 12, b2 = 950, b3 = 0.85;
  normal noise of 2 % of max(y, 50) (seed 11), rounded to 3 significant digits.

Reference values: the least-squares minimum of the rounded data found with mpmath at 50
significant digits (Levenberg-Marquardt on the normal equations, which at 50 digits lose
nothing that matters, with central-difference derivatives of step 1e-25), iterated until the
step is below 1e-40 relative; standard deviations sqrt(diag((J'J)^-1) RSS / (n - p)), as the
NIST StRD files define theirs. Independent of curate's engine: no scipy, no float64.
"""

from __future__ import annotations

import json
from pathlib import Path

import mpmath
import numpy as np

FOLDER = Path(__file__).resolve().parent / "data" / "flat_valley"


def close_rates(b, t, exp):
    return b[0] * exp(-b[1] * t) + b[2] * exp(-b[3] * t) + b[4] * t * t


def small_half_dose(b, x, exp):
    # x^n written as exp(n ln x) so one formula serves float64 (numpy) and mpmath
    log = np.log if exp is np.exp else mpmath.log
    power = exp(b[2] * log(x))
    return b[0] + b[1] * power / (exp(b[2] * log(b[3])) + power)


MODELS = {"CloseRates": close_rates, "SmallHalfDose": small_half_dose}
TRUTH = {
    "CloseRates": [820.0, 0.013, 260.0, 0.019, 2.5e-6],
    "SmallHalfDose": [12.0, 950.0, 0.85, 3.7e-6],
}
STARTS = {  # 10-40 % off the truth, as NIST's start 2 is off its certified values
    "CloseRates": [700.0, 0.012, 350.0, 0.022, 2.0e-6],
    "SmallHalfDose": [10.0, 800.0, 1.0, 5.0e-6],
}


def _round(values: np.ndarray, digits: int) -> np.ndarray:
    return np.array([float(f"{v:.{digits - 1}e}") for v in values])


def make(name: str) -> tuple[np.ndarray, np.ndarray]:
    """Give (x, y): the truth at the design, with noise, rounded to 3 significant digits."""
    if name == "CloseRates":
        x = np.linspace(0.0, 300.0, 41)
        rng = np.random.default_rng(7)
        y = close_rates(TRUTH[name], x, np.exp) * (1 + rng.normal(0, 0.004, len(x)))
    else:
        x = np.logspace(-9, -3, 25)
        rng = np.random.default_rng(11)
        clean = small_half_dose(TRUTH[name], x, np.exp)
        y = clean + rng.normal(0, 0.02, len(x)) * np.maximum(clean, 50.0)
    return x, _round(y, 3)


def reference(name: str, x, y, start, dps: int = 50) -> dict:
    """Give the 50-digit least-squares minimum, its SDs and RSS (as strings of 30 digits)."""
    model = MODELS[name]
    with mpmath.workdps(dps):
        xs = [mpmath.mpf(str(v)) for v in x]
        ys = [mpmath.mpf(str(v)) for v in y]
        b = [mpmath.mpf(str(v)) for v in start]
        p, n = len(b), len(xs)

        def residual(b):
            return mpmath.matrix([ys[i] - model(b, xs[i], mpmath.exp) for i in range(n)])

        def jac(b):
            j = mpmath.matrix(n, p)
            for k in range(p):
                h = mpmath.mpf("1e-25") * max(abs(b[k]), mpmath.mpf(1))
                up, down = list(b), list(b)
                up[k] += h
                down[k] -= h
                column = (residual(up) - residual(down)) / (2 * h)
                for i in range(n):
                    j[i, k] = column[i]
            return j

        def cost(r):
            return sum(v * v for v in r)

        r = residual(b)
        damping = mpmath.mpf("1e-3")
        for _ in range(500):
            j = jac(b)
            a = j.T * j
            g = j.T * r
            while True:
                damped = a.copy()
                for k in range(p):
                    damped[k, k] += damping * a[k, k]
                step = mpmath.lu_solve(damped, -g)
                trial = [b[k] + step[k] for k in range(p)]
                try:
                    rt = residual(trial)
                except (ZeroDivisionError, ValueError):
                    rt = None
                if rt is not None and cost(rt) <= cost(r):
                    break
                damping *= 10
            b, r = trial, rt
            damping = max(damping / 10, mpmath.mpf("1e-30"))
            if max(abs(step[k]) / abs(b[k]) for k in range(p)) < mpmath.mpf("1e-40"):
                break
        j = jac(b)
        covariance = mpmath.inverse(j.T * j)
        rss = cost(r)
        variance = rss / (n - p)
        sds = [mpmath.sqrt(covariance[k, k] * variance) for k in range(p)]
        return {
            "values": [mpmath.nstr(v, 30) for v in b],
            "sds": [mpmath.nstr(v, 30) for v in sds],
            "rss": mpmath.nstr(rss, 30),
        }


def read(name: str) -> dict:
    """Give a stored problem: x, y, start, values, sds, rss (floats) and how it was made."""
    content = json.loads((FOLDER / f"{name}.json").read_text())
    for key in ("values", "sds"):
        content[key] = [float(v) for v in content[key]]
    content["rss"] = float(content["rss"])
    content["x"] = np.array(content["x"])
    content["y"] = np.array(content["y"])
    return content


def write(name: str) -> None:
    x, y = make(name)
    found = reference(name, x, y, STARTS[name])
    content = {
        "made": "see tests/flat_valley.py (module docstring)",
        "model": name,
        "start": STARTS[name],
        "truth": TRUTH[name],
        "reference": "mpmath, 50 significant digits (Levenberg-Marquardt)",
        **found,
        "x": [float(v) for v in x],
        "y": [float(v) for v in y],
    }
    (FOLDER / f"{name}.json").write_text(json.dumps(content, indent=1) + "\n")


if __name__ == "__main__":
    FOLDER.mkdir(parents=True, exist_ok=True)
    for problem_name in MODELS:
        write(problem_name)
        stored = read(problem_name)
        print(problem_name, stored["values"], stored["sds"], stored["rss"])
