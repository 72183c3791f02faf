"""Which data decide between the families of good fits: the ensemble repeated without each group.

With all the data an ensemble finds families of fits within the likelihood-ratio threshold of
the best (kept) and families beyond it (rejected). Without a group (a dataset, a lab, a
condition value) the ensemble is run again, warm-started from the full run: from every family's
best fit and from up to MAX_WARM kept fits spread over the kept families. Each refitted optimum
is assigned to the nearest full family whose median point lies within the clustering cut (in
the optimiser's coordinates), else it is new. A family fits without the group when one of its
refits lies within the threshold of the best refit without the group.

- a kept family that no longer fits without group g rests on g (g is what makes it as good as
  the best);
- a rejected family that fits without g is ruled out by g; when g is the only such group, "only
  g rules out family f" — the sentence the leave-one-group-out table of one optimum cannot say.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from curate.errors import InputError
from curate.fit.engine import FitOptions
from curate.fit.ensemble import EnsembleResult, families, refine
from curate.fit.problem import FitProblem

__all__ = [
    "MAX_WARM",
    "FamiliesByGroup",
    "GroupFamilies",
    "Refitted",
    "assign",
    "families_by_group",
    "refit_without",
    "warm_starts",
]

MAX_WARM = 40  # kept fits refitted without each group (spread over the kept families)


def warm_starts(full: EnsembleResult) -> tuple[list[np.ndarray], list[int]]:
    """Give the starts of a leave-one-group-out ensemble and the family each came from: every
    family's best fit, then kept fits spread evenly over the kept ones (at most MAX_WARM)."""
    starts = [c.best for c in full.families]
    origins = [c.id for c in full.families]
    kept = full.kept_theta
    family_of = {start: c.id for c in full.clusters for start in c.members}
    if len(kept):
        spread = np.unique(np.linspace(0, len(kept) - 1, min(MAX_WARM, len(kept))).astype(int))
        for k in spread:
            starts.append(np.asarray(kept[k], dtype=float))
            origins.append(family_of[int(full.kept_starts[k])])
    return starts, origins


def assign(theta: np.ndarray, full: EnsembleResult, start_family: int | None = None) -> int | None:
    """Give the id of the full family ``theta`` lies in: the family its refit started from while
    it stays within the clustering cut of that family's median point (so two neighbouring
    families do not trade refits), else the nearest family within the cut; None if none is
    (a family not seen with all the data)."""
    best: tuple[float, int] | None = None
    for family in full.families:
        distance = float(np.linalg.norm(theta - family.centre))
        if distance > full.cut:
            continue
        if family.id == start_family:
            return family.id
        if best is None or distance < best[0]:
            best = (distance, family.id)
    return None if best is None else best[1]


@dataclass
class Refitted:
    """The ensemble without one group: every refit, the best, and which family each joined."""

    problem: FitProblem
    objectives: np.ndarray  # nan where the refit failed
    thetas: list[np.ndarray | None]
    joined: list[int | None]  # the full family each refit lies in (None: none of them)
    best: float
    errors: list[str]
    origins: list[int] = field(default_factory=list)  # the full family each refit started from

    def kept(self, threshold: float) -> list[int]:
        """Give the refits within ``threshold`` of the best."""
        return [k for k, v in enumerate(self.objectives) if math.isfinite(v)
                and v - self.best <= threshold]  # fmt: skip


def refit_without(problem: FitProblem, keep: np.ndarray, full: EnsembleResult,
                  options: FitOptions, workers: int = 1) -> Refitted:  # fmt: skip
    """Give the warm-started ensemble of the problem on the rows ``keep``."""
    points = problem.points.loc[keep].reset_index(drop=True)
    sub = FitProblem(points, problem.backend, problem.spec)
    if len(sub.y) <= len(sub.free):
        raise InputError(f"{len(sub.y)} points left cannot determine {len(sub.free)} parameters")
    starts, origins = warm_starts(full)
    outcomes, _ = refine(sub, starts, dataclasses.replace(options, starts=len(starts)), workers)
    outcomes.sort(key=lambda o: o[0])
    objectives = np.array([math.nan if o[1] is None else o[1] for o in outcomes])
    thetas = [o[2] for o in outcomes]
    errors = [o[3] for o in outcomes if o[3]]
    if not np.isfinite(objectives).any():
        raise InputError("no refit finished: " + "; ".join(errors[:2]))
    joined = [None if t is None else assign(t, full, origins[k]) for k, t in enumerate(thetas)]
    return Refitted(sub, objectives, thetas, joined, float(np.nanmin(objectives)), errors,
                    origins)  # fmt: skip


