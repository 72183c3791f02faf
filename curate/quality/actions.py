"""Noise, trust and consistency for datasets in a catalog: the actions over the pure modules.

Reads versions from a :class:`~curate.ledger.Ledger`, calls :mod:`curate.quality.noise`,
:mod:`curate.quality.grading` and :mod:`curate.quality.consistency`, and writes what a person
decided (a grade, an accepted estimate) as new versions, and what the tool only suggests as
events.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from curate.errors import InputError, NotFoundError
from curate.ledger import Ledger
from curate.quality import consistency, grading, noise
from curate.quality.measured import measured_sd, reported_sd
from curate.records import (
    DatasetVersion,
    NoiseEstimate,
    TrustAssessment,
    UncertaintyScale,
)

__all__ = [
    "ConsistencyGroup",
    "ConsistencyReport",
    "LabDispersion",
    "Suggestion",
    "accept_suggestion",
    "check_consistency",
    "estimate_noise",
    "grade_from_checklist",
    "set_grade",
]

# Grade suggestions from a dataset's Birge ratio against the others (common practice, no single
# source): p < 0.01 with R > 1.5 costs one grade, p < 0.001 with R > 2 costs two.
_SUGGEST_ONE = (0.01, 1.5)
_SUGGEST_TWO = (0.001, 2.0)
# a lab whose datasets scatter more than this about the consensus does not fit an A or B
_LAB_OVERDISPERSED = 2.0
_LAB_UNDERGRADED = 1.2


def estimate_noise(
    catalog: Ledger, dataset_ids: list[str], *, method: str = "auto"
) -> list[tuple[DatasetVersion, noise.NoiseResult]]:
    """Estimate and store the noise of each dataset (new versions, one transaction for all).

    Every estimate is made before anything is written: one failure changes nothing.
    """
    planned: list[tuple[str, NoiseEstimate, noise.NoiseResult]] = []
    now = dt.datetime.now(dt.UTC)
    for dataset_id in dataset_ids:
        version = catalog.show(dataset_id)
        arrays = catalog.arrays(dataset_id)
        result = noise.choose_and_estimate(
            arrays.time,
            arrays.value,
            method=method,
            replicate=arrays.replicate,
            reported_sd=reported_sd(version, arrays),
            origin=f"dataset {dataset_id}",
        )
        scale = (
            version.record.uncertainty.scale
            if (result.method == "reported" and version.record.uncertainty)
            else UncertaintyScale.LINEAR
        )
        estimate = NoiseEstimate(
            sd=result.sd,
            method=result.method,
            dof=result.dof,
            scale=scale,
            parameters=result.parameters,
            warnings=result.warnings,
            made_at=now,
            made_by=catalog.actor,
        )
        planned.append((dataset_id, estimate, result))
    written = []
    with catalog.transaction():
        for dataset_id, estimate, result in planned:
            version = catalog.new_version(
                dataset_id,
                kind="noise",
                reason=f"noise estimated by {estimate.method}",
                update={"noise": estimate},
            )
            written.append((version, result))
    return written


def set_grade(
    catalog: Ledger, dataset_id: str, grade: str, *, reason: str, source: str = "person"
) -> DatasetVersion:
    """Record a trust grade with its reason as a new version."""
    grade = grading.check_grade(grade, origin=f"dataset {dataset_id}")
    if not reason or not reason.strip():
        raise InputError(f"dataset {dataset_id}: a grade needs its reason (--reason)")
    trust = TrustAssessment(
        grade=grade,
        rationale=reason.strip(),
        assigned_by=catalog.actor,
        assigned_at=dt.datetime.now(dt.UTC),
    )
    return catalog.new_version(
        dataset_id,
        kind="grade",
        reason=reason.strip(),
        update={"trust": trust},
        payload={"source": source},
    )


def grade_from_checklist(
    catalog: Ledger,
    dataset_id: str,
    *,
    answers: dict[str, bool | None] | None = None,
    answers_file: str | Path | None = None,
    checklist_file: str | Path | None = None,
    accept: bool = False,
) -> tuple[grading.GradeSuggestion, DatasetVersion | None]:
    """Turn checklist answers into a suggested grade; record the answers; grade on ``accept``."""
    catalog.show(dataset_id)
    checklist = grading.load_checklist(checklist_file)
    notes: dict[str, str] = {}
    if answers_file is not None:
        answers, notes = grading.load_answers(answers_file, checklist)
    if answers is None:
        raise InputError(f"dataset {dataset_id}: no checklist answers given (--checklist FILE)")
    for key in answers:
        if checklist.question(key) is None:
            raise InputError(
                f"dataset {dataset_id}: '{key}' is not a question of {checklist.origin}"
            )
    suggestion = grading.suggest_from_answers(checklist, answers)
    payload = {
        "checklist": checklist.origin,
        "checklist_sha256": checklist.sha256,
        "answers": suggestion.answers,
        "notes": notes,
        "suggested": suggestion.grade,
        "reasons": list(suggestion.reasons),
    }
    with catalog.transaction():
        catalog.record_event("checklist", payload, dataset_id=dataset_id)
        graded = None
        if accept:
            graded = set_grade(
                catalog,
                dataset_id,
                suggestion.grade,
                reason=f"checklist: {suggestion.rationale()}",
                source="checklist",
            )
    return suggestion, graded


@dataclass(frozen=True)
class Suggestion:
    """A grade the data suggest for a dataset; a person accepts or ignores it."""

    dataset_id: str
    current: str | None
    suggested: str
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """Give the suggestion as plain data."""
        return {
            "id": self.dataset_id,
            "current": self.current,
            "suggested": self.suggested,
            "reason": self.reason,
        }


@dataclass(frozen=True)
class LabDispersion:
    """How far one lab's datasets scatter about the consensus, against the grades it got."""

    lab: str
    chi2: float
    dof: int
    birge_ratio: float
    grades: tuple[str, ...]
    flag: str

    def to_dict(self) -> dict[str, Any]:
        """Give the row as plain data."""
        return {
            "lab": self.lab,
            "chi2": self.chi2,
            "dof": self.dof,
            "birge_ratio": self.birge_ratio,
            "grades": list(self.grades),
            "flag": self.flag,
        }


