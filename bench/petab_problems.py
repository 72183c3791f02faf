"""Benchmark cases on the stored PEtab problems of tests/data/petab (Boehm 2014, Fujita 2010).

- ``objective``: one full evaluation of curate's objective (every condition simulated, the
  observable and noise formulas, the likelihood's residuals) against the time spent inside the
  libroadrunner calls it makes (setting each condition's values, integrating): the overhead of
  everything curate adds. ``over_integration_alone`` compares with ``simulate`` alone.
- ``sensitivity``: Boehm's leave-one-dataset-out on 2 worker processes against the same run
  serial (the workers compile the model once each, which is part of what is timed).
"""

from __future__ import annotations

import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import curate
from bench.timing import median_time
from curate.fit.problem import FitProblem
from curate.fit.problem_runs import problem_fit
from curate.weighting import Selection, resolve_policy

# the libroadrunner calls an evaluation makes: setting a condition's values, integrating
_RUNNER_CALLS = ("resetAll", "reset", "setValue", "getValue", "getRatesOfChange", "simulate")
DATA = Path(__file__).resolve().parent.parent / "tests" / "data" / "petab"
PROBLEMS = {"Boehm_JProteomeRes2014": "boehm_jproteomeres2014_01",
            "Fujita_SciSignal2010": "fujita_scisignal2010_01"}  # fmt: skip
# inflation 1 for every grade, no floors, no balancing: the problem's own objective
NEUTRAL = """name = "neutral"
ungraded = "A"
[inflation]
A = 1.0
B = 1.0
C = 1.0
D = 1.0
[floors]
absolute = 0.0
relative = 0.0
[balance]
mode = "none"
"""


def _neutral(folder: Path) -> Path:
    path = folder / "neutral.toml"
    path.write_text(NEUTRAL)
    return path


def _catalog(folder: Path, name: str) -> Path:
    path = folder / f"{name}.db"
    if not path.exists():
        with curate.open_catalog(path, actor="bench") as catalog:
            catalog.import_petab(DATA / name / f"{name}.yaml")
    return path


def case_objective(folder: Path, name: str, repeats: int) -> dict[str, Any]:
    """Give the ratio of one objective evaluation to the libroadrunner simulations inside it."""
    with curate.open_catalog(_catalog(folder, name)) as catalog:
        fitted = problem_fit(catalog, PROBLEMS[name], policy=resolve_policy(_neutral(folder)),
                             selection=Selection())  # fmt: skip
    problem = FitProblem(fitted.points, fitted.backend, fitted.spec)
    theta = problem.to_internal({p.name: p.start for p in problem.free})
    runner = fitted.backend.model.runner
    inside = {"simulate": 0.0, "all": 0.0}
    originals = {name: getattr(runner, name) for name in _RUNNER_CALLS}

    def timed(name: str) -> Any:
        bare = originals[name]

        def call(*args: Any, **kwargs: Any) -> Any:
            started = time.perf_counter()
            try:
                return bare(*args, **kwargs)
            finally:
                spent = time.perf_counter() - started
                inside["all"] += spent
                if name == "simulate":
                    inside["simulate"] += spent

        return call

    problem.residual(theta)  # warm: first-call costs are not the overhead
    for name in _RUNNER_CALLS:
        setattr(runner, name, timed(name))
    try:
        calls = 20
        totals, simulated, integrated = [], [], []
        for _ in range(repeats):
            inside.update(simulate=0.0, all=0.0)
            started = time.perf_counter()
            for _ in range(calls):
                problem.residual(theta)
            totals.append((time.perf_counter() - started) / calls)
            simulated.append(inside["all"] / calls)
            integrated.append(inside["simulate"] / calls)
    finally:
        for name, bare in originals.items():
            setattr(runner, name, bare)
    ours_s, baseline_s = statistics.median(totals), statistics.median(simulated)
    return {"ratio": ours_s / baseline_s, "target": 1.3, "ours_s": ours_s, "baseline_s": baseline_s,
            "n": len(problem.y), "integration_s": statistics.median(integrated),
            "over_integration_alone": ours_s / statistics.median(integrated)}  # fmt: skip


def case_sensitivity(folder: Path, repeats: int, name: str = "Boehm_JProteomeRes2014",
                     by: str = "dataset") -> dict[str, Any]:  # fmt: skip
    """Give the ratio of a leave-one-group-out run on 2 workers to the same run serial."""
    path = _catalog(folder, name)

    def run(workers: int) -> Any:
        with curate.open_catalog(path) as catalog:
            return catalog.sensitivity(problem=PROBLEMS[name], by=by, policy=_neutral(folder),
                                       workers=workers)  # fmt: skip

    ours_s, pooled = median_time(lambda: run(2), repeats)
    baseline_s, serial = median_time(lambda: run(1), repeats)
    shifts = [abs(a - b) for g, h in zip(pooled.groups, serial.groups, strict=True)
              for a, b in zip(_values(g), _values(h), strict=True)]  # fmt: skip
    return {"ratio": ours_s / baseline_s, "target": 0.6, "ours_s": ours_s, "baseline_s": baseline_s,
            "n": len(pooled.groups), "largest_difference": max(shifts, default=0.0)}  # fmt: skip


def _values(group: Any) -> list[float]:
    return [float(p["value"]) for p in group.parameters.values() if p["value"] is not None]


if __name__ == "__main__":  # python -m bench.petab_problems: these cases alone
    with tempfile.TemporaryDirectory(prefix="curate-bench-") as where:
        for problem in PROBLEMS:
            print(problem, case_objective(Path(where), problem, 3))
        print("sensitivity", case_sensitivity(Path(where), 1))
        print(
            "sensitivity",
            case_sensitivity(Path(where), 1, "Fujita_SciSignal2010", "condition:EGF_0"),
        )
