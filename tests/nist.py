"""NIST StRD nonlinear regression problems: reader, models, and digit counting (shared helper).

Source: NIST Statistical Reference Datasets, nonlinear regression (NIST Information Technology
Laboratory); certified values and standard deviations as published in each file.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

FOLDER = Path(__file__).resolve().parent / "data" / "nist_strd"

# model formulas as given in the header of each NIST file
MODELS = {
    "Misra1a": lambda b, x: b[0] * (1 - np.exp(-b[1] * x)),
    "Chwirut2": lambda b, x: np.exp(-b[0] * x) / (b[1] + b[2] * x),
    "Chwirut1": lambda b, x: np.exp(-b[0] * x) / (b[1] + b[2] * x),
    "DanWood": lambda b, x: b[0] * x ** b[1],
    "Misra1b": lambda b, x: b[0] * (1 - (1 + b[1] * x / 2) ** (-2)),
    "Kirby2": lambda b, x: (b[0] + b[1] * x + b[2] * x**2) / (1 + b[3] * x + b[4] * x**2),
    "Hahn1": lambda b, x: (
        (b[0] + b[1] * x + b[2] * x**2 + b[3] * x**3) / (1 + b[4] * x + b[5] * x**2 + b[6] * x**3)
    ),
    "MGH17": lambda b, x: b[0] + b[1] * np.exp(-x * b[3]) + b[2] * np.exp(-x * b[4]),
    "Misra1c": lambda b, x: b[0] * (1 - (1 + 2 * b[1] * x) ** (-0.5)),
    "BoxBOD": lambda b, x: b[0] * (1 - np.exp(-b[1] * x)),
    "MGH09": lambda b, x: b[0] * (x**2 + x * b[1]) / (x**2 + x * b[2] + b[3]),
    "Rat42": lambda b, x: b[0] / (1 + np.exp(b[1] - b[2] * x)),
    "Thurber": lambda b, x: (
        (b[0] + b[1] * x + b[2] * x**2 + b[3] * x**3) / (1 + b[4] * x + b[5] * x**2 + b[6] * x**3)
    ),
}
DIFFICULTY = {
    "Misra1a": "lower", "Chwirut2": "lower", "Chwirut1": "lower", "DanWood": "lower", "Misra1b": "lower",
    "Kirby2": "average", "Hahn1": "average", "MGH17": "average", "Misra1c": "average",
    "BoxBOD": "higher", "MGH09": "higher", "Rat42": "higher", "Thurber": "higher",
}  # fmt: skip


def read(name: str) -> dict:
    """Give starts, certified values and SDs, RSS and the data of one NIST file."""
    lines = (FOLDER / f"{name}.dat").read_text().splitlines()
    starts1, starts2, values, sds = [], [], [], []
    for line in lines[40:]:
        parts = line.split()
        if len(parts) >= 6 and parts[0].startswith("b") and parts[1] == "=":
            starts1.append(float(parts[2]))
            starts2.append(float(parts[3]))
            values.append(float(parts[4]))
            sds.append(float(parts[5]))
        elif values:
            break
    rss = next(
        float(line.split(":")[1])
        for line in lines
        if line.strip().startswith("Residual Sum of Squares")
    )
    data = np.array([[float(v) for v in line.split()] for line in lines[60:] if line.strip()])
    return {
        "start1": starts1,
        "start2": starts2,
        "values": values,
        "sds": sds,
        "rss": rss,
        "y": data[:, 0],
        "x": data[:, 1],
    }


def digits(estimate: float, certified: float) -> float:
    """Give the log relative error (number of agreeing significant digits), capped at 11."""
    if estimate == certified:
        return 11.0
    if certified == 0:
        return -math.log10(abs(estimate)) if estimate else 11.0
    return min(11.0, -math.log10(abs(estimate - certified) / abs(certified)))


def problem(name: str, start: str):
    """Give (points frame, model, spec dict) for a NIST problem from start1 or start2."""
    from curate.fit.spec import spec_from_dict

    content = read(name)
    points = pd.DataFrame(
        {"time": content["x"], "value": content["y"], "weight": 1.0, "relative": False}
    )
    names = [f"b{k + 1}" for k in range(len(content["values"]))]
    model = MODELS[name]

    def function(params, frame):
        return model([params[n] for n in names], frame["time"].to_numpy())

    spec = spec_from_dict(
        {"parameters": {n: {"start": s} for n, s in zip(names, content[start], strict=True)}}
    )
    return points, function, spec, content, names


def table() -> str:
    """Give the markdown table of agreeing digits for every problem and both starts."""
    from curate import fit as fitting

    rows = [
        "| problem | difficulty | start | value digits (min) | sd digits (min) | RSS digits |",
        "|---|---|---|---|---|---|",
    ]
    for name, difficulty in DIFFICULTY.items():
        for start in ("start1", "start2"):
            points, function, spec, content, names = problem(name, start)
            try:
                result = fitting.fit(
                    fitting.FitProblem(points, function, spec),
                    fitting.FitOptions(
                        tolerance=1e-15, scale_covariance=True, max_evaluations=20000
                    ),
                )
                v = min(
                    digits(result.parameters[n]["value"], c)
                    for n, c in zip(names, content["values"], strict=True)
                )
                s = min(
                    digits(result.parameters[n]["stderr"] or 0.0, c)
                    for n, c in zip(names, content["sds"], strict=True)
                )
                r = digits(result.chi2, content["rss"])
                rows.append(
                    f"| {name} | {difficulty} | {start[-1]} | {max(v, 0):.1f} | {max(s, 0):.1f} | {max(r, 0):.1f} |"
                )
            except Exception as err:  # a failed start is part of the table
                rows.append(
                    f"| {name} | {difficulty} | {start[-1]} | failed ({type(err).__name__}) | | |"
                )
    return "\n".join(rows)


if __name__ == "__main__":
    print(table())
