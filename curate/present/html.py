"""Self-contained HTML pages (plots embedded as PNG; nothing fetched to view them).

Plots use matplotlib's Agg backend. Grades are drawn in a scheme of our own that stays
distinguishable in grey scale: each grade has its own marker shape and a lightness step.
"""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path
from typing import Any

import numpy as np

from curate.export.files import write_text
from curate.fit.sensitivity import SensitivityResult

__all__ = [
    "GRADE_STYLE",
    "MAX_TABLE_ROWS",
    "column_extremes",
    "figure_tag",
    "page",
    "pyplot",
    "rows_note",
    "sensitivity_section",
    "table_html",
    "write_sensitivity_report",
]

# grade -> (colour, marker): dark to light as trust falls, each with its own shape
GRADE_STYLE = {
    "A": ("#1b3a5c", "o"),
    "B": ("#3f7f6e", "s"),
    "C": ("#b7852b", "^"),
    "D": ("#c0504d", "D"),
    "X": ("#8c8c8c", "x"),
    None: ("#6d5a8c", "v"),
}

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 2rem auto; max-width: 72rem;
       color: #1d232a; line-height: 1.45; padding: 0 1rem; }
h1 { font-size: 1.6rem; border-bottom: 3px solid #1b3a5c; padding-bottom: .3rem; }
h2 { font-size: 1.25rem; margin-top: 2.2rem; color: #1b3a5c; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .88rem; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid #d5dbe1; text-align: right; }
th { background: #eef2f5; } td:first-child, th:first-child { text-align: left; }
.flag { background: #fbe9e7; } .note { color: #4a5560; font-size: .9rem; }
.caution { border-left: 4px solid #b7852b; padding: .4rem .8rem; background: #fbf6ec; }
img { max-width: 100%; height: auto; } code { background: #eef2f5; padding: 0 .2rem; }
"""


# a table longer than this shows its first rows and says how many it left out; a shift plot
# draws at most this many groups
MAX_TABLE_ROWS = 200
MAX_PLOT_GROUPS = 40


def _largest_shift(group: Any) -> float:
    shifts = [abs(p.get("shift_se") or 0.0) for p in group.parameters.values()]
    return max(shifts, default=0.0)


def column_extremes(x: np.ndarray, y: np.ndarray, columns: int) -> np.ndarray:
    """Give the indices of the points to draw so that ``columns`` pixel columns look the same.

    The range of ``x`` is cut into ``columns`` equal bins (one per pixel column of the plot);
    each bin keeps the point of its smallest and of its largest ``y`` (the first one where
    several tie), in the order of ``x``. A pixel column shows a vertical line from its minimum
    to its maximum, so this min/max envelope draws what all points would, and keeps every
    extreme. Time and memory grow linearly with the number of points; short series come back
    whole.
    """
    n = len(x)
    if n <= 2 * columns:
        return np.arange(n)
    order = np.argsort(x, kind="stable")
    xs, ys = x[order], y[order]
    span = xs[-1] - xs[0]
    if span > 0:
        bins = np.minimum(((xs - xs[0]) / span * columns).astype(np.int64), columns - 1)
    else:
        bins = np.zeros(n, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, bins[1:] != bins[:-1]])
    counts = np.diff(np.r_[starts, n])
    kept = []
    for reduce in (np.minimum, np.maximum):
        extreme = np.repeat(reduce.reduceat(ys, starts), counts)
        hits = np.flatnonzero(ys == extreme)
        _, first = np.unique(bins[hits], return_index=True)
        kept.append(hits[first])
    return np.asarray(order[np.unique(np.concatenate(kept))])


def rows_note(shown: int, total: int, what: str, where: str) -> str:
    """Give the note under a cut table: how many rows it left out and where to see them."""
    if total <= shown:
        return ""
    return (
        f'<p class="note">{total - shown} more {html.escape(what)} not shown here '
        f"(the first {shown} of {total}); {html.escape(where)}.</p>"
    )


def figure_tag(figure: Any, alt: str) -> str:
    """Give an <img> with the figure embedded as a base64 PNG, and close the figure."""
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    plt.close(figure)
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def table_html(
    header: list[str], rows: list[list[Any]], *, flagged: list[bool] | None = None
) -> str:
    """Give an HTML table (cells escaped)."""
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = []
    for k, row in enumerate(rows):
        cls = ' class="flag"' if flagged and flagged[k] else ""
        body.append(
            f"<tr{cls}>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>"
        )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def page(title: str, sections: list[str]) -> str:
    """Give a whole HTML document."""
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta name="viewport" content="width=device-width, initial-scale=1"><title>{html.escape(title)}</title>'
        f"<style>{_CSS}</style></head><body><h1>{html.escape(title)}</h1>\n"
        + "\n".join(sections)
        + "\n</body></html>\n"
    )


def pyplot() -> Any:
    """Give matplotlib.pyplot on the Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def sensitivity_section(result: SensitivityResult) -> str:
    """Give the HTML of a sensitivity result: shift plot, SE comparison and tables."""
    plt = pyplot()
    full = result.full if isinstance(result.full, dict) else result.full.to_dict()
    names = list(full["parameters"])
    groups = [g for g in result.groups if g.error is None]
    plotted = len(groups)
    if len(groups) > MAX_PLOT_GROUPS:  # the groups that move the fit most; the table has all
        groups = sorted(groups, key=lambda g: -(g.cook_distance or _largest_shift(g)))[
            :MAX_PLOT_GROUPS
        ]
    parts = [f'<section id="sensitivity-{html.escape(result.by.replace(":", "-"))}"><h2>Leave one {html.escape(result.by)} out</h2>',
             f'<p class="note">Method: {html.escape(result.method)} ({html.escape(result.executor)}). Each point is a '
             f"parameter's shift, in full-fit standard errors, when that {html.escape(result.by)} is left out; dashed lines "
             f"mark the flag threshold of ±{result.shift_threshold:g} SE.</p>"]  # fmt: skip
    if groups and names:
        figure, axis = plt.subplots(figsize=(max(6, 0.9 * len(groups) + 3), 3.8))
        markers = ["o", "s", "^", "D", "v", "P", "X", "*"]
        width = 0.8 / max(len(names), 1)
        for k, name in enumerate(names):
            xs, ys = [], []
            for position, group in enumerate(groups):
                z = group.parameters.get(name, {}).get("shift_se")
                if z is not None:
                    xs.append(position - 0.4 + width * (k + 0.5))
                    ys.append(z)
            shade = 0.15 + 0.6 * k / max(len(names) - 1, 1)
            axis.scatter(xs, ys, marker=markers[k % len(markers)], color=(shade, shade, shade * 0.6 + 0.3), label=name,
                         edgecolors="black", linewidths=0.5, zorder=3)  # fmt: skip
        for sign in (1, -1):
            axis.axhline(
                sign * result.shift_threshold, color="#c0504d", linestyle="--", linewidth=1
            )
        axis.axhline(0, color="#555", linewidth=0.8)
        axis.set_xticks(range(len(groups)))
        axis.set_xticklabels([g.group for g in groups], rotation=35, ha="right", fontsize=8)
        axis.set_ylabel("shift (full-fit SE)")
        axis.legend(
            fontsize=8,
            ncol=min(len(names), 6),
            loc="upper left",
            bbox_to_anchor=(0, 1.18),
            frameon=False,
        )
        parts.append(figure_tag(figure, f"parameter shifts when each {result.by} is left out"))
        if plotted > len(groups):
            parts.append(f'<p class="note">Drawn: the {len(groups)} of {plotted} groups with the largest '
                         "Cook distance; the table lists every group.</p>")  # fmt: skip
        se_figure, se_axis = plt.subplots(figsize=(max(5, 0.8 * len(names) + 2), 3.2))
        asymptotic = [full["parameters"][n].get("stderr") or 0.0 for n in names]
        jack = [result.jackknife_stderr.get(n) or 0.0 for n in names]
        values = [abs(full["parameters"][n]["value"]) or 1.0 for n in names]
        positions = range(len(names))
        se_axis.bar([p - 0.2 for p in positions], [a / v for a, v in zip(asymptotic, values, strict=True)], 0.4,
                    label="asymptotic", color="#1b3a5c")  # fmt: skip
        se_axis.bar([p + 0.2 for p in positions], [j / v for j, v in zip(jack, values, strict=True)], 0.4,
                    label="jackknife", color="#b7b7b7", hatch="//", edgecolor="black")  # fmt: skip
        se_axis.set_xticks(list(positions))
        se_axis.set_xticklabels(names, fontsize=8)
        se_axis.set_ylabel("relative standard error")
        se_axis.legend(fontsize=8, frameon=False)
        parts.append("<h3>Standard errors: asymptotic against delete-one-group jackknife</h3>")
        parts.append(figure_tag(se_figure, "asymptotic and jackknife standard errors"))
        parts += [f'<p class="note">{html.escape(note)}</p>' for note in result.notes()]
    header = [
        f"without {result.by}",
        "points",
        *[f"{n} shift (SE)" for n in names],
        "Cook D",
        "held-out chi2 / dof",
        "notes",
    ]
    rows, flagged = [], []
    listed = result.groups
    if len(listed) > MAX_TABLE_ROWS:  # flagged groups first, then the rest in order
        listed = sorted(listed, key=lambda g: not g.flags)[:MAX_TABLE_ROWS]
    for group in listed:
        shifts = []
        for name in names:
            z = group.parameters.get(name, {}).get("shift_se")
            shifts.append("-" if z is None else f"{z:+.2f}")
        heldout = (
            f"{group.heldout_chi2:.1f} / {group.heldout_dof}"
            if group.heldout_chi2 is not None
            else "-"
        )
        cook = "-" if group.cook_distance is None else f"{group.cook_distance:.3g}"
        rows.append(
            [
                group.group,
                group.n_points,
                *shifts,
                cook,
                heldout,
                group.error or "; ".join(group.flags),
            ]
        )
        flagged.append(bool(group.flags))
    parts.append(table_html(header, rows, flagged=flagged))
    parts.append(rows_note(len(listed), len(result.groups), "groups (flagged ones first)",
                           "`curate sensitivity --json` gives them all"))  # fmt: skip
    flags = result.flags()
    if flags:
        parts.append("<p><strong>Conclusions that hinge on one group:</strong></p><ul>" +
                     "".join(f"<li>{html.escape(f)}</li>" for f in flags[:MAX_TABLE_ROWS]) + "</ul>"
                     + rows_note(min(len(flags), MAX_TABLE_ROWS), len(flags), "flags",
                                 "`curate sensitivity` prints them all"))  # fmt: skip
    elif result.unjudged():
        parts.append(
            f"<p>No flag, but {html.escape(', '.join(result.unjudged()))} could not be judged: the fit gave "
            "no standard error for them.</p>"
        )
    else:
        parts.append(
            f"<p>No parameter moves more than {result.shift_threshold:g} SE when any one {html.escape(result.by)} is left out.</p>"
        )
    parts.append('<p class="caution">A fit that does not move when one group is left out can still be wrong in '
                 "all of them together: this check is not proof.</p></section>")  # fmt: skip
    return "\n".join(parts)


def write_sensitivity_report(result: SensitivityResult, path: str | Path) -> str:
    """Write a standalone sensitivity report; give its sha256."""
    return write_text(
        Path(path),
        page("curate: sensitivity of the fit", [sensitivity_section(result)]),
        make_folders=False,
    )
