"""Text rendering of results for the terminal (rich renderables). Formatting lives here only."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd
from rich.console import Group
from rich.table import Table
from rich.text import Text

from curate import units
from curate.records import ConditionValue

if TYPE_CHECKING:
    from curate.assess import ConsistencyReport
    from curate.catalog import AddPlan, HistoryEntry, VerifyReport
    from curate.demo import DemoResult
    from curate.grading import GradeSuggestion
    from curate.ingest.inbox import IntakeReport
    from curate.records import DatasetVersion

__all__ = [
    "consistency_text",
    "demo_text",
    "history_text",
    "intake_text",
    "list_table",
    "noise_table",
    "plan_text",
    "show_text",
    "suggestion_text",
    "verify_text",
]

_UNIT_SHORT = {
    "second": "s",
    "micrometer": "µm",
    "nanomolar": "nM",
    "micrometer / second": "µm/s",
    "dimensionless": "1",
    "arbitrary_unit": "a.u.",
    "degree_Celsius": "°C",
    "piconewton": "pN",
    "1 / second": "1/s",
    "nanogram / milliliter": "ng/mL",
    "millivolt": "mV",
}


def short_unit(unit: str | None) -> str:
    """Give a compact label for a canonical unit."""
    if unit is None:
        return ""
    return _UNIT_SHORT.get(unit, unit)


def condition_text(value: ConditionValue) -> str:
    """Give '25 °C' or 'wt' for one condition value."""
    if isinstance(value.value, float):
        if value.unit and value.unit_original:
            # shown as the lab wrote it (10 uM), stored canonically (10000 nM)
            number = units.to_unit(value.value, value.unit, value.unit_original)
            return f"{number:g} {value.unit_original}"
        number_text = f"{value.value:g}"
        return f"{number_text} {short_unit(value.unit)}".strip() if value.unit else number_text
    return str(value.value)


def list_table(found: list[DatasetVersion]) -> Table | Text:
    """Give the table printed by ``curate list``."""
    if not found:
        return Text("no datasets match")
    table = Table(box=None, pad_edge=False, header_style="bold")
    for name in ("id", "v", "observable", "unit", "lab", "conditions", "points", "grade", "notes"):
        table.add_column(name, justify="right" if name in ("v", "points") else "left")
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


def show_text(
    version: DatasetVersion, total_versions: int, points: pd.DataFrame, *, all_points: bool
) -> Group:
    """Give what ``curate show`` prints."""
    parts: list[Any] = [Text(version.id, style="bold")]
    fields = Table(box=None, show_header=False, pad_edge=False)
    fields.add_column(style="dim")
    fields.add_column()
    for name, value in _field_lines(version, total_versions):
        fields.add_row(name, value)
    parts.append(fields)
    for warning in version.record.warnings:
        parts.append(Text(f"! {warning.code}: {warning.message}"))
    limit = len(points) if all_points else 12
    table = Table(box=None, pad_edge=False, header_style="bold")
    for column in points.columns:
        table.add_column(
            f"{column} ({'s' if column == 'time' else short_unit(version.record.observable.unit)})"
            if column in ("time", "value", "sd")
            else column,
            justify="right",
        )
    for row in points.head(limit).itertuples(index=False):
        table.add_row(*[f"{x:.6g}" if isinstance(x, float) else str(x) for x in row])
    parts.append(Text(""))
    parts.append(table)
    if len(points) > limit:
        parts.append(Text(f"… {len(points) - limit} more points (--points shows all)"))
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


def verify_text(result: VerifyReport) -> Text:
    """Give what ``curate verify`` prints."""
    counts = (
        f"{result.datasets} datasets, {result.versions} versions, {result.series} series, "
        f"{result.events} events"
    )
    if result.ok:
        return Text(f"intact: {counts} recomputed, every hash and link holds")
    lines = [f"NOT intact ({counts} checked)"]
    if result.sqlite != "ok":
        lines.append(f"  sqlite integrity check: {result.sqlite}")
    lines += [f"  {problem}" for problem in result.problems]
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


def _num(value: float | None, spec: str = ".3g") -> str:
    return "-" if value is None else format(value, spec)


def noise_table(written: list[tuple[DatasetVersion, Any]]) -> Table:
    """Give what ``curate noise`` prints."""
    table = Table(box=None, pad_edge=False, header_style="bold")
    for name in ("id", "v", "method", "sd", "unit", "dof", "why", "notes"):
        table.add_column(name, justify="right" if name in ("v", "sd", "dof") else "left")
    for version, result in written:
        table.add_row(
            version.id,
            str(version.version),
            result.method,
            f"{result.sd:.4g}",
            short_unit(version.record.observable.unit),
            str(result.dof),
            str(result.parameters.get("choice", "")),
            "; ".join(result.warnings),
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
        table = Table(box=None, pad_edge=False, header_style="bold")
        for name in ("dataset", "lab", "points", "chi2", "dof", "Birge R", "p", "note"):
            table.add_column(
                name, justify="left" if name in ("dataset", "lab", "note") else "right"
            )
        for row in group.datasets:
            note = row.note
            if row.p_value is not None and row.p_value < result.alpha:
                note = (note + "; " if note else "") + "disagrees with the others"
            if not row.in_consensus:
                note = (note + "; " if note else "") + "left out of the consensus"
            if row.scale is not None:
                note = (note + "; " if note else "") + f"scale {row.scale:.3g}"
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
                    f"  late levels: weighted mean {s.weighted_mean:.4g} ± {s.mean_stderr:.2g}; Q = {s.q:.1f} on {s.dof} dof "
                    f"(p = {s.q_p_value:.2g}); I² = {100 * s.i2:.0f}%; tau² DL {s.tau2_dl:.3g}, PM {s.tau2_pm:.3g}; "
                    f"PDG S = {s.pdg_scale:.2f}"
                )
            )
        if group.lab_summary is not None:
            parts.append(
                Text(
                    "  largest consistent set of labs: "
                    + ", ".join(group.lab_summary.consistent_subset)
                )
            )
        parts.append(Text(""))
    if result.labs:
        parts.append(Text("labs against the consensus", style="bold"))
        table = Table(box=None, pad_edge=False, header_style="bold")
        for name in ("lab", "Birge R", "dof", "grades", "flag"):
            table.add_column(name, justify="right" if name in ("Birge R", "dof") else "left")
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


def demo_text(result: DemoResult) -> Group:
    """Give the plain-words summary ``curate demo`` prints."""
    from collections import Counter

    intake = result.intake
    parts: list[Any] = [
        Text(
            "curate demo: an invented scenario (four invented labs, two observables, one planted fault)",
            style="bold",
        )
    ]
    parts.append(
        Text(
            f"1. logged {intake.count('added')} datasets with their units, conditions and sources"
            f" ({intake.count('quarantined')} quarantined); every change is a sealed event"
        )
    )
    methods = Counter(result.noise_methods.values())
    parts.append(
        Text(
            "2. estimated each dataset's noise: "
            + ", ".join(f"{n} by {m}" for m, n in sorted(methods.items()))
        )
    )
    grades = Counter(result.grades.values())
    parts.append(
        Text(
            "3. graded trust from each lab's checklist answers: "
            + ", ".join(f"{n} x {g}" for g, n in sorted(grades.items()))
        )
    )
    flagged = [
        r
        for g in result.consistency.groups
        for r in g.datasets
        if r.p_value is not None and r.p_value < result.consistency.alpha
    ]
    if flagged:
        lines = [
            f"{r.id} ({r.lab}): Birge ratio {r.birge_ratio:.1f}, p = {r.p_value:.1g}"
            for r in flagged
        ]
        parts.append(
            Text(
                "4. consistency: disagrees with the other datasets measuring the same thing: "
                + "; ".join(lines)
            )
        )
    else:
        parts.append(Text("4. consistency: every compared dataset agrees with the others"))
    if result.before is not None:
        rows = [g for g in result.before.groups if g.error is None and g.cook_distance is not None]
        hinged = sorted({g.group for g in rows if g.flags})
        if rows:
            cook = max(rows, key=lambda g: g.cook_distance or 0.0)
            worst = max(rows, key=lambda g: (g.heldout_chi2 or 0.0) / max(g.heldout_dof or 1, 1))
            parts.append(Text(
                f"   before review, the fit hinges on {len(hinged)} of {len(rows)} datasets left out one at a time; "
                f"largest Cook distance {cook.cook_distance:.3g} without {cook.group}; worst held-out fit: "
                f"{worst.group} at chi2/dof {(worst.heldout_chi2 or 0.0) / max(worst.heldout_dof or 1, 1):.1f}"
            ))  # fmt: skip
    for suggestion in result.consistency.suggestions:
        accepted = suggestion.dataset_id in result.accepted
        parts.append(
            Text(
                f"   suggested {suggestion.dataset_id} {suggestion.current or 'ungraded'} -> {suggestion.suggested}"
                + (" (accepted by the demo, standing in for the reviewer)" if accepted else "")
            )
        )
    if result.weights is not None:
        heavy = ", ".join(f"{obs}: n_eff {n:.0f}" for obs, n in result.weights.n_eff.items())
        parts.append(
            Text(
                f"5. weighted every point by its grade and noise ({result.weights.policy.name}; {heavy})"
            )
        )
    if result.exports:
        parts.append(
            Text(
                "6. wrote exports and holdout folds, each with README.txt and manifest.json, under "
                f"{Path(next(iter(result.exports.values()))).parent.parent}"
            )
        )
    if result.fit is not None:
        fit = result.fit
        parts.append(
            Text(
                f"7. fitted the scenario's ODE model: chi2 {fit.chi2:.1f} on {fit.dof} dof (reduced {fit.reduced_chi2:.2f})"
            )
        )
        if result.truth:
            within = []
            for name, truth in result.truth.items():
                p = fit.parameters.get(name)
                if p and p["stderr"]:
                    within.append(
                        f"{name} {p['value']:.3g} ± {p['stderr']:.2g} (true {truth:g}, {(p['value'] - truth) / p['stderr']:+.1f} SE)"
                    )
            parts.append(
                Text("   against the values that generated the invented data: " + "; ".join(within))
            )
    for by, sens in result.sensitivity.items():
        worst = max(
            (g for g in sens.groups if g.cook_distance is not None),
            key=lambda g: g.cook_distance,
            default=None,
        )
        text = f"8. after review, leave one {by} out: {len(sens.flags())} flag(s)"
        if worst is not None:
            moved = max(((n, v["shift_se"]) for n, v in worst.parameters.items() if v["shift_se"] is not None),
                        key=lambda item: abs(item[1]), default=None)  # fmt: skip
            text += f"; the conclusions depend most on {by} {worst.group} (Cook distance {worst.cook_distance:.2f}"
            if moved:
                text += f", {moved[0]} shifts {moved[1]:+.1f} SE without it"
            if worst.heldout_chi2 is not None and worst.heldout_dof:
                text += f", its own data fit at chi2/dof {worst.heldout_chi2 / worst.heldout_dof:.1f} without it"
            text += ")"
        parts.append(Text(text))
    if result.verify is not None:
        parts.append(Text("9. " + str(verify_text(result.verify))))
    if result.report is not None:
        parts.append(Text(f"report (open it in a browser): {result.report}"))
    parts.append(
        Text(f"catalog: {result.catalog_path}  (try: curate --catalog {result.catalog_path} list)")
    )
    parts.append(
        Text(
            "Grades, suggestions and weights are judgements, and a stable fit is not proof: see the README."
        )
    )
    return Group(*parts)


def weights_text(summary: Any) -> Group:
    """Give what ``curate weights`` prints."""
    parts: list[Any] = [
        Text(f"policy: {summary.policy.name} (sha256 {summary.policy.sha256[:16]}…)")
    ]
    table = Table(box=None, pad_edge=False, header_style="bold")
    for name in (
        "dataset",
        "observable",
        "lab",
        "grade",
        "points",
        "inflation",
        "balance",
        "share",
        "n_eff",
    ):
        table.add_column(
            name,
            justify="right"
            if name in ("points", "inflation", "balance", "share", "n_eff")
            else "left",
        )
    for row in summary.datasets:
        table.add_row(row.id, row.observable, row.lab, row.grade, str(row.n_points), f"{row.inflation:g}",
                      f"{row.balance:.3g}", f"{100 * row.share:.1f}%", f"{row.n_eff:.1f}")  # fmt: skip
    parts.append(table)
    for observable, n_eff in summary.n_eff.items():
        labs = ", ".join(
            f"{lab} {100 * share:.0f}%"
            for lab, share in sorted(summary.lab_shares[observable].items())
        )
        parts.append(
            Text(
                f"{observable}: Kish n_eff {n_eff:.1f}; weights span {summary.weight_span[observable]:.3g}x; by lab: {labs}"
            )
        )
    parts.append(
        Text(
            "shares are within each observable (weights of different units do not add up); for relative units "
            "they compare w x median|y|², which does not depend on each dataset's arbitrary scale"
        )
    )
    parts += [Text(f"warning: {w}") for w in summary.warnings]
    return Group(*parts)


def export_text(result: Any) -> Group:
    """Give what ``curate export`` prints."""
    parts: list[Any] = [Text(f"{result.format} export of {len(result.manifest['datasets'])} dataset versions "
                             f"({result.summary.n_points} points) written to {result.outdir}")]  # fmt: skip
    parts += [Text(f"  {name}") for name in sorted(result.files)]
    parts.append(Text(f"  manifest.json (sha256 {result.manifest['manifest_sha256'][:16]}…)"))
    parts += [Text(f"warning: {w}") for w in result.summary.warnings]
    return Group(*parts)


def folds_text(result: Any) -> Group:
    """Give what ``curate folds`` prints."""
    parts: list[Any] = [
        Text(f"{len(result.folds)} folds by {result.by} written to {result.outdir}")
    ]
    table = Table(box=None, pad_edge=False, header_style="bold")
    for name in ("fold", "held out", "train", "test", "training lacks"):
        table.add_column(name, justify="right" if name in ("train", "test") else "left")
    for fold in result.folds:
        table.add_row(fold["name"], ", ".join(fold["held_out_groups"]), str(fold["train_points"]),
                      str(fold["test_points"]), "; ".join(fold["training_lacks"]) or "-")  # fmt: skip
    parts.append(table)
    return Group(*parts)


def trace_text(result: Any) -> Group:
    """Give what ``curate trace`` prints."""
    if result.intact:
        return Group(Text(f"intact: the catalog still holds exactly the {len(result.same)} dataset versions "
                          f"this {result.format} export ({result.created_at}) used, and its files are unchanged"))  # fmt: skip
    parts: list[Any] = [Text(f"changed since the {result.format} export of {result.created_at}:")]
    parts += [Text(f"  {line}") for line in result.changed + result.files_changed]
    parts.append(Text(f"{len(result.same)} dataset versions are unchanged"))
    return Group(*parts)


def impact_text(dataset_id: str, found: list[Any]) -> Text:
    """Give what ``curate impact`` prints."""
    if not found:
        return Text(f"no export used an outdated version of {dataset_id}")
    lines = [f"{len(found)} export(s) used an outdated version of {dataset_id}:"]
    for entry in found:
        state = "retired" if entry.retired else f"now version {entry.current_version}"
        lines.append(f"  {entry.at[:19].replace('T', ' ')}  {entry.format}  {entry.outdir}: used version "
                     f"{entry.used_version}, {state} ({', '.join(entry.changes)})")  # fmt: skip
    return Text("\n".join(lines))


def fit_text(result: Any) -> Group:
    """Give what ``curate fit`` prints."""
    parts: list[Any] = [Text(f"chi2 {result.chi2:.4g} on {result.dof} dof (reduced {result.reduced_chi2:.3g}), "
                             f"{result.n_points} points, {'converged' if result.converged else 'NOT converged'}: {result.message}")]  # fmt: skip
    table = Table(box=None, pad_edge=False, header_style="bold")
    for name in ("parameter", "value", "stderr", "rel. error"):
        table.add_column(name, justify="left" if name == "parameter" else "right")
    for name, p in result.parameters.items():
        value, se = p["value"], p["stderr"]
        relative = f"{100 * se / abs(value):.1f}%" if (se is not None and value) else "-"
        table.add_row(name, f"{value:.6g}", "fixed" if se is None else f"{se:.3g}", relative)
    parts.append(table)
    if result.scale_factors:
        parts.append(
            Text(
                "scale factors: "
                + ", ".join(f"{k} {v:.4g}" for k, v in result.scale_factors.items())
            )
        )
    if len(result.starts) > 1:
        best = sorted(s["chi2"] for s in result.starts if s["chi2"] is not None)
        parts.append(
            Text(
                f"{len(result.starts)} starts; best chi2 values: "
                + ", ".join(f"{c:.4g}" for c in best[:5])
            )
        )
    return Group(*parts)


def sensitivity_text(result: Any) -> Group:
    """Give what ``curate sensitivity`` prints."""
    full = result.full if isinstance(result.full, dict) else result.full.to_dict()
    names = list(full["parameters"])
    parts: list[Any] = [Text(f"leave one {result.by} out ({result.method}, {result.executor}); "
                             f"flags beyond {result.shift_threshold:g} SE", style="bold")]  # fmt: skip
    table = Table(box=None, pad_edge=False, header_style="bold")
    table.add_column(f"without {result.by}")
    table.add_column("points", justify="right")
    for name in names:
        table.add_column(f"{name} (SE)", justify="right")
    for name in ("Cook D", "held-out chi2/dof"):
        table.add_column(name, justify="right")
    for group in result.groups:
        if group.error:
            table.add_row(
                group.group, str(group.n_points), *(["-"] * len(names)), "-", group.error[:40]
            )
            continue
        shifts = []
        for name in names:
            z = group.parameters.get(name, {}).get("shift_se")
            shifts.append(
                "-"
                if z is None
                else f"{z:+.2f}" + (" !" if abs(z) > result.shift_threshold else "")
            )
        heldout = (
            f"{group.heldout_chi2:.1f}/{group.heldout_dof}"
            if group.heldout_chi2 is not None
            else "-"
        )
        table.add_row(
            group.group,
            str(group.n_points),
            *shifts,
            "-" if group.cook_distance is None else f"{group.cook_distance:.3g}",
            heldout,
        )
    parts.append(table)
    se_table = Table(box=None, pad_edge=False, header_style="bold")
    for name in ("parameter", "value", "asymptotic SE", "jackknife SE"):
        se_table.add_column(name, justify="left" if name == "parameter" else "right")
    for name in names:
        p = full["parameters"][name]
        jack = result.jackknife_stderr.get(name)
        se_table.add_row(name, f"{p['value']:.6g}", "-" if p.get("stderr") is None else f"{p['stderr']:.3g}",
                         "-" if jack is None else f"{jack:.3g}")  # fmt: skip
    parts.append(Text(""))
    parts.append(se_table)
    for entry in result.policies:
        moved = ", ".join(
            f"{n} {v['shift_se']:+.2f} SE"
            for n, v in entry["parameters"].items()
            if v["shift_se"] is not None
        )
        parts.append(Text(f"under policy {entry['policy']} ({entry['origin']}): {moved}"))
    flags = result.flags()
    parts.append(Text(""))
    if flags:
        parts.append(Text("conclusions that hinge on one group:", style="bold"))
        parts += [Text(f"  {flag}") for flag in flags]
    else:
        parts.append(
            Text(
                f"no parameter moves more than {result.shift_threshold:g} SE when any one {result.by} is left out"
            )
        )
    parts.append(
        Text("A stable fit can still be wrong in every dataset at once: this check is not proof.")
    )
    return Group(*parts)
