"""The report's sections on many good fits: the newest ensemble (waterfall of sorted objectives,
its families) and the newest profiles (each with its threshold), from the runs the catalog holds.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from curate.ledger import Ledger
from curate.present.html import figure_tag, pyplot, table_html

__all__ = ["ensemble_section", "profiles_section"]

MAX_PROFILES = 12  # panels drawn; the table lists every parameter


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
