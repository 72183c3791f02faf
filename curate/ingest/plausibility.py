"""Plausibility checks at intake: damage that happens before any fit, flagged, never fixed.

Each check looks for one known way data goes wrong between the instrument and the fitter and
returns warnings; nothing here changes a value. The thresholds are common practice with no
single published source, chosen to catch decade-sized slips while leaving ordinary biological
variation (a few-fold) alone.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from curate.records import PlausibilityWarning, UncertaintyType
from curate.units import short_unit

__all__ = ["Neighbour", "check_against_others", "check_series", "typical_magnitude"]

# a "unit slip" is a jump of about 10^3 (or 10^6): within a quarter decade of it
_SLIP_DECADES = (3.0, 6.0)
_SLIP_TOLERANCE = 0.35
_FAR_DECADES = 2.5  # beyond this, a whole series far from its neighbours is named anyway
_ROUND_STEPS = (1.0, 2.0, 2.5, 5.0)


def typical_magnitude(value: np.ndarray) -> float:
    """Give the median absolute value of a series (0 when every value is 0)."""
    return float(np.median(np.abs(value))) if len(value) else 0.0


def _points(indices: Iterable[int], time: np.ndarray | None, unit: str, limit: int = 5) -> str:
    """Name points by their time ('t = 0, 5 min'), or by number when no times are known."""
    chosen = list(indices)
    if time is None:
        items = [str(i + 1) for i in chosen]
        prefix, suffix = "points ", ""
    else:
        items = [f"{float(time[i]):g}" for i in chosen]
        prefix, suffix = "t = ", f" {unit}" if unit else ""
    shown = ", ".join(items[:limit])
    more = f" and {len(items) - limit} more" if len(items) > limit else ""
    return prefix + shown + suffix + more


def _is_round(x: float) -> bool:
    if x <= 0 or not np.isfinite(x):
        return False
    mantissa = float(f"{x:.12e}".split("e")[0])  # text keeps subnormal numbers exact
    return any(abs(mantissa - step) <= 1e-9 * step for step in (*_ROUND_STEPS, 10.0))


def check_series(
    value: np.ndarray,
    sd: np.ndarray | None,
    *,
    uncertainty: UncertaintyType | None,
    nonnegative: bool,
    time: np.ndarray | None = None,
    time_unit: str = "",
    replicates: bool = False,
    sd_as_given: np.ndarray | None = None,
    sd_unit: str = "",
) -> list[PlausibilityWarning]:
    """Give the warnings about one series on its own (time-sorted).

    ``sd_as_given`` (in ``sd_unit``, before any unit conversion) is what the round-number check
    reads: 0.02 um/min is round as the lab wrote it, not as 3.33e-4 um/s.

    ``nonnegative``: the quantity cannot be below zero (a concentration, a length). ``time``
    (in ``time_unit``, as the lab gave it) names the points in the messages; ``replicates``
    says whether a replicate column labels repeated times.
    """
    warnings: list[PlausibilityWarning] = []
    if time is not None:
        warnings += _times(time, time_unit, replicates=replicates)
    warnings += _unit_slip(value, sd, time, time_unit)
    # baseline noise dips a little below zero; a log-transformed or offset series goes well below
    spread = float(np.max(np.abs(value))) if len(value) else 0.0
    if nonnegative and len(value) and (np.mean(value < 0) > 0.25 or (value < -0.1 * spread).any()):
        negatives = np.flatnonzero(value < 0)
        within_log_range = bool(np.all(np.abs(value) < 12))
        warnings.append(
            PlausibilityWarning(
                code="negative_values",
                message=f"{len(negatives)} negative value(s) for a quantity that cannot be negative"
                f" ({_points(negatives, time, time_unit)})"
                + ("; the values may already be log-transformed" if within_log_range else ""),
            )
        )
    if sd is not None:
        known = sd[np.isfinite(sd)]
        zero = np.flatnonzero(sd == 0)
        if len(zero):
            warnings.append(
                PlausibilityWarning(
                    code="zero_sd",
                    message=f"uncertainty exactly 0 at {len(zero)} point(s)"
                    f" ({_points(zero, time, time_unit)}); "
                    "a zero sd would give an infinite weight",
                )
            )
        written = known if sd_as_given is None else np.asarray(sd_as_given, dtype=float)
        written = written[np.isfinite(written)]
        distinct = np.unique(written[written > 0])
        if len(known) >= 5 and 1 <= len(distinct) <= 2 and all(_is_round(x) for x in distinct):
            shown = " or ".join(f"{x:g}" for x in distinct) + (f" {sd_unit}" if sd_unit else "")
            warnings.append(
                PlausibilityWarning(
                    code="round_uncertainty",
                    message=f"every uncertainty is the round number {shown}: it looks assumed "
                    "rather than measured",
                )
            )
        finite = np.isfinite(sd) & (np.abs(value) > 0)
        if (
            uncertainty in (UncertaintyType.SD, UncertaintyType.SEM, None)
            and finite.sum() >= 3
            and len(distinct) <= 2
            and np.mean(sd[finite] > np.abs(value[finite])) > 0.5
            and all(_is_round(x) and 1 <= x <= 50 for x in distinct)
        ):
            warnings.append(
                PlausibilityWarning(
                    code="percent_as_absolute",
                    message="the uncertainty is a constant round number larger than most values: "
                    "a percentage may have been entered as an absolute sd",
                )
            )
    return warnings


def _times(time: np.ndarray, unit: str, *, replicates: bool) -> list[PlausibilityWarning]:
    """Note times before zero (a pre-stimulus baseline) and repeats without replicate labels.

    Both are legitimate and kept; the notes say so, because not every fitter takes them (a
    PEtab 1 simulation starts at t = 0).
    """
    warnings = []
    before = np.flatnonzero(time < 0)
    if len(before):
        warnings.append(
            PlausibilityWarning(
                code="negative_times",
                message=f"{len(before)} point(s) before t = 0 ({_points(before, time, unit)}): "
                "kept as a baseline before the start; a PEtab export refuses them",
            )
        )
    if not replicates and len(time) > 1:
        repeated = np.flatnonzero(np.r_[False, time[1:] == time[:-1]])
        if len(repeated):
            distinct = np.unique(time[repeated])
            first = [int(np.searchsorted(time, t)) for t in distinct]
            warnings.append(
                PlausibilityWarning(
                    code="repeated_times",
                    message=f"{len(distinct)} time(s) occur more than once without a replicate "
                    f"column ({_points(first, time, unit)}): kept as unlabelled replicates",
                )
            )
    return warnings


def _near_zero(value: np.ndarray, sd: np.ndarray | None) -> np.ndarray:
    """Tell which points cannot be told from zero: within 3 sd of it, or within three times
    the deepest dip below zero (which shows the baseline noise of a nonnegative signal)."""
    near = np.zeros(len(value), dtype=bool)
    if sd is not None:
        known = np.isfinite(sd)
        near[known] = np.abs(value[known]) <= 3.0 * sd[known]
    dips = value[value < 0]
    if len(dips):
        near |= np.abs(value) <= 3.0 * float(np.max(np.abs(dips)))
    return near


def _unit_slip(
    value: np.ndarray, sd: np.ndarray | None, time: np.ndarray | None, time_unit: str
) -> list[PlausibilityWarning]:
    """Flag a block of points about 10^3 (or 10^6) times the rest of the series.

    Points that cannot be told from zero are left out: on a log scale a baseline near zero
    looks like anything. So a block far *below* the rest counts only where a reported sd
    shows it to be well above zero; without one it is indistinguishable from a baseline.
    """
    judged = (np.abs(value) > 0) & ~_near_zero(value, sd)
    if judged.sum() < 4:
        return []
    logs = np.log10(np.abs(value[judged]))
    indices = np.flatnonzero(judged)
    reference = np.median(logs)
    deviation = np.abs(logs - reference)
    below = logs < reference
    has_sd = np.zeros(len(logs), dtype=bool) if sd is None else np.isfinite(sd[indices])
    for decades in _SLIP_DECADES:
        slipped = (np.abs(deviation - decades) < _SLIP_TOLERANCE) & (~below | has_sd)
        # a block of slipped values, not the whole series (a whole series is judged against
        # other datasets instead) and not a smooth rise through the decades
        if 0 < slipped.sum() < len(logs) / 2:
            rest = ~slipped & (deviation < decades / 3)
            if rest.sum() >= 2:
                where = _points(indices[slipped], time, time_unit)
                where = where.removeprefix("points ") if time is None else f"at {where}"
                return [
                    PlausibilityWarning(
                        code="unit_slip",
                        message=f"point(s) {where} are "
                        f"about 10^{decades:g} times "
                        f"{'smaller than ' if below[slipped].all() else ''}"
                        "the rest of the series: a unit slip in part of the data?",
                    )
                ]
    return []


@dataclass(frozen=True)
class Neighbour:
    """What intake knows of another dataset of the same observable."""

    dataset_id: str
    observable: str
    unit: str
    conditions: str  # canonical JSON of the conditions
    lab: str
    content_hash: str
    magnitude: float


def check_against_others(
    *,
    observable: str,
    unit: str,
    relative: bool,
    conditions: str,
    content_hash: str,
    magnitude: float,
    others: Iterable[Neighbour] = (),
    same_content: Iterable[Neighbour] | None = None,
    others_level: float | None = None,
    lab: str | None = None,
) -> list[PlausibilityWarning]:
    """Give the warnings from comparing a new series with the catalog's other datasets.

    Either ``others`` (every other dataset) or, for large catalogs, the pre-indexed
    ``same_content`` (datasets with the same content hash) and ``others_level`` (the median
    typical value of the other datasets of this observable and unit).
    """
    warnings: list[PlausibilityWarning] = []
    if same_content is None:
        others = list(others)
        same_content = [o for o in others if o.content_hash == content_hash]
        levels = [
            o.magnitude
            for o in others
            if o.observable == observable and o.unit == unit and o.magnitude > 0
        ]
        others_level = float(np.median(levels)) if levels else None
    for other in same_content:
        if other.conditions != conditions or other.observable != observable:
            warnings.append(
                PlausibilityWarning(
                    code="identical_to_other",
                    message=f"values identical to dataset {other.dataset_id}, which was logged"
                    " under other conditions or another observable: copied by mistake?",
                )
            )
        elif lab is not None and other.lab != lab:
            # two labs never measure the same numbers to the last digit
            warnings.append(
                PlausibilityWarning(
                    code="identical_to_other",
                    message=f"values identical to dataset {other.dataset_id} of {other.lab}: "
                    "the same measurement logged under two labs?",
                )
            )
    if relative or magnitude <= 0 or not others_level:
        return warnings
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        ratio = float(np.log10(magnitude) - np.log10(others_level))
    if not np.isfinite(ratio):
        return warnings
    for decades in _SLIP_DECADES:
        if abs(abs(ratio) - decades) < _SLIP_TOLERANCE:
            warnings.append(
                PlausibilityWarning(
                    code="magnitude_vs_others",
                    message=f"typical value {magnitude:.3g} {short_unit(unit)} is about 10^{decades:g} "
                    f"times {'larger' if ratio > 0 else 'smaller'} than the other {observable} "
                    f"datasets ({others_level:.3g} {short_unit(unit)}): a unit slip?",
                )
            )
            break
    else:
        if others_level > 20 and magnitude < 12:
            for base, name in ((10.0, "log10"), (np.e, "ln")):
                if abs(magnitude - np.log(others_level) / np.log(base)) < 0.25 * magnitude + 0.1:
                    warnings.append(
                        PlausibilityWarning(
                            code="looks_log_transformed",
                            message=f"typical value {magnitude:.3g} is close to the {name} of the "
                            f"other {observable} datasets' typical value ({others_level:.3g}): "
                            "already log-transformed?",
                        )
                    )
                    break
        if not warnings and abs(ratio) >= _FAR_DECADES:
            # no known slip factor, but orders of magnitude away from its neighbours: a unit
            # that converts correctly yet was not the one meant (furlongs for micrometres)
            warnings.append(
                PlausibilityWarning(
                    code="magnitude_vs_others",
                    message=f"typical value {magnitude:.3g} {short_unit(unit)} is about "
                    f"10^{abs(ratio):.0f} times {'larger' if ratio > 0 else 'smaller'} than the "
                    f"other {observable} datasets ({others_level:.3g} {short_unit(unit)}): the "
                    "wrong unit?",
                )
            )
    return warnings
