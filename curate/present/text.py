"""Terminal text of the catalog's own results: lists, records, history, verify, intake, noise,
grades and consistency (rich renderables). Runs (weights, exports, fits) are in ``run_text``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
from rich.console import Group
from rich.table import Table
from rich.text import Text

from curate.ingest.dialect import Dialect
from curate.ingest.inspection import FileInspection
from curate.ledger import AddPlan, AddResult, HistoryEntry, IntakeReport, VerifyReport
from curate.ledger.problems import ProblemSummary
from curate.present.tables import field_table
from curate.present.tables import table as plain_table
from curate.quality.actions import ConsistencyReport, NoiseOutcome
from curate.quality.consistency import SummaryConsistency
from curate.quality.grading import GradeSuggestion
from curate.records import ConditionValue, DatasetVersion
from curate.units import condition_text, short_unit, to_unit

__all__ = [
    "added_notes",
    "added_text",
    "backup_text",
    "consistency_text",
    "graded_data",
    "graded_text",
    "history_text",
    "inspection_text",
    "intake_text",
    "list_table",
    "noise_table",
    "petab_import_text",
    "plan_text",
    "restored_text",
    "retired_text",
    "revised_text",
    "show_text",
    "suggestion_text",
    "verify_text",
    "written_text",
]


def models_table(found: list[ProblemSummary]) -> Table | Text:
    """Give the table printed by ``curate models``."""
    if not found:
        return Text("no stored problems; `curate import-petab PROBLEM.yaml` stores one")
    table = plain_table(
        ("id", "v", "source", "SBML sha256", "parameters", "observables", "conditions",
         "datasets"),
        right=("v", "parameters", "observables", "conditions", "datasets"),
    )  # fmt: skip
    for summary in found:
        table.add_row(
            summary.id,
            str(summary.version),
            summary.source,
            summary.sbml_sha256[:12] if summary.sbml_sha256 else "-",
            str(len(summary.parameters)),
            str(len(summary.observables)),
            str(len(summary.conditions)),
            str(len(summary.datasets)),
        )
    return table


def list_table(found: list[DatasetVersion]) -> Table | Text:
    """Give the table printed by ``curate list``."""
    if not found:
        return Text("no datasets match")
    table = plain_table(
        ("id", "v", "observable", "unit", "lab", "conditions", "points", "grade", "notes"),
        right=("v", "points"),
    )
    for version in found:
        rec = version.record
        notes = [w.code for w in rec.warnings]
        if rec.retired:
            notes.insert(0, "retired")
        table.add_row(
            version.id,
            str(version.version),
            rec.observable.id,
            short_unit(rec.observable.unit) + (" (rel.)" if rec.observable.relative else ""),
            rec.source.lab,
            ", ".join(f"{k}={condition_text(v)}" for k, v in rec.conditions.items()),
            str(rec.n_points),
            version.grade or "-",
            ", ".join(notes),
        )
    return table


def _field_lines(version: DatasetVersion, total_versions: int) -> list[tuple[str, str]]:
    rec = version.record
    src = rec.source
    lines = [
        (
            "version",
            f"{version.version} of {total_versions},"
            f" written {version.created_at:%Y-%m-%d %H:%M} UTC",
        ),
        (
            "observable",
            f"{rec.observable.id}" + (f" ({rec.observable.label})" if rec.observable.label else ""),
        ),
        (
            "unit",
            f"{short_unit(rec.observable.unit)} (given as '{rec.observable.unit_original}'"
            f"{', UCUM ' + rec.observable.ucum if rec.observable.ucum else ''})"
            + ("; relative units: fits need a scale factor" if rec.observable.relative else ""),
        ),
        ("time", f"stored in s (given in '{rec.time_unit_original}')"),
        ("lab", src.lab),
    ]
    for name in ("contact", "method", "instrument", "acquired", "reference"):
        value = getattr(src, name)
        if value:
            lines.append((name, str(value)))
    if src.raw_file_name:
        lines.append(
            ("raw file", f"{src.raw_file_name} (sha256 {(src.raw_file_sha256 or '')[:16]}…)")
        )
    if rec.conditions:
        lines.append(
            (
                "conditions",
                ", ".join(f"{k} = {condition_text(v)}" for k, v in rec.conditions.items()),
            )
        )
    if rec.uncertainty:
        u = rec.uncertainty
        extra = (f", level {u.level:g}" if u.level else "") + (f", n = {u.n}" if u.n else "")
        lines.append(("uncertainty", f"{u.type.value} on {u.scale.value} scale{extra}"))
    protocol = rec.protocol
    if protocol.normalisation.kind != "none":
        ref = protocol.normalisation.reference
        lines.append(("normalised", protocol.normalisation.kind + (f" ({ref})" if ref else "")))
    if protocol.calibration_group:
        lines.append(("calibration", protocol.calibration_group))
    for step in protocol.pretreatment:
        duration = f" for {step.duration_s:g} s" if step.duration_s is not None else ""
        lines.append(
            (
                "pretreatment",
                f"{step.step}{duration}" + (f" ({step.details})" if step.details else ""),
            )
        )
    if rec.noise:
        lines.append(
            (
                "noise",
                f"sd {rec.noise.sd:.4g} by {rec.noise.method} "
                f"({rec.noise.made_at:%Y-%m-%d}, {rec.noise.made_by})",
            )
        )
    if rec.trust:
        lines.append(
            (
                "trust",
                f"{rec.trust.grade}: {rec.trust.rationale} "
                f"({rec.trust.assigned_by}, {rec.trust.assigned_at:%Y-%m-%d})",
            )
        )
    else:
        lines.append(("trust", "not graded"))
    if rec.retired:
        lines.append(("retired", rec.retired_reason or "yes"))
    lines.append(
        (
            "points",
            f"{rec.n_points}"
            + (f" in {len(rec.replicate_labels)} replicates" if rec.replicate_labels else ""),
        )
    )
    lines.append(("content", rec.content_hash))
    return lines


def _uncertainty_header(version: DatasetVersion) -> str:
    """Give the header of the stored uncertainty column: what it holds, in which unit."""
    u = version.record.uncertainty
    unit = short_unit(version.record.observable.unit)
    if u is None:
        return f"sd ({unit})"
    kind = u.type.value
    if kind == "ci":
        kind = f"ci{100 * (u.level or 0):g}"  # the half-width of the interval
    elif kind in ("estimated", "assumed"):
        kind = f"{kind} sd"
    elif kind == "percent":
        return "sd (% of value)"
    if u.scale.value != "linear":
        return f"{kind} ({u.scale.value} scale)"
    return f"{kind} ({unit})"


def show_text(
    version: DatasetVersion, total_versions: int, points: pd.DataFrame, *, all_points: bool
) -> Group:
    """Give what ``curate show`` prints."""
    parts: list[Any] = [Text(version.id, style="bold")]
    fields = field_table()
    for name, value in _field_lines(version, total_versions):
        fields.add_row(name, value)
    parts.append(fields)
    for warning in version.record.warnings:
        parts.append(Text(f"! {warning.code}: {warning.message}"))
    limit = len(points) if all_points else 12
    unit = short_unit(version.record.observable.unit)
    labels = {"time": "time (s)", "value": f"value ({unit})", "sd": _uncertainty_header(version)}
    headers = [labels.get(str(column), str(column)) for column in points.columns]
    table = plain_table(headers, right=headers)
    for row in points.head(limit).itertuples(index=False):
        table.add_row(*[f"{x:.6g}" if isinstance(x, float) else str(x) for x in row])
    parts.append(Text(""))
    parts.append(table)
    if len(points) > limit:
        parts.append(Text(f"… {len(points) - limit} more points (--points shows all)"))
    if "censored" in points.columns:
        parts.append(Text("censored: the point lies below (above) its limit, shown as its value"))
    return Group(*parts)


def history_text(dataset_id: str, entries: list[HistoryEntry]) -> Group:
    """Give what ``curate history`` prints."""
    parts: list[Any] = [Text(f"history of {dataset_id}", style="bold")]
    for entry in entries:
        head = f"#{entry.seq}  {entry.at[:19].replace('T', ' ')}  {entry.actor}  {entry.kind}"
        if entry.version is not None:
            head += f" -> version {entry.version}"
        parts.append(Text(head))
        if entry.reason:
            parts.append(Text(f"    reason: {entry.reason}"))
        for change in entry.changes:
            parts.append(Text(f"    {change}"))
    return Group(*parts)


def _count(n: int, word: str) -> str:
    """Give '1 dataset', '2 datasets', '1 policy', '3 policies', '2 series'."""
    if n == 1 or word == "series":
        return f"{n} {word}"
    return f"{n} {word[:-1]}ies" if word.endswith("y") else f"{n} {word}s"


def verify_text(result: VerifyReport) -> Text:
    """Give what ``curate verify`` prints: intact or the problems, then the chain head."""
    counts = ", ".join(
        _count(n, word)
        for n, word in ((result.datasets, "dataset"), (result.versions, "version"),
                        (result.series, "series"), (result.events, "event"), (result.policies, "policy"))
    ) + (f", {_count(result.stored_problems, 'PEtab problem')}" if result.stored_problems else "")  # fmt: skip
    if result.ok:
        lines = [f"intact: {counts} recomputed, every hash and link holds"]
    else:
        lines = [f"NOT intact ({counts} checked)"]
        if result.sqlite != "ok":
            lines.append(f"  sqlite integrity check: {result.sqlite}")
        lines += [f"  {problem}" for problem in result.problems]
    if result.unsealed_policies:
        lines.append(
            "  text not sealed (stored by an older curate), not checked: policy "
            + ", ".join(f"'{name}'" for name in result.unsealed_policies)
        )
    head = f"chain head: {result.head_seq}:{result.head_hash}"
    if result.anchor is not None and result.ok:
        where = f" from {result.anchor.source}" if result.anchor.source else ""
        head += f" (extends head {result.anchor.seq}:{result.anchor.hash[:12]}{where})"
    lines.append(head)
    return Text("\n".join(lines))


def intake_text(result: IntakeReport) -> Group:
    """Give what ``curate intake`` prints."""
    parts: list[Any] = [
        Text(
            f"{result.count('added')} logged, {result.count('duplicate')} already present, "
            f"{result.count('quarantined')} quarantined, {result.count('refused')} refused "
            f"(folder {result.folder})"
        )
    ]
    for item in result.items:
        if item.status == "added":
            line = f"  + {item.file} -> {item.id}"
            if item.warnings:
                line += f"  ({len(item.warnings)} warning{'s' if len(item.warnings) > 1 else ''})"
        elif item.status == "duplicate":
            line = f"  = {item.file} -> {item.id} (identical data already logged)"
        else:
            line = f"  x {item.file}: {item.reason}"
        parts.append(Text(line))
        for warning in item.warnings:
            parts.append(Text(f"      warning: {warning}"))
    if result.count("quarantined"):
        parts.append(Text(f"quarantined files and their reasons are in {result.quarantine}"))
    return Group(*parts)


def plan_text(plan: AddPlan) -> Group:
    """Give what ``curate add --dry-run`` prints."""
    info = plan.to_dict()
    lines = [
        Text(
            f"dry run: would {'add nothing' if plan.duplicate_of else 'add'} "
            f"{info['id']} (version {info['version']}), {info['n_points']} points from "
            f"{info['origin']}"
        )
    ]
    lines += [Text(f"warning: {w['message']}") for w in info["warnings"]]
    return Group(*lines)


def inspection_text(found: FileInspection) -> Group:
    """Give what ``curate inspect`` prints."""
    lines: list[Any] = [Text(found.path)]
    if found.sheets:
        shown = ", ".join(f"{s['name']} ({s['rows']} rows)" for s in found.sheets)
        lines.append(Text(f"sheets: {shown}" + (f"; read: {found.sheet}" if found.sheet else "")))
    if found.dialect is not None:
        dialect = Dialect(**{**found.dialect, "detected": tuple(found.dialect["detected"])})
        detected = f" (detected: {', '.join(dialect.detected)})" if dialect.detected else ""
        lines.append(Text("dialect: " + dialect.describe() + detected))
    if found.header_line is not None:
        lines.append(Text(f"header on line {found.header_line}, {found.rows} data rows"))
        table = plain_table(("column", "name", "unit in header", "read as"))
        for column in found.columns:
            table.add_row(column["header"], column["name"], column["unit"] or "-",
                          column["role"] or "(kept as an extra column)")  # fmt: skip
        lines.append(table)
    lines += [Text(f"layout: {note}") for note in found.layout_notes]
    if found.would_add is not None:
        w = found.would_add
        lines.append(Text(
            f"add would log: {w['observable']} in {w['unit']}"
            + (" (relative)" if w["relative"] else "")
            + f", time in {w['time_unit']}, {w['points']} points, lab {w['lab']}"
        ))  # fmt: skip
        if w.get("time_cells"):
            lines.append(Text(f"  {w['time_cells']}"))
        lines += [Text(f"  warning: {message}") for message in w["warnings"]]
    elif found.would_refuse is not None:
        lines.append(Text(f"add would refuse: {found.would_refuse}"))
    return Group(*lines)


def consistent_labs_line(summary: SummaryConsistency) -> str:
    """Give the line naming the largest consistent set of labs, or saying there is none."""
    if len(summary.labels) >= 2 and len(summary.consistent_subset) <= 1:
        return (
            f"no two labs agree within their uncertainties (chi2 test at {summary.alpha:g}); "
            "no consistent set of labs"
        )
    if summary.tied_subsets:
        sets = [summary.consistent_subset, *summary.tied_subsets]
        return (
            "no single largest consistent set of labs: "
            + "; ".join("{" + ", ".join(s) + "}" for s in sets)
            + " each pass alone; the data cannot tell which is right"
        )
    return "largest consistent set of labs: " + ", ".join(summary.consistent_subset)


def _num(value: float | None, spec: str = ".3g") -> str:
    return "-" if value is None else format(value, spec)


def noise_table(written: list[NoiseOutcome]) -> Table:
    """Give what ``curate noise`` prints (an unchanged estimate says so: nothing was written)."""
    table = plain_table(
        ("id", "v", "method", "sd", "unit", "dof", "why", "notes"), right=("v", "sd", "dof")
    )
    for outcome in written:
        version, result = outcome.version, outcome.result
        notes = list(result.warnings)
        if not outcome.changed:
            notes.insert(0, f"unchanged: the same estimate is already in version {version.version}")
        table.add_row(
            version.id,
            str(version.version),
            result.method,
            f"{result.sd:.4g}",
            short_unit(version.record.observable.unit),
            str(result.dof),
            str(result.parameters.get("choice", "")),
            "; ".join(notes),
        )
    return table


def suggestion_text(
    dataset_id: str, suggestion: GradeSuggestion, graded: DatasetVersion | None
) -> Group:
    """Give what ``curate grade --checklist`` prints."""
    lines = [
        Text(
            f"{dataset_id}: the checklist suggests {suggestion.grade} (penalty {suggestion.penalty})"
        )
    ]
    lines += [Text(f"  {reason}") for reason in suggestion.reasons]
    if graded is not None:
        lines.append(
            Text(f"recorded: {graded.id} graded {graded.grade} (version {graded.version})")
        )
    else:
        lines.append(
            Text("nothing graded yet: rerun with --accept, or grade it yourself with a reason")
        )
    return Group(*lines)


def consistency_text(result: ConsistencyReport) -> Group:
    """Give what ``curate consistency`` prints."""
    parts: list[Any] = []
    if not result.groups:
        parts.append(
            Text("no two datasets share an observable and matching conditions: nothing to compare")
        )
    for group in result.groups:
        conditions = ", ".join(
            f"{k}={condition_text(ConditionValue.model_validate(v))}"
            for k, v in group.conditions.items()
        )
        parts.append(Text(f"{group.observable} at {conditions or 'no conditions'}", style="bold"))
        table = plain_table(
            ("dataset", "lab", "points", "chi2", "dof", "Birge R", "p", "note"),
            right=("points", "chi2", "dof", "Birge R", "p"),
        )
        for row in group.datasets:
            note = row.note
            if row.p_value is not None and row.p_value < result.alpha and not row.ambiguous:
                note = (note + "; " if note else "") + "disagrees with the others"
            if not row.in_consensus:
                note = (note + "; " if note else "") + "left out of the consensus"
            if row.scale is not None:  # data = s x consensus, named by its calibration group
                named = f" ({row.calibration_group})" if row.calibration_group else ""
                note = (note + "; " if note else "") + f"scale {row.scale:.4g}{named}"
            table.add_row(
                row.id,
                row.lab,
                str(row.n_overlap),
                _num(row.chi2, ".1f"),
                _num(row.dof, "d") if row.dof is not None else "-",
                _num(row.birge_ratio, ".2f"),
                _num(row.p_value, ".2g"),
                note,
            )
        parts.append(table)
        if group.summary is not None:
            s = group.summary
            parts.append(
                Text(
                    f"  {result.summary_of}: weighted mean {s.weighted_mean:.4g} ± {s.mean_stderr:.2g}; Q = {s.q:.1f} on {s.dof} dof "
                    f"(p = {s.q_p_value:.2g}); I² = {100 * s.i2:.0f}%; tau² DL {s.tau2_dl:.3g}, PM {s.tau2_pm:.3g}; "
                    f"PDG S = {s.pdg_scale:.2f}"
                )
            )
        if group.lab_summary is not None:
            parts.append(Text("  " + consistent_labs_line(group.lab_summary)))
        parts.append(Text(""))
    for note in result.notes:
        parts.append(Text(f"note: {note}"))
    if result.labs:
        parts.append(Text("labs against the consensus", style="bold"))
        table = plain_table(("lab", "Birge R", "dof", "grades", "flag"), right=("Birge R", "dof"))
        for lab in result.labs:
            table.add_row(
                lab.lab, f"{lab.birge_ratio:.2f}", str(lab.dof), ",".join(lab.grades), lab.flag
            )
        parts.append(table)
    if result.suggestions:
        parts.append(Text(""))
        parts.append(
            Text(
                "grade suggestions (recorded; `curate grade ID --accept-suggestion` takes one)",
                style="bold",
            )
        )
        for suggestion in result.suggestions:
            parts.append(
                Text(
                    f"  {suggestion.dataset_id}: {suggestion.current or 'ungraded'} -> {suggestion.suggested}: {suggestion.reason}"
                )
            )
    if result.single:
        parts.append(
            Text(
                f"not compared (nothing else under matching conditions): {', '.join(result.single)}"
            )
        )
    return Group(*parts)


def added_text(result: AddResult) -> Text:
    """Give what ``curate add`` prints on stdout: the dataset's id."""
    return Text(result.id)


