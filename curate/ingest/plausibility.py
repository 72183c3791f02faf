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

__all__ = ["Neighbour", "check_against_others", "check_series", "typical_magnitude"]

# a "unit slip" is a jump of about 10^3 (or 10^6): within a quarter decade of it
_SLIP_DECADES = (3.0, 6.0)
_SLIP_TOLERANCE = 0.35
_ROUND_STEPS = (1.0, 2.0, 2.5, 5.0)


def typical_magnitude(value: np.ndarray) -> float:
    """Give the median absolute value of a series (0 when every value is 0)."""
    return float(np.median(np.abs(value))) if len(value) else 0.0


def _rows(indices: Iterable[int], limit: int = 5) -> str:
    items = [str(i + 1) for i in indices]
    shown = ", ".join(items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "")


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
) -> list[PlausibilityWarning]:
    """Give the warnings about one series on its own (points numbered from 1, time-sorted).

    ``nonnegative``: the quantity cannot be below zero (a concentration, a length).
    """
    warnings: list[PlausibilityWarning] = []
    warnings += _unit_slip(value)
    # baseline noise dips a little below zero; a log-transformed or offset series goes well below
    spread = float(np.max(np.abs(value))) if len(value) else 0.0
    if nonnegative and len(value) and (np.mean(value < 0) > 0.25 or (value < -0.1 * spread).any()):
        negatives = np.flatnonzero(value < 0)
        within_log_range = bool(np.all(np.abs(value) < 12))
        warnings.append(
            PlausibilityWarning(
                code="negative_values",
                message=f"{len(negatives)} negative value(s) for a quantity that cannot be negative"
                " "
                f"(points {_rows(negatives)})"
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
                    message=f"uncertainty exactly 0 at {len(zero)} point(s) (points {_rows(zero)});"
                    " "
                    "a zero sd would give an infinite weight",
                )
            )
        distinct = np.unique(known[known > 0])
        if len(known) >= 5 and 1 <= len(distinct) <= 2 and all(_is_round(x) for x in distinct):
            warnings.append(
                PlausibilityWarning(
                    code="round_uncertainty",
                    message="every uncertainty is the round number "
                    + " or ".join(f"{x:g}" for x in distinct)
                    + ": it looks assumed rather than measured",
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


def _unit_slip(value: np.ndarray) -> list[PlausibilityWarning]:
    positive = np.abs(value) > 0
    if positive.sum() < 4:
        return []
    logs = np.log10(np.abs(value[positive]))
    indices = np.flatnonzero(positive)
    reference = np.median(logs)
    deviation = np.abs(logs - reference)
    for decades in _SLIP_DECADES:
        slipped = np.abs(deviation - decades) < _SLIP_TOLERANCE
        # a block of slipped values, not the whole series (a whole series is judged against
        # other datasets instead) and not a smooth rise through the decades
        if 0 < slipped.sum() < len(logs) / 2:
            rest = ~slipped & (deviation < decades / 3)
            if rest.sum() >= 2:
                return [
                    PlausibilityWarning(
                        code="unit_slip",
                        message=f"point(s) {_rows(indices[slipped])} are about 10^{decades:g}"
                        " times "
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
                    message=f"typical value {magnitude:.3g} is about 10^{decades:g} times "
                    f"{'larger' if ratio > 0 else 'smaller'} than the other {observable} datasets "
                    f"({others_level:.3g} {unit}): a unit slip?",
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
    return warnings
