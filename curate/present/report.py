"""The catalog report (``curate report OUT.html``): one self-contained page to show a colleague.

Sections: the catalog at a glance; every series with its uncertainty band, grade drawn in our
own colour-and-marker scheme; each dataset's share of the weight; the consistency table; the
newest recorded fit over the data; the newest sensitivity runs (shift plot, jackknife against
asymptotic standard errors); the newest export's manifest; and the cautions.
"""

from __future__ import annotations

import html
import json
import math
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.export.files import write_text
from curate.fit.backends import BACKENDS, ModelBackend, rebuild
from curate.fit.sensitivity import SensitivityResult
from curate.ledger import Ledger
from curate.present.html import (
    GRADE_STYLE,
    MAX_TABLE_ROWS,
    column_extremes,
    figure_tag,
    page,
    pyplot,
    rows_note,
    sensitivity_section,
    table_html,
)
from curate.present.many_fits import deciding_section, ensemble_section, profiles_section
from curate.quality.actions import check_consistency
from curate.quality.measured import measured_sd
from curate.records import ABOVE, BELOW, ConditionValue, SeriesArrays, masked_points
from curate.units import condition_text, short_unit
from curate.weighting import Policy, Selection, WeightSummary, weighted_table

__all__ = ["SECTIONS", "build_report", "write_report"]

SECTIONS = (
    "overview",
    "series",
    "weights",
    "consistency",
    "fit",
    "sensitivity",
    "ensemble",
    "profiles",
    "deciding",
    "manifest",
    "cautions",
)


def _events(catalog: Ledger, kind: str) -> list[dict[str, Any]]:
    return [e for e in catalog.events() if e["kind"] == kind]


# at most this many bars per overview chart (the rest summed as "others") and series panels
MAX_BARS = 30
MAX_PANELS = 48
MAX_CHARTS = 6  # observables with a weight chart
# the width of one series panel in pixels at the PNG's resolution: the thinning's columns
PANEL_PIXELS = int(3.1 * 110)


def _top(counts: Counter[str]) -> dict[str, int]:
    """Give at most MAX_BARS labels with their counts, the rest summed as 'others'."""
    if len(counts) <= MAX_BARS:
        return dict(counts)
    top = dict(counts.most_common(MAX_BARS - 1))
    top[f"{len(counts) - len(top)} others"] = sum(counts.values()) - sum(top.values())
    return top