def added_notes(result: AddResult) -> list[str]:
    """Give what ``curate add`` prints on stderr: a duplicate notice and the warnings."""
    notes = (
        []
        if result.added
        else [f"already in the catalog as {result.duplicate_of} (identical data); nothing added"]
    )
    return notes + [f"warning: {warning}" for warning in result.warnings]


def petab_import_text(results: list[AddResult]) -> Text:
    """Give what ``curate import-petab`` prints."""
    added = sum(r.added for r in results)
    lines = []
    problem = results[0].problem if results else None
    if problem is not None:
        how = "stored as" if problem.stored else "already stored as"
        lines.append(
            f"problem {problem.source}: {how} {problem.id} version {problem.version} "
            f"(`curate models` lists it)"
        )
    lines.append(f"{added} dataset(s) logged, {len(results) - added} already present")
    lines += [
        f"  {r.id}" + ("" if r.added else f"  (already present as {r.duplicate_of})")
        for r in results
    ]
    return Text("\n".join(lines))


def retired_text(version: DatasetVersion) -> Text:
    """Give what ``curate retire`` prints."""
    return Text(f"{version.id} retired (version {version.version})")


_QUIET_CHANGES = ("annotations.", "warnings", "as_given", "content_hash")


def revised_text(version: DatasetVersion, changes: tuple[str, ...] = ()) -> Text:
    """Give what ``curate revise`` prints: the new version and the fields it changed."""
    shown = [c for c in changes if not c.startswith(_QUIET_CHANGES)]
    lines = [f"{version.id} version {version.version}"]
    lines += [f"  {c}" for c in shown]
    return Text("\n".join(lines))


