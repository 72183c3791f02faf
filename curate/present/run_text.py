"""Terminal text of runs: weights, exports, folds, trace, impact, fits, sensitivity, the demo.

Rich renderables; the table style comes from :mod:`curate.present.tables`.
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path
from typing import Any, Protocol

from rich.console import Group
from rich.text import Text

from curate.export import ExportResult, FoldSet, ImpactEntry, TraceReport
from curate.fit.engine import FitResult
from curate.fit.ensemble import EnsembleResult
from curate.fit.predict import PredictionBand
from curate.fit.profile import ProfileResult
from curate.fit.sensitivity import SensitivityResult
from curate.ledger import IntakeReport, VerifyReport
from curate.present.tables import table as plain_table
from curate.present.text import verify_text
from curate.quality.actions import ConsistencyReport
from curate.weighting import WeightSummary

__all__ = [
    "DemoFindings",
    "demo_text",
    "export_text",
    "fit_text",
    "folds_text",
    "impact_text",
    "prediction_text",
    "sensitivity_text",
    "trace_text",
    "weights_text",
]


class DemoFindings(Protocol):
    """What the demo's summary reads (``curate.demo.DemoResult`` has it all)."""

    catalog_path: Path
    intake: IntakeReport
    noise_methods: dict[str, str]
    grades: dict[str, str]
    consistency: ConsistencyReport
    exports: dict[str, Path]
    weights: WeightSummary | None
    accepted: list[str]
    before: SensitivityResult | None
    fit: FitResult | None
    sensitivity: dict[str, SensitivityResult]
    truth: dict[str, float]
    report: Path | None
    verify: VerifyReport | None


def demo_text(result: DemoFindings) -> Group:
    """Give the plain-words summary ``curate demo`` prints."""
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
                value, se = (p["value"], p["stderr"]) if p else (None, None)
                if value is not None and se:
                    within.append(
                        f"{name} {value:.3g} ± {se:.2g} (true {truth:g}, {(value - truth) / se:+.1f} SE)"
                    )
            parts.append(
                Text("   against the values that generated the invented data: " + "; ".join(within))
            )
    for number, (by, sens) in enumerate(result.sensitivity.items()):
        measured = [g for g in sens.groups if g.cook_distance is not None]
        step = "8. after review, leave" if number == 0 else "   leave"  # one step, several checks
        text = f"{step} one {by} out: {len(sens.flags())} flag(s)"
        if measured:
            worst = max(measured, key=lambda g: g.cook_distance or 0.0)
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
        first, *rest = str(verify_text(result.verify)).splitlines()
        parts.append(Text("\n".join(["9. " + first, *("   " + line for line in rest)])))
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


def weights_text(summary: WeightSummary) -> Group:
    """Give what ``curate weights`` prints."""
    parts: list[Any] = [
        Text(f"policy: {summary.policy.name} (sha256 {summary.policy.sha256[:16]}…)")
    ]
    numbers = ("points", "inflation", "balance", "share", "n_eff")
    table = plain_table(("dataset", "observable", "lab", "grade", *numbers), right=numbers)
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
            "shares, balancing and lab caps are within each observable (weights of different units do not add "
            "up), on one footing: relative-unit data put on the absolute data's scale by their consensus scale "
            "factor s (data = s x reference, weight x s²), or, where an observable has only relative data, "
            "on the scale of each dataset's median |y|"
        )
    )
    scaled = [r for r in summary.datasets if r.footing in ("consensus", "median ratio")]
    if scaled:
        parts.append(
            Text(
                "relative data: "
                + ", ".join(f"{r.id} s = {r.scale:.4g} ({r.footing})" for r in scaled)
            )
        )
    parts += [Text(f"warning: {w}") for w in summary.warnings]
    return Group(*parts)


def export_text(result: ExportResult) -> Group:
    """Give what ``curate export`` prints."""
    parts: list[Any] = [Text(f"{result.format} export of {len(result.manifest['datasets'])} dataset versions "
                             f"({result.summary.n_points} points) written to {result.outdir}")]  # fmt: skip
    parts += [Text(f"  {name}") for name in sorted(result.files)]
    parts.append(Text(f"  manifest.json (sha256 {result.manifest['manifest_sha256'][:16]}…)"))
    parts += [Text(f"warning: {w}") for w in result.summary.warnings]
    return Group(*parts)