@dataclass
class GroupFamilies:
    """One group's row of the group x family table."""

    group: str
    n_points: int
    best_objective: float | None
    best_family: int | None
    families: dict[str, dict[str, Any]]  # family id -> fits, delta, objective
    new: list[dict[str, Any]] = field(default_factory=list)  # families found only without it
    error: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Give the row as plain data."""
        return dataclasses.asdict(self)


@dataclass
class FamiliesByGroup:
    """The group x family table with its plain-words conclusions."""

    by: str
    full: EnsembleResult
    groups: list[GroupFamilies]
    conclusions: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"by", "threshold", "families": [...], "groups": [...], "conclusions"}``."""
        return {
            "by": self.by,
            "threshold": self.full.threshold,
            "families": [
                {
                    "id": c.id,
                    "kept": c in self.full.clusters,
                    "size": c.size,
                    "objective": c.objective,
                    "parameters": c.parameters,
                }
                for c in self.full.families
            ],
            "groups": [g.to_dict() for g in self.groups],
            "conclusions": self.conclusions,
        }


def _row(group: str, n_points: int, refitted: Refitted, full: EnsembleResult,
         threshold: float) -> GroupFamilies:  # fmt: skip
    cells: dict[str, dict[str, Any]] = {}
    for family in full.families:
        values = [v for v, j in zip(refitted.objectives, refitted.joined, strict=True)
                  if j == family.id and math.isfinite(v)]  # fmt: skip
        objective = min(values) if values else None
        delta = None if objective is None else objective - refitted.best
        cells[str(family.id)] = {"fits": bool(delta is not None and delta <= threshold),
                                 "delta": delta, "objective": objective}  # fmt: skip
    best_k = int(np.nanargmin(refitted.objectives))
    found = [(k, float(v), t) for k, (v, t, j) in
             enumerate(zip(refitted.objectives, refitted.thetas, refitted.joined, strict=True))
             if j is None and t is not None and math.isfinite(v) and v - refitted.best <= threshold]  # fmt: skip
    new = [{"size": c.size, "objective": c.objective, "parameters": c.parameters,
            "from": sorted({refitted.origins[k] for k in c.members} if refitted.origins else [])}
           for c in families(refitted.problem, found, full.cut)]  # fmt: skip
    return GroupFamilies(group, n_points, refitted.best, refitted.joined[best_k], cells, new)


def _values(found: dict[str, Any]) -> str:
    shown = list(found["parameters"].items())
    text = ", ".join(f"{name} {p['median']:.4g}" for name, p in shown[:8])
    return text + (f" and {len(shown) - 8} more" if len(shown) > 8 else "")


def _above(delta: float) -> str:
    return "as good as the best" if abs(delta) < 0.005 else f"{delta:.2f} above the best"


def _ids(ids: list[int]) -> str:
    return f"family {ids[0]}" if len(ids) == 1 else "families " + ", ".join(map(str, ids))


