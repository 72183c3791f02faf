"""Predictions with an ensemble: the band of the kept fits at new conditions, and which group
(dataset, lab, condition value) the band rests on.

Every fit the ensemble keeps (within the likelihood-ratio threshold of the best) predicts the
new points; the band is their pointwise minimum and maximum, with the median. For each group the
ensemble is refitted without it, warm-started from the full run (:mod:`curate.fit.families`),
and the fits kept without it give a band of their own: the group whose absence widens the band
most is the one the prediction rests on. The band covers the spread between good fits, not the
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
from curate.fit.ensemble import EnsembleResult
from curate.fit.families import refit_without
from curate.fit.problem import FitProblem

__all__ = ["PredictionBand", "band_of", "prediction_band"]


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

    @property
    def width(self) -> np.ndarray:
        """Give the band's width at each new point."""
        return np.asarray(self.upper - self.lower, dtype=float)

    def rests_on(self) -> dict[str, Any] | None:
        """Give the group whose absence widens the band most (None if none does)."""
        ranked = [g for g in self.groups if g.get("widening") is not None]
        if not ranked:
            return None
        top = max(ranked, key=lambda g: g["widening"])
        return {"group": top["group"], "widening": top["widening"]}

    def to_dict(self) -> dict[str, Any]:
        """Give ``{"points", "fits", "time_unit", "band": [{"time", ..., "lower", "median",
        "upper"}], "by", "groups", "rests_on", "conclusions", "notes"}`` (times in seconds, the
        catalog's unit; conditions in the data's units)."""
        band = []
        for k, row in enumerate(self.points.to_dict("records")):
            band.append({**row, "lower": float(self.lower[k]), "median": float(self.median[k]),
                         "upper": float(self.upper[k])})  # fmt: skip
        return {"points": len(self.points), "fits": self.fits, "time_unit": "s", "band": band,
                "by": self.by,
                "groups": self.groups, "rests_on": self.rests_on(),
                "conclusions": self.conclusions, "notes": self.notes}  # fmt: skip


def _widening(width: np.ndarray, base: np.ndarray) -> float | None:
    usable = np.isfinite(width) & np.isfinite(base) & (base > 0)
    if not usable.any():
        return None
    return float(np.mean(width[usable] / base[usable]))


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
    if len(thetas) == 1:
        result.notes.append("one fit only is within the threshold: the band has no width")
    if labels is None:
        return result
    text = labels.astype(str)
    groups = [str(g) for g in dict.fromkeys(text.tolist())]
    for done, group in enumerate(groups):
        if progress is not None:
            progress(done, len(groups))
        keep = text != group
        entry: dict[str, Any] = {"group": group, "n_points": int((~keep).sum())}
        try:
            refitted = refit_without(problem, keep, full, options, workers)
        except InputError as err:
            entry.update(error=str(err).splitlines()[0], widening=None)
            result.groups.append(entry)
            continue
        kept = [refitted.thetas[k] for k in refitted.kept(full.threshold)]
        without = _summary(band_of(refitted.problem, [t for t in kept if t is not None], points))
        width = without["upper"] - without["lower"]
        widening = _widening(width, base)
        entry.update(fits=len(kept), widening=widening,
                     lower=without["lower"].tolist(), upper=without["upper"].tolist(),
                     max_widening=None if widening is None else float(np.nanmax(
                         np.where(base > 0, width / np.where(base > 0, base, 1.0), np.nan))))  # fmt: skip
        result.groups.append(entry)
    if progress is not None:
        progress(len(groups), len(groups))
    top = result.rests_on()
    if top is not None and math.isfinite(top["widening"]):
        if top["widening"] > 1.0:
            result.conclusions.append(
                f"the prediction rests most on {by} {top['group']}: without it the band is "
                f"x{top['widening']:.2f} as wide on average"
            )
        else:
            result.conclusions.append(f"leaving out any one {by} does not widen the band")
    elif not np.any(base > 0):
        result.conclusions.append(
            "the band has no width with all the data, so no widening can be measured"
        )
    return result