def folds_text(result: FoldSet) -> Group:
    """Give what ``curate folds`` prints."""
    parts: list[Any] = [
        Text(f"{len(result.folds)} folds by {result.by} written to {result.outdir}")
    ]
    table = plain_table(
        ("fold", "held out", "train", "test", "training lacks"), right=("train", "test")
    )
    for fold in result.folds:
        table.add_row(fold["name"], ", ".join(fold["held_out_groups"]), str(fold["train_points"]),
                      str(fold["test_points"]), "; ".join(fold["training_lacks"]) or "-")  # fmt: skip
    parts.append(table)
    return Group(*parts)


def trace_text(result: TraceReport) -> Group:
    """Give what ``curate trace`` prints."""
    if result.intact:
        return Group(Text(f"intact: the catalog still holds exactly the {len(result.same)} dataset versions "
                          f"this {result.format} export ({result.created_at}) used, and its files are unchanged"))  # fmt: skip
    parts: list[Any] = [Text(f"changed since the {result.format} export of {result.created_at}:")]
    parts += [
        Text(f"  {line}") for line in result.chain_changed + result.changed + result.files_changed
    ]
    parts.append(Text(f"{len(result.same)} dataset versions are unchanged"))
    return Group(*parts)


_IMPACT_WORDS = {
    "export": "export",
    "folds": "fold set",
    "fit": "fit",
    "sensitivity": "sensitivity run",
    "profile": "profile run",
    "ensemble": "ensemble run",
}


def _count(n: int, word: str) -> str:
    """Give '1 fit', '2 fits', or '' for none."""
    return "" if n == 0 else f"{n} {word}{'' if n == 1 else 's'}"


def impact_text(dataset_id: str, found: list[ImpactEntry]) -> Text:
    """Give what ``curate impact`` prints."""
    if not found:
        return Text(
            f"no export, fold set, fit or sensitivity run used an outdated version of {dataset_id}"
        )
    counts = [
        _count(sum(e.kind == kind for e in found), _IMPACT_WORDS[kind]) for kind in _IMPACT_WORDS
    ]
    what_used = f"an outdated version of {dataset_id}"
    if any(e.superseded for e in found):
        what_used = (f"a dataset {dataset_id} supersedes" if all(e.superseded for e in found)
                     else f"{what_used} or a dataset it supersedes")  # fmt: skip
    lines = [f"{', '.join(c for c in counts if c)} used {what_used}:"]
    for entry in found:
        state = "retired" if entry.retired else f"now version {entry.current_version}"
        what = _IMPACT_WORDS.get(entry.kind, entry.kind)
        if entry.kind == "export":
            what = f"{entry.format} export"
        elif entry.kind == "folds":
            what = f"fold set (by {entry.format.partition(':')[2] or '?'})"
        where = f" {entry.outdir}" if entry.outdir else ""
        if entry.superseded is not None:
            lines.append(f"  {entry.at[:19].replace('T', ' ')}  {what}{where}: used "
                         f"{entry.superseded} version {entry.used_version}, which {dataset_id} supersedes")  # fmt: skip
            continue
        lines.append(f"  {entry.at[:19].replace('T', ' ')}  {what}{where}: used version "
                     f"{entry.used_version}, {state} ({', '.join(entry.changes)})")  # fmt: skip
    return Text("\n".join(lines))


def ensemble_text(result: EnsembleResult) -> Group:
    """Give what ``curate ensemble`` prints: the families of good fits."""
    head = Text(
        f"{result.starts} starts, {len(result.failed)} failed; {result.accepted} fits within "
        f"{result.threshold:.3f} ({result.objective} units) of the best {result.best_objective:.6g}; "
        f"{len(result.clusters)} famil{'y' if len(result.clusters) == 1 else 'ies'} "
        f"(cut {result.cut:g} in the optimiser's coordinates); {result.executor}"
    )
    names = list(result.best_parameters)
    numbers = ("family", "fits", "objective", *names)
    table = plain_table(numbers, right=numbers)
    for cluster in result.clusters:
        table.add_row(str(cluster.id), str(cluster.size), f"{cluster.objective:.6g}",
                      *[f"{cluster.parameters[n]['median']:.4g}" for n in names])  # fmt: skip
    parts: list[Any] = [head, table, Text("(each parameter: the family's median)")]
    for failure in result.failed[:3]:
        parts.append(Text(f"failed start {failure['start']}: {failure['error']}"))
    if len(result.failed) > 3:
        parts.append(Text(f"... and {len(result.failed) - 3} more failed starts (see --json)"))
    parts += [Text(f"note: {n}") for n in result.notes]
    return Group(*parts)