def _conclusions(by: str, rows: list[GroupFamilies], full: EnsembleResult) -> list[str]:
    """Say, per group, which kept families rest on it and which rejected ones it alone rules out
    (several families in one sentence, so a group that changes everything reads as one line)."""
    said: list[str] = []
    kept_ids = {c.id for c in full.clusters}
    threshold = full.threshold
    usable = [r for r in rows if r.error is None]
    only: dict[str, list[int]] = {}
    also: dict[str, list[int]] = {}
    for family in full.families:
        if family.id in kept_ids:
            continue
        openers = [r for r in usable if r.families[str(family.id)]["fits"]]
        target = only if len(openers) == 1 else also
        for row in openers:
            target.setdefault(row.group, []).append(family.id)
    for row in usable:
        lost = [c.id for c in full.clusters if not row.families[str(c.id)]["fits"]]
        risen = [f for f in lost if row.families[str(f)]["delta"] is not None]
        moved = [f for f in lost if row.families[str(f)]["delta"] is None]
        if len(risen) == 1:
            delta = row.families[str(risen[0])]["delta"]
            said.append(f"without {by} {row.group}, family {risen[0]} no longer fits (it rises "
                        f"{delta:.2f} above the best, beyond {threshold:.2f}): it rests on {by} "
                        f"{row.group}")  # fmt: skip
        elif risen:
            said.append(f"without {by} {row.group}, {_ids(risen)} no longer fit (they rise beyond "
                        f"{threshold:.2f} above the best): they rest on {by} {row.group}")  # fmt: skip
        explained: set[int] = set()
        for family_id in moved:
            landed = [k for k, n in enumerate(row.new) if family_id in n["from"]]
            if landed:
                explained.update(landed)
                where = min((row.new[k] for k in landed), key=lambda n: n["objective"])
                said.append(f"without {by} {row.group}, the refits from family {family_id} move to "
                            f"{_values(where)} ({_above(where['objective'] - (row.best_objective or 0.0))}"
                            f"): where family {family_id} lies rests on {by} "
                            f"{row.group}")  # fmt: skip
            else:
                said.append(f"without {by} {row.group}, the refits from family {family_id} move "
                            f"out of it (beyond the cut {full.cut:g}) into other families: where "
                            f"it lies rests on {by} {row.group}")  # fmt: skip
        ruled = only.get(row.group, [])
        if len(ruled) == 1:
            cell = row.families[str(ruled[0])]
            said.append(f"only {by} {row.group} rules out family {ruled[0]}: without it the "
                        f"family fits ({_above(cell['delta'])}, within {threshold:.2f})")  # fmt: skip
        elif ruled:
            said.append(f"only {by} {row.group} rules out {_ids(ruled)}: without it they fit "
                        f"within {threshold:.2f} of the best")  # fmt: skip
        if also.get(row.group):
            said.append(f"without {by} {row.group}, {_ids(also[row.group])} (ruled out by "
                        f"more than one {by}) fit too")  # fmt: skip
        if row.best_family not in (None, 1) and full.clusters:
            said.append(f"without {by} {row.group}, family {row.best_family} fits best "
                        f"(family 1 with all the data)")  # fmt: skip
        unexplained = [n for k, n in enumerate(row.new) if k not in explained]
        if unexplained:
            best = min(unexplained, key=lambda n: n["objective"])
            above = best["objective"] - (row.best_objective or 0.0)
            what = ("a family not seen with all the data fits" if len(unexplained) == 1 else
                    f"{len(unexplained)} families not seen with all the data fit; the best")  # fmt: skip
            said.append(f"without {by} {row.group}, {what} ({_values(best)}; {_above(above)})")
    kept = [c.id for c in full.clusters]
    if (
        len(kept) > 1
        and usable
        and all(row.families[str(f)]["fits"] for row in usable for f in kept)
    ):
        said.append(f"no single {by} decides between {_ids(kept)}: every one fits without any "
                    f"one {by}; the choice rests on the model and on which data you trust")  # fmt: skip
    return said


def families_by_group(
    problem: FitProblem,
    full: EnsembleResult,
    labels: np.ndarray,
    *,
    by: str,
    options: FitOptions | None = None,
    workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
) -> FamiliesByGroup:
    """Give the group x family table: which families fit without each group."""
    options = options or FitOptions()
    text = labels.astype(str)
    groups = [str(g) for g in dict.fromkeys(text.tolist())]
    if len(groups) < 2:
        raise InputError(f"--by {by}: one group only ({groups[0] if groups else 'none'}); "
                         "nothing to leave out")  # fmt: skip
    rows: list[GroupFamilies] = []
    for done, group in enumerate(groups):
        if progress is not None:
            progress(done, len(groups))
        keep = text != group
        try:
            refitted = refit_without(problem, keep, full, options, workers)
        except InputError as err:
            rows.append(GroupFamilies(group, int((~keep).sum()), None, None, {},
                                      error=str(err).splitlines()[0]))  # fmt: skip
            continue
        rows.append(_row(group, int((~keep).sum()), refitted, full, full.threshold))
    if progress is not None:
        progress(len(groups), len(groups))
    return FamiliesByGroup(by, full, rows, _conclusions(by, rows, full))