def _many(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def _overview(catalog: Ledger) -> str:
    everything = catalog.list(include_retired=True)
    versions = [v for v in everything if not v.record.retired]
    retired = len(everything) - len(versions)
    by_observable = Counter(v.record.observable.id for v in versions)
    by_lab = Counter(v.record.source.lab for v in versions)
    by_grade = Counter(v.grade or "ungraded" for v in versions)
    plt = pyplot()
    figure, axes = plt.subplots(1, 3, figsize=(11, 2.8))
    for axis, (title, counts) in zip(
        axes, (("observable", by_observable), ("lab", by_lab), ("grade", by_grade)), strict=True
    ):
        shown = _top(counts)
        labels = sorted(shown)
        colours = [GRADE_STYLE.get(label if label != "ungraded" else None, GRADE_STYLE[None])[0] if title == "grade" else "#1b3a5c"
                   for label in labels]  # fmt: skip
        axis.barh(
            labels, [shown[k] for k in labels], color=colours, edgecolor="black", linewidth=0.5
        )
        axis.set_title(f"current datasets by {title}", fontsize=9)
        axis.tick_params(labelsize=8)
    figure.tight_layout()
    listed = (versions + [v for v in everything if v.record.retired])[:MAX_TABLE_ROWS]
    rows = [[v.id, v.version, v.record.observable.id, short_unit(v.record.observable.unit), v.record.source.lab,
             ", ".join(f"{k}={condition_text(c)}" for k, c in v.record.conditions.items()), v.record.n_points,
             v.grade or "-", ", ".join(w.code for w in v.record.warnings) + (" retired" if v.record.retired else "")]
            for v in listed]  # fmt: skip
    points = sum(v.record.n_points for v in versions)
    aside = (
        f" {_many(retired, 'retired dataset')} {'is' if retired == 1 else 'are'} kept but not counted."
        if retired
        else ""
    )
    return (
        f'<section id="overview"><h2>The catalog at a glance</h2><p class="note">{_many(len(versions), "current dataset")} '
        f"({points:,} points) from {_many(len(by_lab), 'lab')}; catalog {html.escape(catalog.catalog_id)}.{aside}</p>"
        + figure_tag(figure, "current datasets by observable, lab and grade")
        + table_html(
            [
                "dataset",
                "version",
                "observable",
                "unit",
                "lab",
                "conditions",
                "points",
                "grade",
                "notes",
            ],
            rows,
        )
        + rows_note(
            len(listed), len(everything), "datasets", "`curate list --retired` lists them all"
        )
        + "</section>"
    )


def _series(catalog: Ledger, fitted: dict[str, Any] | None) -> str:
    plt = pyplot()
    current = catalog.list()
    versions = current[:MAX_PANELS]
    columns = 4
    rows = math.ceil(len(versions) / columns) or 1
    figure, axes = plt.subplots(rows, columns, figsize=(3.1 * columns, 2.5 * rows), squeeze=False)
    overlay = fitted["predictions"] if fitted else {}
    thinned: list[str] = []
    masked_series: list[str] = []
    any_censored = False
    for axis, version in zip(axes.flat, versions, strict=False):
        stored = catalog.arrays(version.id)
        arrays = stored.observed()  # censored points are drawn apart, at their limits
        colour, marker = GRADE_STYLE.get(version.grade, GRADE_STYLE[None])
        try:
            sd = measured_sd(version, arrays)
        except InputError:
            sd = np.zeros(len(arrays))
        minutes = arrays.time / 60.0
        band_x, band_low, band_high = _band(minutes, arrays.value - sd, arrays.value + sd)
        axis.fill_between(band_x, band_low, band_high, color=colour, alpha=0.18, linewidth=0)
        masked = masked_points(version.record, arrays)
        if masked.any():
            masked_series.append(version.id)
            axis.scatter(
                minutes[masked], arrays.value[masked], s=14, marker=marker, facecolors="none",
                edgecolors=colour if marker in _UNFILLED else "black", linewidths=0.8, zorder=3,
            )  # fmt: skip
        kept = np.flatnonzero(~masked)
        drawn = kept[column_extremes(minutes[kept], arrays.value[kept], PANEL_PIXELS)]
        if len(drawn) < len(kept):
            thinned.append(version.id)
        axis.scatter(
            minutes[drawn],
            arrays.value[drawn],
            s=12,
            marker=marker,
            color=colour,
            # an unfilled marker (x, for grade X) has no edge to draw
            edgecolors=None if marker in _UNFILLED else "black",
            linewidths=0.3 if marker not in _UNFILLED else 1.0,
            zorder=3,
        )
        if stored.censored is not None:
            any_censored = True
            _censored_markers(axis, stored, colour)
        if version.id in overlay:
            line = overlay[version.id]
            axis.plot(
                np.asarray(line["minutes"]),
                np.asarray(line["value"]),
                color="black",
                linewidth=1.2,
                zorder=4,
            )
        axis.set_title(f"{version.id} [{version.grade or '-'}]", fontsize=7.5)
        axis.tick_params(labelsize=7)
        axis.set_xlabel("time (min)", fontsize=7)
        axis.set_ylabel(short_unit(version.record.observable.unit), fontsize=7)
        del arrays, stored, sd, minutes
    for axis in list(axes.flat)[len(versions) :]:
        axis.axis("off")
    from matplotlib.lines import Line2D

    key = [Line2D([], [], linestyle="none", marker=marker, color=colour, markeredgecolor="black", markersize=7,
                  label=f"grade {grade}" if grade else "ungraded")
           for grade, (colour, marker) in GRADE_STYLE.items()]  # fmt: skip
    if any_censored:
        key += [Line2D([], [], linestyle="none", marker=shape, color="black", markersize=9,
                       label=label) for shape, label in _CENSORED_KEY]  # fmt: skip
    figure.legend(
        handles=key,
        loc="upper center",
        ncol=len(key),
        frameon=False,
        fontsize=8,
        bbox_to_anchor=(0.5, 1.0),
    )
    figure.tight_layout(rect=(0, 0, 1, 0.96))
    note = ("Black lines: the newest recorded fit (relative-unit data drawn with their fitted scale factor)."
            if overlay else "No fit recorded yet: run `curate fit` to draw one over the data.")  # fmt: skip
    if masked_series:
        note += (
            f" Hollow markers: points set aside by masks ({', '.join(masked_series[:5])}"
            f"{', ...' if len(masked_series) > 5 else ''}), kept in the catalog but out of weights, "
            "exports and fits."
        )
    if any_censored:
        note += (
            " Arrows: censored points, drawn at their limit and pointing where the true value "
            "lies (down: below the limit, up: above it); the band leaves them out."
        )
    if thinned:
        note += (
            f" {len(thinned)} long series ({', '.join(thinned[:5])}{', ...' if len(thinned) > 5 else ''}) "
            "are drawn by their smallest and largest value in each pixel column, which looks the "
            "same as every point and keeps every extreme."
        )
    return (
        '<section id="series"><h2>Every series, with its uncertainty band and grade</h2>'
        f'<p class="note">Shaded band: value ± measured SD (never trust-inflated). {html.escape(note)}</p>'
        + figure_tag(figure, "every measured series with its uncertainty band (key: grade markers)")
        + rows_note(
            len(versions), len(current), "series", "`curate show ID --points` gives any of them"
        )
        + "</section>"
    )


_UNFILLED = {"x", "+", "1", "2", "3", "4", "|", "_"}
# censored points: an arrow from the limit towards where the true value lies (no grade uses it)
_CENSORED_KEY = ((r"$\downarrow$", "below a limit"), (r"$\uparrow$", "above a limit"))


def _censored_markers(axis: Any, arrays: SeriesArrays, colour: str) -> None:
    """Draw a series' censored points as arrows from their limits."""
    codes = np.asarray(arrays.censored)
    for code, (shape, _) in zip((BELOW, ABOVE), _CENSORED_KEY, strict=True):
        chosen = codes == code
        if chosen.any():
            axis.scatter(arrays.time[chosen] / 60.0, arrays.value[chosen], s=60, marker=shape,
                         color=colour, linewidths=0.5, zorder=3)  # fmt: skip


def _band(
    x: np.ndarray, low: np.ndarray, high: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Give the band to shade: as given when short, else per pixel column its lowest low and
    highest high, drawn across the column (a bounded number of vertices for any length)."""
    order = np.argsort(x, kind="stable")
    x, low, high = x[order], low[order], high[order]
    if len(x) <= 2 * PANEL_PIXELS:
        return x, low, high
    span = x[-1] - x[0]
    bins = np.minimum(
        ((x - x[0]) / (span or 1.0) * PANEL_PIXELS).astype(np.int64), PANEL_PIXELS - 1
    )
    starts = np.flatnonzero(np.r_[True, bins[1:] != bins[:-1]])
    ends = np.r_[starts[1:], len(x)] - 1
    lows, highs = np.minimum.reduceat(low, starts), np.maximum.reduceat(high, starts)
    edges = np.column_stack([x[starts], x[ends]]).reshape(-1)
    return edges, np.repeat(lows, 2), np.repeat(highs, 2)


def _weights(summary: WeightSummary | None, reason: str) -> str:
    if summary is None:
        return f'<section id="weights"><h2>Share of the total weight</h2><p>{html.escape(reason)}</p></section>'
    plt = pyplot()
    observables = sorted(summary.n_eff)[:MAX_CHARTS]
    figure, axes = plt.subplots(
        1, len(observables), figsize=(5.5 * len(observables), 3.2), squeeze=False
    )
    for axis, observable in zip(axes.flat, observables, strict=True):
        rows = [d for d in summary.datasets if d.observable == observable]
        if len(rows) > MAX_BARS:  # the largest shares; the table below says the rest
            rows = sorted(rows, key=lambda d: -d.share)[:MAX_BARS]
        colours = [GRADE_STYLE.get(d.grade, GRADE_STYLE[None])[0] for d in rows]
        axis.barh(
            [d.id for d in rows],
            [100 * d.share for d in rows],
            color=colours,
            edgecolor="black",
            linewidth=0.5,
        )
        axis.set_title(f"{observable}: share of weight (%)", fontsize=9)
        axis.tick_params(labelsize=7)
    figure.tight_layout()
    listed = sorted(summary.datasets, key=lambda d: -d.share)[:MAX_TABLE_ROWS]
    if len(listed) == len(summary.datasets):
        listed = list(summary.datasets)  # all of them, in their own order
    table = table_html(["dataset", "observable", "lab", "grade", "points", "inflation", "share", "Kish n_eff"],
                       [[d.id, d.observable, d.lab, d.grade, d.n_points, f"{d.inflation:g}", f"{100 * d.share:.1f}%",
                         f"{d.n_eff:.1f}"] for d in listed])  # fmt: skip
    table += rows_note(len(listed), len(summary.datasets), "datasets (the largest shares are shown)",
                       "`curate weights` lists them all")  # fmt: skip
    warnings = "".join(f"<li>{html.escape(w)}</li>" for w in summary.warnings)
    return (
        f'<section id="weights"><h2>Share of the total weight</h2><p class="note">Policy {html.escape(summary.policy.name)} '
        f"(sha256 {summary.policy.sha256[:16]}…). Shares are within each observable, relative-unit data "
        "on the absolute data's scale (their consensus scale factor), or on their own median's where "
        "an observable has only relative data.</p>"
        + figure_tag(figure, "share of the total weight per dataset")
        + table
        + (f"<ul>{warnings}</ul>" if warnings else "")
        + "</section>"
    )


def _consistency(catalog: Ledger) -> str:
    try:
        result = check_consistency(catalog, record=False)
    except InputError as err:
        return f'<section id="consistency"><h2>Consistency between datasets</h2><p>{html.escape(str(err))}</p></section>'
    parts = ['<section id="consistency"><h2>Consistency between datasets</h2>',
             '<p class="note">Each dataset against the consensus of the others measuring the same observable under '
             "matching conditions, on the uncertainties as measured.</p>"]  # fmt: skip
    shown = 0
    for number, group in enumerate(result.groups):
        if shown + len(group.datasets) > MAX_TABLE_ROWS and shown:
            rest = result.groups[number:]
            parts.append(f'<p class="note">{len(rest)} more groups ({sum(len(g.datasets) for g in rest)} datasets) '
                         "not shown here; `curate consistency` lists them all.</p>")  # fmt: skip
            break
        shown += len(group.datasets)
        rows, flagged = [], []
        for r in group.datasets[:MAX_TABLE_ROWS]:
            rows.append([r.id, r.lab, r.n_overlap, "-" if r.chi2 is None else f"{r.chi2:.1f}", r.dof if r.dof is not None else "-",
                         "-" if r.birge_ratio is None else f"{r.birge_ratio:.2f}", "-" if r.p_value is None else f"{r.p_value:.2g}",
                         "" if r.in_consensus else "left out of the consensus"])  # fmt: skip
            flagged.append(r.p_value is not None and r.p_value < result.alpha)
        label = ", ".join(
            f"{k}={condition_text(ConditionValue.model_validate(v))}"
            for k, v in group.conditions.items()
        )
        parts.append(f"<h3>{html.escape(group.observable)} at {html.escape(label)}</h3>")
        parts.append(
            table_html(
                ["dataset", "lab", "points", "chi2", "dof", "Birge R", "p", "note"],
                rows,
                flagged=flagged,
            )
            + rows_note(
                len(rows), len(group.datasets), "datasets", "`curate consistency` lists them all"
            )
        )
        if group.summary is not None:
            s = group.summary
            parts.append(f'<p class="note">{html.escape(result.summary_of.capitalize())}: Q = {s.q:.1f} on {s.dof} dof (p = {s.q_p_value:.2g}), I² = {100 * s.i2:.0f}%, '
                         f"tau² DL {s.tau2_dl:.3g}, PM {s.tau2_pm:.3g}, PDG S = {s.pdg_scale:.2f}.</p>")  # fmt: skip
    if result.labs:
        parts.append("<h3>Labs against the consensus</h3>")
        parts.append(table_html(["lab", "Birge R", "dof", "grades", "flag"],
                                [[lab.lab, f"{lab.birge_ratio:.2f}", lab.dof, ",".join(lab.grades), lab.flag]
                                 for lab in result.labs[:MAX_TABLE_ROWS]]))  # fmt: skip
        parts.append(rows_note(min(len(result.labs), MAX_TABLE_ROWS), len(result.labs), "labs",
                               "`curate consistency` lists them all"))  # fmt: skip
    parts.append("</section>")
    return "\n".join(parts)


def _backend_description(payload: dict[str, Any]) -> dict[str, Any]:
    """Give the recorded backend of a run (runs recorded before backends were named: by model)."""
    if "backend" in payload:
        return dict(payload["backend"])
    model = str(payload.get("model", ""))
    if model.startswith("external: "):
        return {"kind": "external", "command": model.removeprefix("external: ")}
    return {"kind": "python", "reference": model, "label": model}


def _predicts(payload: dict[str, Any]) -> bool:
    backend = BACKENDS.get(str(_backend_description(payload).get("kind")))
    return backend is not None and not backend.fits_itself


def _templates(table: pd.DataFrame, ids: list[str]) -> pd.DataFrame:
    """Give, for each of ``ids`` in the weighted table, its first row with ``time`` set to the
    dataset's last time: what a fitted curve over the dataset needs (conditions, units...)."""
    wanted = table[table["dataset_id"].isin(ids)]
    ends = wanted.groupby("dataset_id", observed=True)["time"].max()
    firsts = wanted.drop_duplicates("dataset_id").copy()
    firsts["time"] = firsts["dataset_id"].astype(str).map(ends.rename(index=str)).to_numpy()
    return firsts.reset_index(drop=True)


def _fit_overlay(
    catalog: Ledger, templates: pd.DataFrame | None
) -> tuple[str, dict[str, Any] | None]:
    events = _events(catalog, "fit") + _events(catalog, "sensitivity")
    events = [e for e in sorted(events, key=lambda e: e["seq"]) if _predicts(e["payload"])]
    if not events:
        return (
            '<section id="fit"><h2>The fit</h2><p>No fit recorded yet: run <code>curate fit</code>.</p></section>',
            None,
        )
    event = events[-1]
    payload = event["payload"]
    result = payload["result"]
    full = result.get("full", result)
    values = {n: p["value"] for n, p in full["parameters"].items()}
    scales = full.get("scale_factors", {})
    predictions: dict[str, Any] = {}
    note = "" if templates is not None else " (no weighted data to draw it over)"
    try:
        backend: ModelBackend = rebuild(_backend_description(payload))
        shown = templates if templates is not None else pd.DataFrame(columns=["dataset_id"])
        for _, first in shown.iterrows():
            dataset_id = str(first["dataset_id"])
            grid = pd.DataFrame({"time": np.linspace(0.0, float(first["time"]), 120)})
            for column in shown.columns:
                if column != "time":
                    grid[column] = first[column]
            # scale factors go by calibration group (data = s x model); fits recorded before
            # that were keyed by dataset id
            scale = (
                scales.get(str(first["calibration_group"]), scales.get(str(dataset_id), 1.0))
                if bool(first["relative"])
                else 1.0
            )
            curve = np.asarray(backend.predict(values, grid), dtype=float) * float(scale)
            predictions[dataset_id] = {
                "minutes": (grid["time"] / 60.0).tolist(),
                "value": curve.tolist(),
            }
    except Exception as err:  # the model file may have moved: the numbers still stand
        note = f" (the model could not be re-run for the overlay: {err})"
    rows = [
        [n, f"{p['value']:.6g}", "-" if p.get("stderr") is None else f"{p['stderr']:.3g}"]
        for n, p in full["parameters"].items()
    ]
    chi2 = full.get("chi2")
    text = (f'<section id="fit"><h2>The fit</h2><p class="note">Newest recorded {html.escape(event["kind"])} '
            f"(event {event['seq']}, {html.escape(event['at'][:19])}): model {html.escape(str(payload['model']))}, "
            f"policy sha256 {html.escape(str(payload['policy_sha256'])[:16])}…"
            + (f", chi2 {chi2:.4g} on {full.get('dof')} dof" if chi2 is not None else "") + html.escape(note)
            + ". The fitted curves are drawn over the series above.</p>"
            + table_html(["parameter", "value", "stderr"], rows) + "</section>")  # fmt: skip
    return text, {"predictions": predictions}


def _sensitivity(catalog: Ledger) -> str:
    events = _events(catalog, "sensitivity")
    newest: dict[str, dict[str, Any]] = {}
    for event in events:
        result = event["payload"].get("result", {})
        if "groups" in result:
            newest[result["by"]] = result
    if not newest:
        return '<section id="sensitivity"><h2>Sensitivity</h2><p>No sensitivity run recorded yet: run <code>curate sensitivity</code>.</p></section>'
    inner = "\n".join(
        sensitivity_section(SensitivityResult.from_dict(result)) for result in newest.values()
    )
    return f'<section id="sensitivity">{inner}</section>'


def _manifest(catalog: Ledger) -> str:
    events = [
        e for e in _events(catalog, "export") if not str(e["payload"]["format"]).startswith("folds")
    ]
    if not events:
        return '<section id="manifest"><h2>Export manifest</h2><p>No export yet: run <code>curate export</code>.</p></section>'
    event = events[-1]
    path = Path(event["payload"]["outdir"]) / "manifest.json"
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return (f'<section id="manifest"><h2>Export manifest</h2><p>The newest export ({html.escape(str(path))}) '
                "is no longer readable.</p></section>")  # fmt: skip
    rows = [[d["id"], d["version"], d["content_hash"][:16] + "…"] for d in manifest["datasets"]]
    head = manifest["event_chain_head"]
    return (
        f'<section id="manifest"><h2>Export manifest</h2><p class="note">{html.escape(manifest["format"])} export of '
        f"{html.escape(manifest['created_at'])} in {html.escape(str(path.parent))}: tool {html.escape(manifest['tool_version'])}, "
        f"catalog {html.escape(manifest['catalog_id'])}, event chain head #{head['seq']} {head['hash'][:16]}…, "
        f"policy {html.escape(manifest['policy']['name'])} (sha256 {manifest['policy']['sha256'][:16]}…), "
        f"manifest sha256 {manifest['manifest_sha256'][:16]}…</p>"
        + table_html(["dataset", "version", "content sha256"], rows)
        + "</section>"
    )


CAUTIONS = (
    '<section id="cautions"><h2>Read before you trust a number</h2><div class="caution"><ul>'
    "<li>Grades and weights encode human judgement, made explicit and reproducible here, not made correct.</li>"
    "<li>A sensitivity check is not proof: a fit that does not move when one dataset is left out can still be wrong in all of them.</li>"
    "<li>Consistency findings and grade suggestions are prompts for review; the lab's own standards, raw data and review come first.</li>"
    "</ul></div></section>"
)


def build_report(catalog: Ledger, policy: Policy) -> str:
    """Give the whole report page.

    Its size and memory stay bounded for any catalog: long series are thinned per pixel
    column, charts and tables show a bounded number of rows and say how many they left out,
    and the weighted table is built once and dropped before the plots are drawn.
    """
    summary: WeightSummary | None = None
    templates: pd.DataFrame | None = None
    reason = ""
    try:
        weighted = weighted_table(catalog, policy, Selection())
    except InputError as err:
        reason = str(err)
    else:
        summary = weighted.summary
        templates = _templates(weighted.table, [v.id for v in catalog.list()[:MAX_PANELS]])
        del weighted  # one row per point: not kept while the plots are drawn
    fit_html, fitted = _fit_overlay(catalog, templates)
    sections = [
        _overview(catalog),
        _series(catalog, fitted),
        _weights(summary, reason),
        _consistency(catalog),
        fit_html,
        _sensitivity(catalog),
        ensemble_section(catalog),
        profiles_section(catalog),
        deciding_section(catalog),
        _manifest(catalog),
        CAUTIONS,
    ]
    return page("curate report", sections)


def write_report(catalog: Ledger, path: str | Path, policy: Policy) -> str:
    """Write the report to ``path``; give its sha256."""
    target = Path(path)
    if not target.parent.is_dir():  # say so before the report is built, not after
        raise InputError(f"{target.parent}: no such folder; create it first, or name another file")
    return write_text(target, build_report(catalog, policy), make_folders=False)