def profile_text(result: ProfileResult) -> Group:
    """Give what ``curate profile`` prints: each parameter's interval and verdict."""
    head = Text(
        f"profile likelihood ({result.objective}): {100 * result.level:g} % intervals where the "
        f"profile rises {result.threshold:.3f} above the optimum {result.optimum:.6g} "
        f"({result.refits} refits)"
    )
    numbers = ("value", "lower", "upper", "points")
    table = plain_table(
        ("parameter", "value", "lower", "upper", "verdict", "points"), right=numbers
    )
    for name, found in result.parameters.items():
        low = f"{found.lower:.6g}" if found.lower is not None else f"open ({found.lower_end})"
        high = f"{found.upper:.6g}" if found.upper is not None else f"open ({found.upper_end})"
        table.add_row(name, f"{found.value:.6g}", low, high, found.verdict, str(len(found.points)))
    parts: list[Any] = [head, table]
    parts += [Text(f"note: {note}") for note in result.notes]
    return Group(*parts)


def fit_text(result: FitResult) -> Group:
    """Give what ``curate fit`` prints."""
    if result.options.get("evaluate"):
        state = "at the start point, not optimised"
    else:
        state = f"{'converged' if result.converged else 'NOT converged'}: {result.message}"
    head = f"chi2 {result.chi2:.4g} on {result.dof} dof (reduced {result.reduced_chi2:.3g}), {result.n_points} points, {state}"
    if (
        result.objective == "nllh"
    ):  # the noise model is the problem's own: its likelihood was minimised
        head = (
            f"nllh {result.nllh:.10g} (minimised), " + head
            if not result.options.get("evaluate")
            else f"nllh {result.nllh:.10g}, " + head
        )
    parts: list[Any] = [Text(head)]
    table = plain_table(
        ("parameter", "value", "stderr", "rel. error"), right=("value", "stderr", "rel. error")
    )
    for name, p in result.parameters.items():
        value, se = p["value"], p["stderr"]
        relative = f"{100 * se / abs(value):.1f}%" if (se is not None and value) else "-"
        missing = "fixed" if name not in result.free else "n/a"  # free without one: not computed
        table.add_row(name, f"{value:.6g}", missing if se is None else f"{se:.3g}", relative)
    parts.append(table)
    if result.scale_factors:
        parts.append(
            Text(
                "scale factors by calibration group (data = s x model): "
                + ", ".join(f"{k} {v:.4g}" for k, v in result.scale_factors.items())
            )
        )
    if len(result.starts) > 1:
        key = "nllh" if result.objective == "nllh" else "chi2"
        best = sorted(s[key] for s in result.starts if s.get(key) is not None)
        shown = ", ".join(f"{c:.6g}" if key == "nllh" else f"{c:.4g}" for c in best[:5])
        # "the same optimum": within 0.1 in nllh, or 0.1 % in chi2 (common practice, no source)
        near = sum(
            1
            for c in best
            if c - best[0] <= (0.1 if key == "nllh" else 1e-3 * max(best[0], 1e-300))
        )
        failed = sum(1 for s in result.starts if s.get(key) is None)
        parts.append(Text(f"{len(result.starts)} starts, {near} reaching the best, {failed} failed; "
                          f"best {key} values: {shown}"))  # fmt: skip
    parts += [Text(f"note: {note}") for note in result.notes]
    return Group(*parts)


_SHIFT_COLUMNS = 6  # parameter columns per shift table (fits a 160-column terminal)


