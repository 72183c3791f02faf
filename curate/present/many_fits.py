"""The report's sections on many good fits: the newest ensemble (waterfall of sorted objectives,
its families), the newest profiles (each with its threshold), and which data decide (the group x
parameter and group x family matrices of the newest sensitivity run that made them), from the
runs the catalog holds.
"""

from __future__ import annotations

import html
import math
from typing import Any

import numpy as np

from curate.ledger import Ledger
from curate.present.html import figure_tag, pyplot, table_html

__all__ = ["deciding_section", "ensemble_section", "profiles_section"]

MAX_PROFILES = 12  # panels drawn; the table lists every parameter
MAX_ROWS = 40  # groups drawn in a heat map (the run's JSON holds every one)
MAX_FAMILIES = 20  # families drawn in the group x family map


def _newest(catalog: Ledger, kind: str) -> dict[str, Any] | None:
    found = [e for e in catalog.events() if e["kind"] == kind]
    return found[-1] if found else None


def ensemble_section(catalog: Ledger) -> str:
    """Give the section on the newest ensemble run (or how to make one)."""
    event = _newest(catalog, "ensemble")
    if event is None:
        return ('<section id="ensemble"><h2>Many good fits</h2><p>No ensemble recorded yet: run '
                "<code>curate ensemble</code> to fit from many starts.</p></section>")  # fmt: skip
    result = event["payload"]["result"]
    best, threshold = float(result["best"]["objective"]), float(result["threshold"])
    objectives = np.asarray(result.get("objectives") or [], dtype=float)
    parts = [
        '<section id="ensemble"><h2>Many good fits</h2>'
        f'<p class="note">Ensemble of {event["at"][:19].replace("T", " ")}: {result["starts"]} starts '
        f"(seed {result.get('seed', '?')}), {len(result['failed'])} failed, {result['accepted']} "
        f"within {threshold:.3f} of the best objective {best:.6g}, in {len(result['clusters'])} "
        "families. A family that fits within the threshold is as good as the best by the data "
        "alone; the choice between families rests on the model and on which data you trust.</p>"
    ]
    if len(objectives):
        plt = pyplot()
        figure, axis = plt.subplots(figsize=(6.0, 2.8))
        rank = np.arange(1, len(objectives) + 1)
        axis.plot(rank, objectives - best, marker="o", markersize=3, linewidth=0.8, color="#33658a")
        axis.axhline(threshold, color="#b5423a", linewidth=1.0, linestyle="--",
                     label=f"threshold {threshold:.2f}")  # fmt: skip
        axis.set_yscale("symlog", linthresh=max(threshold, 1e-3))
        axis.set_xlabel("start, sorted by objective", fontsize=8)
        axis.set_ylabel("objective − best", fontsize=8)
        axis.legend(fontsize=7, frameon=False)
        axis.tick_params(labelsize=7)
        figure.tight_layout()
        parts.append(
            figure_tag(figure, "waterfall: every finished start's objective above the best, sorted")
        )
    names = list(result["best"]["parameters"])
    rows = [[str(c["id"]), str(c["size"]), f"{c['objective']:.6g}",
             *[f"{c['parameters'][n]['median']:.4g} [{c['parameters'][n]['min']:.3g}, {c['parameters'][n]['max']:.3g}]"
               for n in names]] for c in result["clusters"]]  # fmt: skip
    parts.append(table_html(["family", "fits", "objective", *names], rows))
    parts.append('<p class="note">Each parameter: the family\'s median [min, max].</p></section>')
    return "".join(parts)