@dataclass(frozen=True)
class ConsistencyGroup:
    """Datasets of one observable under matching conditions, and how they agree."""

    observable: str
    conditions: dict[str, Any]
    datasets: tuple[consistency.ConsensusResult, ...]
    summary: consistency.SummaryConsistency | None
    lab_summary: consistency.SummaryConsistency | None

    def to_dict(self) -> dict[str, Any]:
        """Give the group as plain data."""
        return {
            "observable": self.observable,
            "conditions": self.conditions,
            "datasets": [d.to_dict() for d in self.datasets],
            "summary": self.summary.to_dict() if self.summary else None,
            "labs": self.lab_summary.to_dict() if self.lab_summary else None,
        }


@dataclass
class ConsistencyReport:
    """Every group's checks, per-lab dispersion, and the grade suggestions recorded."""

    groups: list[ConsistencyGroup] = field(default_factory=list)
    labs: list[LabDispersion] = field(default_factory=list)
    suggestions: list[Suggestion] = field(default_factory=list)
    single: list[str] = field(default_factory=list)  # datasets with nothing to compare to
    tolerance: float = 0.01
    alpha: float = 0.05

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {
            "tolerance": self.tolerance,
            "alpha": self.alpha,
            "groups": [g.to_dict() for g in self.groups],
            "labs": [lab.to_dict() for lab in self.labs],
            "suggestions": [s.to_dict() for s in self.suggestions],
            "unmatched": self.single,
        }


def _series(catalog: Ledger, version: DatasetVersion) -> consistency.Series:
    arrays = catalog.arrays(version.id, version.version)
    return consistency.Series(
        id=version.id,
        lab=version.record.source.lab,
        time=arrays.time,
        value=arrays.value,
        sd=measured_sd(version, arrays),
        relative=version.record.observable.relative,
    )