def _shift_table(result: SensitivityResult, full: dict[str, Any], names: list[str], *,
                 last: bool) -> Any:  # fmt: skip
    """Give one table of shifts in SE for ``names``; the last one adds Cook D and held-out chi2."""
    shifted = [f"{name} (SE)" for name in names]
    numbers = ["points", *shifted] + (["Cook D", "held-out chi2/dof"] if last else [])
    table = plain_table([f"without {result.by}", *numbers], right=numbers)
    table.columns[0].no_wrap = True
    table.columns[0].min_width = max([len(g.group) for g in result.groups] + [10])
    for group in result.groups:
        if group.error:
            tail = ["-", "refit failed (below)"] if last else []
            table.add_row(group.group, str(group.n_points), *(["-"] * len(names)), *tail)
            continue
        shifts = []
        for name in names:
            z = group.parameters.get(name, {}).get("shift_se")
            value = group.parameters.get(name, {}).get("value")
            base = full["parameters"][name].get("value")
            if z is not None:
                shifts.append(f"{z:+.2f}" + (" !" if abs(z) > result.shift_threshold else ""))
            elif value is not None and base:  # no standard error: the relative change
                shifts.append(f"{100 * (value - base) / abs(base):+.1f}%")
            else:
                shifts.append("-")
        heldout = (
            f"{group.heldout_chi2:.1f}/{group.heldout_dof}"
            if group.heldout_chi2 is not None
            else "-"
        )
        cook = "-" if group.cook_distance is None else f"{group.cook_distance:.3g}"
        table.add_row(group.group, str(group.n_points), *shifts, *([cook, heldout] if last else []))
    return table


def sensitivity_text(result: SensitivityResult) -> Group:
    """Give what ``curate sensitivity`` prints."""
    full = result.full if isinstance(result.full, dict) else result.full.to_dict()
    names = list(full["parameters"])
    how = result.executor if result.method == "external" else f"{result.method}, {result.executor}"
    parts: list[Any] = [Text(f"leave one {result.by} out ({how}); "
                             f"flags beyond {result.shift_threshold:g} SE", style="bold")]  # fmt: skip
    # fixed parameters do not move; many parameters go into several tables of a few columns
    # each, so that no group name or column is cut off
    free = [n for n in names if any(n in g.parameters for g in result.groups)] or names
    chunks = [free[k : k + _SHIFT_COLUMNS] for k in range(0, len(free), _SHIFT_COLUMNS)] or [[]]
    for number, chunk in enumerate(chunks):
        last = number == len(chunks) - 1
        if number:
            parts.append(Text(""))
        parts.append(_shift_table(result, full, chunk, last=last))
    parts += [Text(f"  without {result.by} {g.group}: {g.error}") for g in result.groups if g.error]
    if full.get("workdir"):
        parts.append(Text(f"the fitter's files (tables, results, logs) are in {full['workdir']}"))
    se_table = plain_table(
        ("parameter", "value", "asymptotic SE", "jackknife SE"),
        right=("value", "asymptotic SE", "jackknife SE"),
    )
    for name in names:
        p = full["parameters"][name]
        jack = result.jackknife_stderr.get(name)
        se_table.add_row(name, f"{p['value']:.6g}", "-" if p.get("stderr") is None else f"{p['stderr']:.3g}",
                         "-" if jack is None else f"{jack:.3g}")  # fmt: skip
    parts.append(Text(""))
    parts.append(se_table)
    parts += [Text(note) for note in result.notes()]
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
    elif result.unjudged():
        parts.append(
            Text(
                f"no flag, but {', '.join(result.unjudged())} could not be judged (no standard "
                f"error from the fit): look at their relative changes above"
            )
        )
    else:
        parts.append(
            Text(
                f"no parameter moves more than {result.shift_threshold:g} SE when any one {result.by} is left out"
            )
        )
    if result.profiles is not None:
        parts += profiles_parts(result.profiles)
    if result.families is not None:
        parts += families_parts(result.families)
    parts.append(
        Text("A stable fit can still be wrong in every dataset at once: this check is not proof.")
    )
    return Group(*parts)


_SHORT_VERDICTS = {"identifiable": "ok", "practically non-identifiable": "open",
                   "structurally non-identifiable": "flat"}  # fmt: skip


