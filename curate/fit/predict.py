"""Predictions with an ensemble: the band of the kept fits at new conditions, and which group
(dataset, lab, condition value) the band rests on.

Every fit the ensemble keeps (within the likelihood-ratio threshold of the best) predicts the
new points; the band is their pointwise minimum and maximum, with the median. For each group the
ensemble is refitted without it, warm-started from the full run (:mod:`curate.fit.families`),
and the fits kept without it give a band of their own: the group whose absence moves the band's
edges most (measured against the data's typical sd) is the one the prediction rests on, and a
group without which the data left no longer determine some parameters is named with them. The band covers the spread between good fits, not the
measurement noise of a new experiment, and it is the model's output before any scale factor
(relative-unit data are fitted with a closed-form factor per calibration group).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit.engine import FitOptions
from curate.fit.engine import jacobian as fitting_jacobian
from curate.fit.ensemble import EnsembleResult
from curate.fit.families import refit_without
from curate.fit.problem import FitProblem
from curate.fit.sensitivity import small_directions

__all__ = ["PredictionBand", "band_of", "prediction_band", "typical_sd", "undetermined"]


def band_of(problem: FitProblem, thetas: list[np.ndarray], points: pd.DataFrame) -> np.ndarray:
    """Give each fit's predictions of ``points`` (one row per fit)."""
    rows = []
    for theta in thetas:
        try:
            values = problem.backend.predict(problem.to_natural(theta), points)
        except KeyError as err:
            raise InputError(
                f"the model reads column {err} that the new points lack: give it with "
                f"--conditions {str(err).strip(chr(39))}=VALUE"
            ) from None
        values = np.asarray(values, dtype=float)
        if values.shape != (len(points),):
            raise InputError(f"the model gave {values.shape} values for {len(points)} new points")
        rows.append(values)
    return np.array(rows)


def _summary(predictions: np.ndarray) -> dict[str, np.ndarray]:
    finite = np.where(np.isfinite(predictions), predictions, np.nan)
    return {"lower": np.nanmin(finite, axis=0), "median": np.nanmedian(finite, axis=0),
            "upper": np.nanmax(finite, axis=0)}  # fmt: skip


