"""Which data identify which parameter: profile likelihoods repeated without each group.

For every group (a dataset, a lab, a condition value) the model is refitted without it,
warm-started at the full fit, and every profiled parameter is profiled again. A parameter whose
interval was closed on both sides with all the data and opens without the group is one that
group identifies; a ratio of interval widths (without / with) says how much it narrows the
interval. The result is a group x parameter matrix and plain-words conclusions, in the manner of
the leave-one-group-out flags (WIDENING_FLAG is a rule of thumb, common practice with no
single source).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from curate.errors import InputError
from curate.fit.engine import FitOptions, FitResult, fit
from curate.fit.problem import FitProblem
from curate.fit.profile import VERDICTS, ProfileResult, profile
from curate.fit.spec import ParameterSpec

__all__ = ["WIDENING_FLAG", "GroupProfiles", "ProfilesByGroup", "profiles_by_group"]

WIDENING_FLAG = 2.0  # an interval at least twice as wide without a group is worth a sentence


@dataclass
class GroupProfiles:
    """The profiles without one group, beside the full ones."""

    group: str
    n_points: int
    parameters: dict[str, dict[str, Any]]  # NAME -> verdict, lower, upper, widening
    error: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Give the group's row of the matrix as plain data."""
        return {"group": self.group, "n_points": self.n_points, "parameters": self.parameters,
                "error": self.error}  # fmt: skip


@dataclass
class ProfilesByGroup:
    """The group x parameter matrix of identifiability, with its conclusions."""

    by: str
    full: ProfileResult
    groups: list[GroupProfiles]
    conclusions: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"by", "full": {...profile}, "groups": [...], "conclusions": [...]}``."""
        return {"by": self.by, "full": self.full.to_dict()["parameters"],
                "groups": [g.to_dict() for g in self.groups], "conclusions": self.conclusions}  # fmt: skip


def _width(lower: float | None, upper: float | None) -> float:
    if lower is None or upper is None:
        return math.inf
    return upper - lower


def _warm_spec(spec: ParameterSpec, values: dict[str, float]) -> ParameterSpec:
    """Give the spec with each free parameter starting at its full-fit value (within bounds)."""
    parameters = []
    for p in spec.parameters:
        value = values.get(p.name)
        if p.fixed or value is None or not math.isfinite(value):
            parameters.append(p)
            continue
        start = min(max(value, p.lower), p.upper)
        if p.log and start <= 0:
            start = p.start
        parameters.append(dataclasses.replace(p, start=start))
    return dataclasses.replace(spec, parameters=tuple(parameters))


def profiles_by_group(
    problem: FitProblem,
    best: FitResult,
    labels: np.ndarray,
    *,
    by: str,
    names: Sequence[str] | None = None,
    level: float = 0.95,
    options: FitOptions | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> ProfilesByGroup:
    """Give every parameter's profile with all data and without each group in turn."""
    options = options or FitOptions()
    full = profile(problem, best, names, level=level, options=options)
    groups = [str(g) for g in dict.fromkeys(labels.astype(str).tolist())]
    if len(groups) < 2:
        raise InputError(f"--by {by}: one group only ({groups[0] if groups else 'none'}); "
                         "nothing to leave out")  # fmt: skip
    warm = _warm_spec(problem.spec, best.values())
    rows: list[GroupProfiles] = []
    conclusions: list[str] = []
    for done, group in enumerate(groups):
        if progress is not None:
            progress(done, len(groups))
        keep = labels.astype(str) != group
        kept = problem.points.loc[keep].reset_index(drop=True)
        row = GroupProfiles(group=group, n_points=int((~keep).sum()), parameters={})
        try:
            sub = FitProblem(kept, problem.backend, warm)
            refit = fit(sub, FitOptions(tolerance=options.tolerance))
            without = profile(sub, refit, list(full.parameters), level=level, options=options)
        except InputError as err:
            row.error = str(err).splitlines()[0]
            rows.append(row)
            continue
        for name, with_all in full.parameters.items():
            found = without.parameters[name]
            before = _width(with_all.lower, with_all.upper)
            after = _width(found.lower, found.upper)
            widening = after / before if math.isfinite(before) and before > 0 else None
            row.parameters[name] = {
                "verdict": found.verdict, "lower": found.lower, "upper": found.upper,
                "widening": None if widening is None or not math.isfinite(widening) else widening,
                "opens": math.isfinite(before) and not math.isfinite(after),
            }  # fmt: skip
            if with_all.verdict == VERDICTS[0] and found.verdict != VERDICTS[0]:
                conclusions.append(
                    f"without {by} {group}, {name} is no longer identifiable ({found.verdict})"
                )
            elif with_all.verdict != VERDICTS[0] and found.verdict == VERDICTS[0]:
                conclusions.append(f"without {by} {group}, {name} becomes identifiable")
            elif widening is not None and math.isfinite(widening) and widening >= WIDENING_FLAG:
                conclusions.append(
                    f"without {by} {group}, the interval of {name} widens x{widening:.1f}"
                )
        rows.append(row)
    if progress is not None:
        progress(len(groups), len(groups))
    return ProfilesByGroup(by=by, full=full, groups=rows, conclusions=conclusions)