def profiles_parts(profiles: dict[str, Any]) -> list[Any]:
    """Give the group x parameter matrix of ``sensitivity --profiles``: per cell the verdict
    without the group (ok, open, flat) and how many times wider the interval is."""
    names = list(profiles["full"])
    by = profiles["by"]
    parts: list[Any] = [
        Text(f"profiles without each {by} (verdict; interval width without / with):", style="bold")
    ]
    table = plain_table((f"without {by}", *names))
    row = ["(all data)"]
    for name in names:
        entry = profiles["full"][name]
        row.append(_SHORT_VERDICTS.get(entry["verdict"], entry["verdict"]))
    table.add_row(*row)
    for group in profiles["groups"]:
        if group["error"]:
            table.add_row(group["group"], *["failed"] * len(names))
            continue
        cells = []
        for name in names:
            entry = group["parameters"][name]
            widening = entry["widening"]
            shown = (
                "open" if entry["opens"] else (f"x{widening:.2g}" if widening is not None else "-")
            )
            cells.append(f"{_SHORT_VERDICTS.get(entry['verdict'], entry['verdict'])} {shown}")
        table.add_row(group["group"], *cells)
    parts.append(table)
    if profiles["conclusions"]:
        parts.append(Text("which data identify which parameter:", style="bold"))
        parts += [Text(f"  {c}") for c in profiles["conclusions"]]
    else:
        parts.append(
            Text(f"no {by} alone identifies a parameter, and none widens an interval twofold")
        )
    return parts


def families_parts(families: dict[str, Any]) -> list[Any]:
    """Give the group x family table of ``sensitivity --ensemble``: per cell whether the family
    fits without the group, and how far above the best it then lies."""
    by, threshold = families["by"], families["threshold"]
    listed = families["families"]
    parts: list[Any] = [
        Text(
            f"families of good fits without each {by} ({families['starts']} starts, seed "
            f"{families['seed']}; fits: within {threshold:.2f} of the best; * kept with all data):",
            style="bold",
        )
    ]
    table = plain_table((f"without {by}", *[f"{f['id']}{'*' if f['kept'] else ''}" for f in listed],
                         "new"))  # fmt: skip
    for group in families["groups"]:
        if group["error"]:
            table.add_row(group["group"], *["failed"] * len(listed), "")
            continue
        cells = []
        for family in listed:
            cell = group["families"][str(family["id"])]
            if cell["delta"] is None:
                cells.append("-")
            else:
                cells.append(("fits " if cell["fits"] else "") + f"+{cell['delta']:.3g}")
        table.add_row(group["group"], *cells, str(len(group["new"])))
    parts.append(table)
    parts.append(Text("(each cell: the family's best refit above the best without the group; "
                      "- none of its refits stayed in it)"))  # fmt: skip
    if families["conclusions"]:
        parts.append(Text("which data decide between the families:", style="bold"))
        parts += [Text(f"  {c}") for c in families["conclusions"]]
    else:
        parts.append(Text(f"leaving out any one {by} leaves the same families fitting"))
    return parts


def prediction_text(result: PredictionBand, time_unit: str = "s") -> Group:
    """Give what ``curate predict`` prints: the band at each new time, and what it rests on."""
    from curate import units

    head = Text(f"prediction band of {result.fits} good fit{'s' if result.fits != 1 else ''} "
                "(pointwise min, median, max; the spread between fits, not a new experiment's noise)")  # fmt: skip
    scale = units.to_unit(1.0, "second", units.time_unit_spelling(time_unit))
    extra = [c for c in result.points.columns if c != "time"]
    named = [f"{c} ({result.units[c]})" if c in result.units else c for c in extra]
    columns = (f"time ({time_unit})", *named, "lower", "median", "upper")
    table = plain_table(columns, right=(columns[0], "lower", "median", "upper"))
    for k, row in result.points.iterrows():
        table.add_row(f"{row['time'] * scale:g}", *[f"{row[c]:g}" if isinstance(row[c], float)
                                                    else str(row[c]) for c in extra],
                      f"{result.lower[k]:.5g}", f"{result.median[k]:.5g}", f"{result.upper[k]:.5g}")  # fmt: skip
    parts: list[Any] = [head, table]
    if result.groups:
        side = plain_table((f"without {result.by}", "fits", "moves by", "width (x)", "widest (x)"),
                           right=("fits", "moves by", "width (x)", "widest (x)"))  # fmt: skip
        for group in sorted(result.groups, key=lambda g: -(g.get("moves") or 0)):
            if group.get("error"):
                side.add_row(group["group"], "failed", group["error"][:60], "", "")
                continue
            side.add_row(group["group"], str(group["fits"]),
                         "-" if group["moves"] is None else f"{group['moves']:.3g}",
                         "-" if group["widening"] is None else f"{group['widening']:.3g}",
                         "-" if group["max_widening"] is None else f"{group['max_widening']:.3g}")  # fmt: skip
        parts.append(side)
    parts += [Text(c, style="bold") for c in result.conclusions]
    parts += [Text(f"note: {n}") for n in result.notes]
    return Group(*parts)