def profiles_section(catalog: Ledger) -> str:
    """Give the section on the newest profile run (or how to make one)."""
    event = _newest(catalog, "profile")
    if event is None:
        return ('<section id="profiles"><h2>Profiles</h2><p>No profile recorded yet: run '
                "<code>curate profile</code> to see which parameters the data identify.</p></section>")  # fmt: skip
    result = event["payload"]["result"]
    threshold, optimum = float(result["threshold"]), float(result["optimum"])
    parameters = result["parameters"]
    rows = [[name, f"{p['value']:.6g}", "open" if p["lower"] is None else f"{p['lower']:.6g}",
             "open" if p["upper"] is None else f"{p['upper']:.6g}", p["verdict"]]
            for name, p in parameters.items()]  # fmt: skip
    parts = [
        '<section id="profiles"><h2>Profiles</h2>'
        f'<p class="note">Profile likelihoods of {event["at"][:19].replace("T", " ")}: each parameter '
        f"held at a value while the others are refitted; the dashed line is the rise of "
        f"{threshold:.3f} above the optimum that bounds the {100 * float(result['level']):g} % "
        "interval (Raue et al. 2009).</p>"
    ]
    shown = list(parameters.items())[:MAX_PROFILES]
    if shown:
        plt = pyplot()
        columns = min(4, len(shown))
        lines = math.ceil(len(shown) / columns)
        figure, axes = plt.subplots(
            lines, columns, figsize=(3.0 * columns, 2.3 * lines), squeeze=False
        )
        for axis, (name, found) in zip(axes.flat, shown, strict=False):
            points = np.asarray(found["points"], dtype=float)
            axis.plot(points[:, 0], points[:, 1] - optimum, marker="o", markersize=2.5,
                      linewidth=0.8, color="#33658a")  # fmt: skip
            axis.axhline(threshold, color="#b5423a", linewidth=1.0, linestyle="--")
            axis.axvline(found["value"], color="grey", linewidth=0.6)
            axis.set_title(f"{name}: {found['verdict']}", fontsize=7.5)
            axis.tick_params(labelsize=6.5)
            if points[:, 0].min() > 0 and points[:, 0].max() / points[:, 0].min() > 50:
                axis.set_xscale("log")
        for axis in list(axes.flat)[len(shown) :]:
            axis.axis("off")
        figure.tight_layout()
        parts.append(figure_tag(figure, "each parameter's profile with its threshold"))
    parts.append(table_html(["parameter", "value", "lower", "upper", "verdict"], rows))
    parts.append("</section>")
    return "".join(parts)


def _heat_map(values: np.ndarray, labels: list[list[str]], rows: list[str], columns: list[str],
              *, colour_label: str, centre: float | None, alt: str,
              limits: tuple[float, float, float] | None = None) -> str:  # fmt: skip
    """Give a heat map figure with each cell's label written in it."""
    plt = pyplot()
    height = 0.9 + 0.32 * len(rows)
    width = 2.6 + 0.85 * len(columns)
    figure, axis = plt.subplots(figsize=(min(width, 14.0), min(height, 16.0)))
    shown = np.ma.masked_invalid(values)
    if limits is not None:
        from matplotlib.colors import TwoSlopeNorm

        low, middle, high = limits
        image = axis.imshow(shown, cmap="RdBu_r", aspect="auto",
                            norm=TwoSlopeNorm(vmin=low, vcenter=middle, vmax=high))  # fmt: skip
    elif centre is None:
        image = axis.imshow(shown, cmap="viridis_r", aspect="auto")
    else:
        span = float(np.nanmax(np.abs(values - centre))) if np.isfinite(values).any() else 1.0
        span = max(span, 1e-9)
        image = axis.imshow(shown, cmap="RdBu_r", aspect="auto", vmin=centre - span,
                            vmax=centre + span)  # fmt: skip
    axis.set_xticks(range(len(columns)), columns, fontsize=7, rotation=30, ha="right")
    axis.set_yticks(range(len(rows)), rows, fontsize=7)
    for i, line in enumerate(labels):
        for j, text in enumerate(line):
            axis.text(j, i, text, ha="center", va="center", fontsize=6.5, color="black",
                      bbox={"facecolor": "white", "alpha": 0.6, "linewidth": 0, "pad": 0.6})  # fmt: skip
    colour_bar = figure.colorbar(image, ax=axis, fraction=0.04)
    colour_bar.set_label(colour_label, fontsize=7)
    colour_bar.ax.tick_params(labelsize=6.5)
    figure.tight_layout()
    return figure_tag(figure, alt)