@dataclass
class PredictionBand:
    """The kept fits' band at the new points, and each group's band without it."""

    points: pd.DataFrame  # the new points (time and conditions)
    fits: int
    lower: np.ndarray
    median: np.ndarray
    upper: np.ndarray
    by: str
    groups: list[dict[str, Any]] = field(default_factory=list)
    conclusions: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    units: dict[str, str] = field(default_factory=dict)  # condition column -> its unit

    @property
    def width(self) -> np.ndarray:
        """Give the band's width at each new point."""
        return np.asarray(self.upper - self.lower, dtype=float)

    def rests_on(self) -> dict[str, Any] | None:
        """Give the group whose absence moves the band most (None if no group was refitted):
        its ``moves`` is the largest change of the band's edges, ``widening`` the mean ratio of
        the widths (the full band's width floored at a tenth of the data's typical sd)."""
        ranked = [g for g in self.groups if g.get("moves") is not None]
        if not ranked:
            return None
        top = max(ranked, key=lambda g: (g["moves"], g["widening"] or 0.0))
        return {"group": top["group"], "moves": top["moves"], "widening": top["widening"]}

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"points", "fits", "time_unit", "units", "band": [{"time", ..., "lower", "median",
        "upper"}], "by", "groups", "rests_on", "conclusions", "notes"}`` (times in seconds, the
        catalog's unit; conditions in the data's units)."""
        band = []
        for k, row in enumerate(self.points.to_dict("records")):
            band.append({**row, "lower": float(self.lower[k]), "median": float(self.median[k]),
                         "upper": float(self.upper[k])})  # fmt: skip
        return {"points": len(self.points), "fits": self.fits, "time_unit": "s",
                "units": self.units, "band": band,
                "by": self.by,
                "groups": self.groups, "rests_on": self.rests_on(),
                "conclusions": self.conclusions, "notes": self.notes}  # fmt: skip


def _widening(width: np.ndarray, base: np.ndarray) -> float | None:
    usable = np.isfinite(width) & np.isfinite(base) & (base > 0)
    if not usable.any():
        return None
    return float(np.mean(width[usable] / base[usable]))


def typical_sd(problem: FitProblem) -> float:
    """Give the median sd (1 / sqrt(weight)) of the fitted points in absolute units (all points
    if every one is relative): the yardstick of how far a band moves."""
    points = problem.points
    weight = points["weight"].to_numpy(dtype=float)
    usable = weight > 0
    if "relative" in points and not points["relative"].all():
        usable &= ~points["relative"].to_numpy(dtype=bool)
    if not usable.any():
        return 0.0
    return float(np.median(1.0 / np.sqrt(weight[usable])))


def undetermined(problem: FitProblem, jacobian: np.ndarray | None, keep: np.ndarray,
                 already: int | None = None) -> list[str]:  # fmt: skip
    """Give the parameters the rows ``keep`` barely determine at the best fit (directions of
    the scaled Jacobian lost beyond those lost with all the data), as the sensitivity check
    names them; ``already``: the directions lost with all the data, if counted before)."""
    if jacobian is None:
        return []
    rows = problem.residual_index(np.flatnonzero(keep))
    lost, weights = small_directions(jacobian, rows)
    if already is None:
        already = small_directions(jacobian, np.arange(len(jacobian)))[0]
    if lost <= already:
        return []
    names = [p.name for p in problem.free]
    shares = weights[: lost - already].sum(axis=0)
    return [n for n, w in zip(names, shares, strict=True) if w > 0.1]


def _conclusions(result: PredictionBand, by: str, noise: float) -> list[str]:
    said = []
    for group in result.groups:
        if group.get("undetermined"):
            said.append(f"without {by} {group['group']}, the data left do not determine "
                        f"{', '.join(group['undetermined'])}: its band there is the model's guess")  # fmt: skip
    top = result.rests_on()
    if top is None:
        return said
    sds = top["moves"] / noise if noise > 0 else math.inf
    if sds > 0.5:
        widening = top["widening"]
        wider = f" and x{widening:.2f} as wide" if widening is not None and widening > 1.0 else ""
        said.append(f"the prediction rests most on {by} {top['group']}: without it the band "
                    f"moves by up to {top['moves']:.3g} ({sds:.1f} x the data's typical sd "
                    f"{noise:.3g}){wider}")  # fmt: skip
    else:
        said.append(f"leaving out any one {by} moves the band by at most {top['moves']:.3g}, "
                    f"under half the data's typical sd ({noise:.3g})")  # fmt: skip
    return said


def prediction_band(
    problem: FitProblem,
    full: EnsembleResult,
    points: pd.DataFrame,
    labels: np.ndarray | None,
    *,
    by: str,
    options: FitOptions | None = None,
    workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
) -> PredictionBand:
    """Give the kept fits' band at ``points`` and, with ``labels``, each group's band without it."""
    options = options or FitOptions()
    thetas = list(full.kept_theta)
    predictions = band_of(problem, thetas, points)
    summary = _summary(predictions)
    result = PredictionBand(points=points.reset_index(drop=True), fits=len(thetas), by=by,
                            lower=summary["lower"], median=summary["median"],
                            upper=summary["upper"])  # fmt: skip
    base = result.width
    noise = typical_sd(problem)
    floor = 0.1 * noise if noise > 0 else 0.0
    if len(thetas) == 1:
        result.notes.append("one fit only is within the threshold: the band has no width")
    elif noise > 0 and float(np.nanmax(base)) < floor:
        result.notes.append(
            f"the {len(thetas)} kept fits agree here to within a tenth of the data's typical sd "
            f"({noise:.3g}): the band has no width to speak of"
        )
    if labels is None:
        return result
    text = labels.astype(str)
    groups = [str(g) for g in dict.fromkeys(text.tolist())]
    jacobian = fitting_jacobian(problem, full.clusters[0].best) if full.clusters else None
    lost_with_all = (
        small_directions(jacobian, np.arange(len(jacobian)))[0] if jacobian is not None else 0
    )
    for done, group in enumerate(groups):
        if progress is not None:
            progress(done, len(groups))
        keep = text != group
        entry: dict[str, Any] = {"group": group, "n_points": int((~keep).sum())}
        try:
            refitted = refit_without(problem, keep, full, options, workers)
        except InputError as err:
            entry.update(error=str(err).splitlines()[0], widening=None, moves=None)
            result.groups.append(entry)
            continue
        kept = [refitted.thetas[k] for k in refitted.kept(full.threshold)]
        without = _summary(band_of(refitted.problem, [t for t in kept if t is not None], points))
        width = without["upper"] - without["lower"]
        scale = np.maximum(base, floor) if floor > 0 else base
        widening = _widening(width, scale)
        moved = np.maximum(np.abs(without["lower"] - result.lower),
                           np.abs(without["upper"] - result.upper))  # fmt: skip
        entry.update(fits=len(kept), widening=widening,
                     moves=float(np.nanmax(moved)) if np.isfinite(moved).any() else None,
                     median=without["median"].tolist(),
                     lower=without["lower"].tolist(), upper=without["upper"].tolist(),
                     max_widening=None if widening is None else float(np.nanmax(
                         np.where(scale > 0, width / np.where(scale > 0, scale, 1.0), np.nan))),
                     undetermined=undetermined(problem, jacobian, keep, lost_with_all))  # fmt: skip
        result.groups.append(entry)
    if progress is not None:
        progress(len(groups), len(groups))
    result.conclusions += _conclusions(result, by, noise)
    return result
