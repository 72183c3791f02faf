"""Ensemble benchmarks: workers against one process, curate's overhead per start, memory.

    python -m bench.ensembles [--quick]

- ``ensemble_2_workers``: N starts of the bench ODE model (bench/ode_model.py, 8 datasets in
  relative units) on 2 workers against the same N starts in one process; target 1 / 1.8.
- ``ensemble_dask``: the same starts on a Dask LocalCluster (2 workers) against the process
  pool; target 1.15 (the cluster's start-up counts).
- ``ensemble_overhead``: the ensemble in one process against the bare local fits it makes
  (the same starts through ``least_squares`` one after another): the ratio minus 1 is
  curate's own cost per start (the sampler, bookkeeping, clustering); target 1.05.
- ``ensemble_memory``: the peak memory traced while an ensemble of 10 N starts runs against one
  of N starts, on a cheap analytic model so 10 N fits are quick; target 1.1. An ensemble keeps
  every start's objective and optimum (p + 2 numbers each) and the kept fits' members, so the
  peak grows with the starts; it is bounded by that, not constant.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import tracemalloc
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bench.timing import median_time  # noqa: E402
from curate import fit as fitting  # noqa: E402
from curate.fit import ensemble as ensembles  # noqa: E402
from curate.fit.engine import least_squares  # noqa: E402


def ode_problem(n_datasets: int = 8) -> fitting.FitProblem:
    from bench.__main__ import sensitivity_problem

    points, spec = sensitivity_problem(n_datasets)
    model = fitting.PythonFunction.from_reference(f"{HERE / 'ode_model.py'}:predict")
    return fitting.FitProblem(points, model, spec)


def case_workers(starts: int) -> dict[str, Any]:
    problem = ode_problem()
    options = fitting.FitOptions(starts=starts, seed=0)
    serial_s, serial = median_time(lambda: ensembles.ensemble(problem, options, workers=1), 1)
    pooled_s, pooled = median_time(lambda: ensembles.ensemble(problem, options, workers=2), 1)
    same = bool(np.allclose(np.sort(serial.objectives), np.sort(pooled.objectives), rtol=1e-8))
    return {"ratio": pooled_s / serial_s, "target": round(1 / 1.8, 3), "ours_s": pooled_s,
            "baseline_s": serial_s, "n": starts, "executor": pooled.executor,
            "same_objectives": same}  # fmt: skip


def case_dask(starts: int) -> dict[str, Any]:
    problem = ode_problem()
    options = fitting.FitOptions(starts=starts, seed=0)
    pooled_s, _ = median_time(lambda: ensembles.ensemble(problem, options, workers=2), 1)
    dask_s, spread = median_time(lambda: ensembles.ensemble(problem, options, dask="local"), 1)
    return {"ratio": dask_s / pooled_s, "target": 1.15, "ours_s": dask_s, "baseline_s": pooled_s,
            "n": starts, "executor": spread.executor}  # fmt: skip


def case_overhead(starts: int) -> dict[str, Any]:
    problem = ode_problem()
    options = fitting.FitOptions(starts=starts, seed=0)
    candidates, _ = ensembles._candidates(problem, options)

    def bare() -> None:
        for x0 in candidates:
            with contextlib.suppress(ArithmeticError):
                least_squares(problem, x0, options)

    bare_s, _ = median_time(bare, 1)
    ours_s, _ = median_time(lambda: ensembles.ensemble(problem, options, workers=1), 1)
    return {"ratio": ours_s / bare_s, "target": 1.05, "ours_s": ours_s, "baseline_s": bare_s,
            "n": starts}  # fmt: skip


def saturating(params: dict[str, float], points: pd.DataFrame) -> np.ndarray:
    t = points["time"].to_numpy()
    return params["top"] * (1.0 - np.exp(-t / params["tau"]))


def cheap_problem() -> fitting.FitProblem:
    rng = np.random.default_rng(0)
    t = np.linspace(0, 100, 50)
    points = pd.DataFrame({"time": t, "value": 20 * (1 - np.exp(-t / 15)) + rng.normal(0, 0.3, 50),
                           "weight": np.full(50, 1 / 0.3**2)})  # fmt: skip
    spec = fitting.spec_from_dict({"parameters": {
        "top": {"start": 5.0, "lower": 0.1, "upper": 1000.0, "log": True},
        "tau": {"start": 1.0, "lower": 0.1, "upper": 1000.0, "log": True}}})  # fmt: skip
    return fitting.FitProblem(points, saturating, spec)


def _peak(starts: int) -> tuple[int, float]:
    import time

    problem = cheap_problem()
    tracemalloc.start()
    started = time.perf_counter()
    ensembles.ensemble(problem, fitting.FitOptions(starts=starts, seed=0))
    seconds = time.perf_counter() - started
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak, seconds


def case_memory(starts: int) -> dict[str, Any]:
    small, small_s = _peak(starts)
    large, large_s = _peak(10 * starts)
    return {"ratio": large / small, "target": 1.1, "ours_s": large_s, "baseline_s": small_s,
            "n": starts, "peak_bytes": [small, large]}  # fmt: skip


def run(quick: bool) -> dict[str, Any]:
    """Give the ensemble cases' results."""
    results = {
        "ensemble_2_workers": case_workers(60 if quick else 1000),
        "ensemble_dask": case_dask(60 if quick else 1000),
        "ensemble_overhead": case_overhead(20 if quick else 200),
        "ensemble_memory": case_memory(100 if quick else 1000),
    }
    return results


def main() -> None:
    parser = argparse.ArgumentParser(prog="python -m bench.ensembles", description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="60 starts instead of 1,000")
    results = run(parser.parse_args().quick)
    for case, row in results.items():
        met = "yes" if row["ratio"] <= row["target"] else "NO"
        print(f"{case:<22}{row['n']:>8}{row['ours_s']:>10.3f}{row['baseline_s']:>10.3f}"
              f"{row['ratio']:>9.3f}{row['target']:>8}  {met}")  # fmt: skip
    print(json.dumps(results, indent=1))


if __name__ == "__main__":
    main()