def _parameter_map(profiles: dict[str, Any]) -> str:
    groups = [g for g in profiles["groups"] if g.get("error") is None][:MAX_ROWS]
    if not groups:
        return ""
    names = list(groups[0]["parameters"])
    values = np.full((len(groups), len(names)), np.nan)
    labels: list[list[str]] = []
    for i, group in enumerate(groups):
        line = []
        for j, name in enumerate(names):
            cell = group["parameters"].get(name) or {}
            widening = cell.get("widening")
            verdict = {"identifiable": "ok", "practically non-identifiable": "open",
                       "structurally non-identifiable": "flat"}.get(cell.get("verdict", ""), "?")  # fmt: skip
            if widening is not None and math.isfinite(widening) and widening > 0:
                values[i, j] = math.log2(widening)
                line.append(f"{verdict} x{widening:.2g}")
            else:
                values[i, j] = np.nan if verdict == "ok" else 6.0  # an open side: drawn as wide
                line.append(verdict)
        labels.append(line)
    by = profiles["by"]
    return _heat_map(values, labels, [f"without {g['group']}" for g in groups], names,
                     colour_label="log2 of the interval's widening", centre=0.0,
                     alt=f"group x parameter: each parameter's verdict and interval widening without each {by}")  # fmt: skip


def _family_map(families: dict[str, Any]) -> str:
    groups = [g for g in families["groups"] if g.get("error") is None][:MAX_ROWS]
    listed = families["families"][:MAX_FAMILIES]
    if not groups or not listed:
        return ""
    threshold = float(families["threshold"])
    values = np.full((len(groups), len(listed)), np.nan)
    labels: list[list[str]] = []
    for i, group in enumerate(groups):
        line = []
        for j, family in enumerate(listed):
            cell = group["families"].get(str(family["id"])) or {}
            delta = cell.get("delta")
            if delta is None:
                line.append("-")
                continue
            values[i, j] = min(float(delta) / threshold, 3.0)
            line.append("fits" if cell.get("fits") else f"+{delta:.3g}")
        labels.append(line)
    columns = [f"family {f['id']}{' (kept)' if f['kept'] else ''}" for f in listed]
    return _heat_map(values, labels, [f"without {g['group']}" for g in groups], columns,
                     colour_label="above the best / threshold", centre=1.0, limits=(0.0, 1.0, 3.0),
                     alt=f"group x family: which families fit without each {families['by']}")  # fmt: skip


def deciding_section(catalog: Ledger) -> str:
    """Give the section on which data decide: the newest sensitivity run with profiles or
    ensembles by group, as heat maps with their plain-words conclusions."""
    found = [e for e in catalog.events() if e["kind"] == "sensitivity"
             and (e["payload"].get("result", {}).get("profiles")
                  or e["payload"].get("result", {}).get("families"))]  # fmt: skip
    head = '<section id="deciding"><h2>Which data decide</h2>'
    if not found:
        return (head + "<p>No sensitivity run with <code>--profiles</code> or "
                "<code>--ensemble</code> recorded yet.</p></section>")  # fmt: skip
    event = found[-1]
    result = event["payload"]["result"]
    parts = [head, f'<p class="note">Sensitivity run of {event["at"][:19].replace("T", " ")}, '
             f"without each {result['by']}. These are the same refits the run printed; a matrix "
             "shows what the data allow under this model and these weights, not which answer is "
             "right.</p>"]  # fmt: skip
    profiles, families = result.get("profiles"), result.get("families")
    if profiles:
        parts.append("<h3>Which parameters each group identifies</h3>")
        parts.append(_parameter_map(profiles))
        parts.append('<p class="note">Each cell: the verdict without the group (ok: identifiable, '
                     "open: a side stays below the threshold, flat: not identified at all) and how "
                     "many times wider the interval is than with all the data (red: wider).</p>")  # fmt: skip
        parts += [f"<p>{html.escape(c)}</p>" for c in profiles.get("conclusions", [])]
    if families:
        parts.append("<h3>Which families of good fits each group allows</h3>")
        parts.append(_family_map(families))
        parts.append(f'<p class="note">Each cell: whether the family fits without the group '
                     f"(within {float(families['threshold']):.3g} of the best refit) or how far "
                     f"above the best it lies; - where no refit reached it ({families.get('starts')} "
                     f"starts, seed {families.get('seed')}).</p>")  # fmt: skip
        parts += [f"<p>{html.escape(c)}</p>" for c in families.get("conclusions", [])]
    parts.append("</section>")
    return "".join(parts)
