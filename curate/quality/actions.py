"""Noise, trust and consistency for datasets in a catalog: the actions over the pure modules.

Reads versions from a :class:`~curate.ledger.Ledger`, calls :mod:`curate.quality.noise`,
:mod:`curate.quality.grading` and :mod:`curate.quality.consistency`, and writes what a person
decided (a grade, an accepted estimate) as new versions, and what the tool only suggests as
events.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
from collections.abc import Iterator
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
    canonical_json,
    in_use,
    jsonable,
)

__all__ = [
    "ConsistencyGroup",
    "ConsistencyReport",
    "LabDispersion",
    "NoiseOutcome",
    "Suggestion",
    "accept_suggestion",
    "check_consistency",
    "consistency_inputs",
    "estimate_noise",
    "grade_from_checklist",
    "set_grade",
]

# Grade suggestions from a dataset's Birge ratio against the others (common practice, no single
# source): p < 0.01 with R > 1.5 caps the grade at C, p < 0.001 with R > 2 at D. A cap, not a
# step down: the same evidence asked again suggests nothing new once it has been accepted.
_SUGGEST_ONE = (0.01, 1.5, "C")
_SUGGEST_TWO = (0.001, 2.0, "D")
# a lab whose datasets scatter more than this about the consensus does not fit an A or B
_LAB_OVERDISPERSED = 2.0
_LAB_UNDERGRADED = 1.2


@dataclass(frozen=True)
class NoiseOutcome:
    """One dataset's noise estimate and the version holding it; ``changed`` if newly written.

    Unpacks as ``(version, result)``.
    """

    version: DatasetVersion
    result: noise.NoiseResult
    changed: bool

    def __iter__(self) -> Iterator[Any]:
        yield self.version
        yield self.result


def _same_noise(stored: NoiseEstimate | None, estimate: NoiseEstimate) -> bool:
    """Tell whether a stored estimate says what a new one says (method, sd, dof, parameters,
    scale); when it was made and by whom do not count."""
    if stored is None:
        return False
    fields = ("method", "sd", "dof", "scale", "parameters")
    return all(
        jsonable(getattr(stored, name)) == jsonable(getattr(estimate, name)) for name in fields
    )


def estimate_noise(
    catalog: Ledger, dataset_ids: list[str], *, method: str = "auto"
) -> list[NoiseOutcome]:
    """Estimate and store the noise of each dataset (new versions, one transaction for all).

    Every estimate is made before anything is written: one failure changes nothing. An
    estimate equal to the stored one (method, sd, dof, parameters, scale) writes nothing.
    """
    planned: list[tuple[DatasetVersion, NoiseEstimate, noise.NoiseResult]] = []
    now = dt.datetime.now(dt.UTC)
    for dataset_id in dataset_ids:
        version = catalog.show(dataset_id)
        stored = in_use(version.record, catalog.arrays(dataset_id))
        arrays = stored.observed()  # a censored value is a limit: no noise is read from it
        left_out = len(stored) - len(arrays)
        result = noise.choose_and_estimate(
            arrays.time,
            arrays.value,
            method=method,
            replicate=arrays.replicate,
            reported_sd=reported_sd(version, arrays),
            origin=f"dataset {dataset_id}"
            + (f" ({left_out} censored points left out)" if left_out else ""),
        )
        if left_out:
            result = dataclasses.replace(
                result, warnings=(*result.warnings, _censored_note(left_out, len(stored)))
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
        planned.append((version, estimate, result))
    outcomes = []
    with catalog.transaction():
        for version, estimate, result in planned:
            if _same_noise(version.record.noise, estimate):
                outcomes.append(NoiseOutcome(version, result, changed=False))
                continue
            written = catalog.new_version(
                version.id,
                kind="noise",
                reason=f"noise estimated by {estimate.method}",
                update={"noise": estimate},
            )
            outcomes.append(NoiseOutcome(written, result, changed=True))
    return outcomes


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
    at: float | None = None  # the time (s) of the summary values; None: the late level
    notes: list[str] = field(default_factory=list)  # e.g. censored points left out

    @property
    def summary_of(self) -> str:
        """Give what the per-group summary compares: "late levels" or "levels at 30 min"."""
        return "late levels" if self.at is None else f"levels at {_time_text(self.at)}"

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {
            "tolerance": self.tolerance,
            "alpha": self.alpha,
            "at": self.at,
            "summary_of": self.summary_of,
            "groups": [g.to_dict() for g in self.groups],
            "labs": [lab.to_dict() for lab in self.labs],
            "suggestions": [s.to_dict() for s in self.suggestions],
            "unmatched": self.single,
            "notes": self.notes,
        }


def _time_text(seconds: float) -> str:
    """Give a time in the largest of h, min, s that shows it as a whole number (else in s)."""
    for unit, size in (("h", 3600.0), ("min", 60.0)):
        if seconds and seconds % size == 0:
            return f"{seconds / size:g} {unit}"
    return f"{seconds:g} s"


def _censored_note(left_out: int, total: int) -> str:
    """Say that censored points were left out of a computation on measured numbers."""
    return (
        f"{left_out} of {total} points are censored (a limit, not a measured value) and were "
        "left out"
    )


def _series(catalog: Ledger, version: DatasetVersion) -> consistency.Series:
    stored = in_use(version.record, catalog.arrays(version.id, version.version))
    arrays = stored.observed()  # a censored value is a limit: it takes no part in a comparison
    return consistency.Series(
        id=version.id,
        lab=version.record.source.lab,
        time=arrays.time,
        value=arrays.value,
        sd=measured_sd(version, arrays),
        relative=version.record.observable.relative,
        calibration_group=version.record.protocol.calibration_group or version.id,
    )


def consistency_inputs(version: DatasetVersion) -> str:
    """Give the sha256 of what a consistency check reads from a version.

    Its data (content hash), observable and relative flag, reported uncertainty, noise
    estimate (not when or by whom it was made), conditions, and whether it takes part (retired,
    excluded). A new version that changes none of these (a grade, a label, a reference) leaves
    the check, and the suggestions made from it, as they were.
    """
    record = version.record
    noise_estimate = (
        record.noise.model_dump(mode="json", exclude={"made_at", "made_by", "warnings"})
        if record.noise
        else None
    )
    read = {
        "content_hash": record.content_hash,
        "observable": record.observable.id,
        "relative": record.observable.relative,
        "uncertainty": record.uncertainty.model_dump(mode="json") if record.uncertainty else None,
        "noise": noise_estimate,
        "conditions": {k: c.model_dump(mode="json") for k, c in record.conditions.items()},
        "takes_part": not record.retired and version.grade != "X",
    }
    if record.masks:  # only when there are some: checks made before masks keep their hash
        read["masked"] = sorted([m.time, m.replicate or ""] for m in record.masks)
    return hashlib.sha256(canonical_json(jsonable(read)).encode()).hexdigest()


def _input_entry(version: DatasetVersion) -> dict[str, Any]:
    return {
        "id": version.id,
        "version": version.version,
        "content_hash": version.record.content_hash,
        "record_hash": version.record_hash,
        "inputs_sha256": consistency_inputs(version),
    }


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
    report = ConsistencyReport(tolerance=tolerance, alpha=alpha, at=at)
    lab_chi2: dict[str, list[float]] = {}
    inputs: dict[str, list[dict[str, Any]]] = {}  # dataset id -> its comparison group's versions
    for members in consistency.match_groups(items, tolerance=tolerance):
        if len(members) < 2:
            report.single.extend(members)
            continue
        group_inputs = [_input_entry(by_id[m]) for m in members]
        for m in members:
            inputs[m] = group_inputs
        series = [_series(catalog, by_id[m]) for m in members]
        for m in members:
            total = by_id[m].record.n_points
            left_out = total - len(next(s for s in series if s.id == m).time)
            if left_out:
                report.notes.append(f"dataset {m}: {_censored_note(left_out, total)}")
        results = consistency.against_consensus(series, alpha=alpha)
        summary = lab_summary = None
        try:
            pooled = {r.id for r in results if r.in_consensus}
            values = consistency.summary_values(series, at=at, reference=pooled)
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
            if result.ambiguous:
                pass  # two levels disagree with no majority: no grade follows from it
            elif result.p_value < _SUGGEST_TWO[0] and result.birge_ratio > _SUGGEST_TWO[1]:
                suggested = grading.cap_grade(current, _SUGGEST_TWO[2])
            elif result.p_value < _SUGGEST_ONE[0] and result.birge_ratio > _SUGGEST_ONE[1]:
                suggested = grading.cap_grade(current, _SUGGEST_ONE[2])
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
    if record:
        # each suggestion names the versions it was computed from; the run names every dataset
        # it compared, so that a later run that no longer suggests a grade withdraws the old one
        settings = {"tolerance": tolerance, "alpha": alpha, "at": at}
        with catalog.transaction():
            for suggestion in report.suggestions:
                catalog.record_event(
                    "grade_suggestion",
                    {**suggestion.to_dict(), **settings, "inputs": inputs[suggestion.dataset_id]},
                    dataset_id=suggestion.dataset_id,
                )
            if inputs:
                catalog.record_event(
                    "consistency",
                    {
                        **settings,
                        "observable": observable,
                        "compared": [_input_entry(by_id[i]) for i in inputs],
                        "suggested": [s.dataset_id for s in report.suggestions],
                    },
                )
    return report


_RERUN = "run `curate consistency` again for a current suggestion"


def _stale_because(
    catalog: Ledger, dataset_id: str, event: dict[str, Any]
) -> tuple[str, str] | None:
    """Give (why, remedy) when a recorded grade suggestion no longer holds, else None."""
    payload = event["payload"]
    seq = event["seq"]
    if "inputs" not in payload:
        return (
            f"the suggestion of event {seq} does not name the dataset versions it was computed "
            "from (it predates that record)",
            _RERUN,
        )
    for later in catalog.events():
        if later["seq"] <= seq or later["kind"] != "consistency":
            continue
        compared = {entry["id"] for entry in later["payload"].get("compared", [])}
        if dataset_id in compared and dataset_id not in later["payload"].get("suggested", []):
            return (
                f"the suggestion of event {seq} was withdrawn by the newer consistency run of "
                f"event {later['seq']}, which suggests no grade for it",
                "to change the grade anyway, give it with its reason",
            )
    current = catalog.show(dataset_id)
    if current.grade != payload.get("current"):
        return (
            f"the suggestion of event {seq} was computed from grade "
            f"{payload.get('current') or 'none'}, it is {current.grade or 'none'} now",
            _RERUN,
        )
    recorded = {entry["id"]: entry for entry in payload["inputs"]}
    for ident, entry in recorded.items():
        now = catalog.show(ident)
        if now.version != entry["version"] and consistency_inputs(now) != entry["inputs_sha256"]:
            return (
                f"the suggestion of event {seq} is stale: {ident} changed since "
                f"(version {entry['version']} -> {now.version})",
                _RERUN,
            )
    # a dataset that now matches its observable and conditions would have changed the consensus
    versions = [v for v in catalog.list(observable=current.record.observable.id) if v.grade != "X"]
    items = [
        (v.id, v.record.observable.id, {k: c.value for k, c in v.record.conditions.items()})
        for v in versions
    ]
    tolerance = float(payload.get("tolerance", 0.01))
    for members in consistency.match_groups(items, tolerance=tolerance):
        if dataset_id in members:
            joined = sorted(set(members) - set(recorded))
            if joined:
                return (
                    f"the suggestion of event {seq} is stale: {', '.join(joined)} joined its "
                    "comparison group since",
                    _RERUN,
                )
    return None


def accept_suggestion(
    catalog: Ledger, dataset_id: str, *, reason: str | None = None
) -> DatasetVersion:
    """Record the newest grade suggestion for a dataset as its grade (a person's decision).

    Refused when the suggestion no longer holds: a newer consistency run covering the dataset
    did not suggest it, the dataset's grade changed, a dataset it was compared with changed
    what the check reads (see :func:`consistency_inputs`), or a dataset joined its group.
    """
    event = catalog.latest_event(dataset_id, "grade_suggestion")
    if event is None:
        raise InputError(
            f"dataset {dataset_id}: no grade suggestion to accept; run `curate consistency` first"
        )
    stale = _stale_because(catalog, dataset_id, event)
    if stale is not None:
        why, remedy = stale
        raise InputError(f"dataset {dataset_id}: {why}; nothing graded: {remedy}")
    payload = event["payload"]
    return set_grade(
        catalog,
        dataset_id,
        str(payload["suggested"]),
        reason=(f"{reason.strip()}; " if reason and reason.strip() else "")
        + f"accepted suggestion (event {event['seq']}): {payload['reason']}",
        source="suggestion",
    )