def check_consistency(
    catalog: Ledger,
    *,
    observable: str | None = None,
    tolerance: float = 0.01,
    at: float | None = None,
    alpha: float = 0.05,
    record: bool = True,
) -> ConsistencyReport:
    """Compare every dataset with the others of its observable and conditions; suggest grades.

    Excluded (X) and retired datasets take no part. Suggestions are recorded as events when
    ``record``; no grade changes without a person.
    """
    if not 0 < alpha < 1:
        raise InputError(f"--level {alpha}: expected a significance level between 0 and 1")
    versions = [v for v in catalog.list(observable=observable) if v.grade != "X"]
    if observable is not None and not versions:
        raise NotFoundError(f"no current dataset of observable '{observable}' to compare")
    by_id = {v.id: v for v in versions}
    items = [
        (v.id, v.record.observable.id, {k: c.value for k, c in v.record.conditions.items()})
        for v in versions
    ]
    report = ConsistencyReport(tolerance=tolerance, alpha=alpha)
    lab_chi2: dict[str, list[float]] = {}
    for members in consistency.match_groups(items, tolerance=tolerance):
        if len(members) < 2:
            report.single.extend(members)
            continue
        series = [_series(catalog, by_id[m]) for m in members]
        results = consistency.against_consensus(series, alpha=alpha)
        summary = lab_summary = None
        try:
            values = consistency.summary_values(series, at=at)
            summary = consistency.summary_consistency(
                [v[0] for v in values], [v[2] for v in values], [v[3] for v in values], alpha=alpha
            )
            per_lab: dict[str, list[tuple[float, float]]] = {}
            for _, lab, value, sd in values:
                per_lab.setdefault(lab, []).append((value, sd))
            if len(per_lab) >= 2:
                labs, means, sds = [], [], []
                for lab, entries in per_lab.items():
                    w = np.array([1 / s**2 for _, s in entries])
                    labs.append(lab)
                    means.append(float(np.sum(w * np.array([v for v, _ in entries])) / w.sum()))
                    sds.append(float(1 / np.sqrt(w.sum())))
                lab_summary = consistency.summary_consistency(labs, means, sds, alpha=alpha)
        except InputError:
            pass  # no shared time range for summaries: the pointwise checks still stand
        first = by_id[members[0]]
        report.groups.append(
            ConsistencyGroup(
                observable=first.record.observable.id,
                conditions={k: c.model_dump() for k, c in first.record.conditions.items()},
                datasets=tuple(results),
                summary=summary,
                lab_summary=lab_summary,
            )
        )
        for result in results:
            if result.chi2 is None or not result.dof:
                continue
            lab_chi2.setdefault(result.lab, [0.0, 0.0])
            lab_chi2[result.lab][0] += result.chi2
            lab_chi2[result.lab][1] += result.dof
            current = by_id[result.id].grade
            suggested = None
            assert result.p_value is not None and result.birge_ratio is not None
            if result.p_value < _SUGGEST_TWO[0] and result.birge_ratio > _SUGGEST_TWO[1]:
                suggested = grading.lower_grade(current, 2)
            elif result.p_value < _SUGGEST_ONE[0] and result.birge_ratio > _SUGGEST_ONE[1]:
                suggested = grading.lower_grade(current, 1)
            if suggested is not None and suggested != current:
                report.suggestions.append(
                    Suggestion(
                        result.id,
                        current,
                        suggested,
                        f"disagrees with the other {first.record.observable.id} datasets under its conditions: "
                        f"Birge ratio {result.birge_ratio:.2f}, p = {result.p_value:.2g} on {result.dof} dof",
                    )
                )
    grades_by_lab: dict[str, list[str]] = {}
    for v in versions:
        grades_by_lab.setdefault(v.record.source.lab, []).append(v.grade or "-")
    for lab, (chi2, dof) in sorted(lab_chi2.items()):
        ratio = float(np.sqrt(chi2 / dof))
        grades = tuple(sorted(set(grades_by_lab.get(lab, []))))
        flag = ""
        if ratio > _LAB_OVERDISPERSED and any(g in ("A", "B") for g in grades):
            flag = f"graded {'/'.join(g for g in grades if g in ('A', 'B'))} but scatters {ratio:.1f}x its stated uncertainty"
        elif ratio <= _LAB_UNDERGRADED and grades and all(g in ("C", "D") for g in grades):
            flag = "its data agree with the others better than its grades suggest"
        report.labs.append(LabDispersion(lab, chi2, int(dof), ratio, grades, flag))
    if record and report.suggestions:
        with catalog.transaction():
            for suggestion in report.suggestions:
                catalog.record_event(
                    "grade_suggestion", suggestion.to_dict(), dataset_id=suggestion.dataset_id
                )
    return report


def accept_suggestion(catalog: Ledger, dataset_id: str) -> DatasetVersion:
    """Record the newest grade suggestion for a dataset as its grade (a person's decision)."""
    event = catalog.latest_event(dataset_id, "grade_suggestion")
    if event is None:
        raise InputError(
            f"dataset {dataset_id}: no grade suggestion to accept; run `curate consistency` first"
        )
    payload = event["payload"]
    return set_grade(
        catalog,
        dataset_id,
        str(payload["suggested"]),
        reason=f"accepted suggestion (event {event['seq']}): {payload['reason']}",
        source="suggestion",
    )