def masked_text(version: DatasetVersion) -> Text:
    """Give what ``curate mask`` and ``curate unmask`` print."""
    masks = version.record.masks
    if not masks:
        return Text(f"{version.id} version {version.version}: no points masked")
    unit = version.record.time_unit_original
    times = ", ".join(
        f"{to_unit(m.time, 'second', unit):g} {unit}"
        + (f" (replicate {m.replicate})" if m.replicate else "")
        for m in masks
    )
    return Text(f"{version.id} version {version.version}: points masked at {times}")


def graded_text(version: DatasetVersion) -> Text:
    """Give what ``curate grade`` prints after recording a grade."""
    return Text(f"{version.id} graded {version.grade} (version {version.version})")


def graded_data(version: DatasetVersion) -> dict[str, Any]:
    """Give what ``curate grade --json`` prints after recording a grade."""
    trust = version.record.trust
    return {"id": version.id, "version": version.version, "grade": version.grade,
            "rationale": trust.rationale if trust else None}  # fmt: skip


def restored_text(source: Path, target: Path, kept: Path | None) -> Text:
    """Give what ``curate restore`` prints."""
    return Text(
        f"restored {source} as {target}"
        + (f"; the previous catalog is kept as {kept}" if kept else "")
    )


def written_text(what: str, path: Path) -> Text:
    """Give 'report: PATH' and the like, for a file a command wrote."""
    return Text(f"{what}: {path}")


def backup_text(destination: Path, result: VerifyReport) -> Text:
    """Give what ``curate backup`` prints: the copy's verification and the head it records."""
    return Text(
        f"backup written to {destination}; {verify_text(result)}\n"
        f"later, `curate verify --against {destination}` tells whether the catalog still "
        "extends this head"
    )
