"""Point masks: which points of a series a person set aside, named by time (and replicate).

Pure: a record and its arrays in, the new tuple of masks out. A bare time is in the unit the
dataset's times were logged in; '30 min' names its own.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np

from curate import units
from curate.errors import InputError
from curate.records import DatasetRecord, PointMask, SeriesArrays

__all__ = ["mask_times"]


def _time_seconds(text: str, record: DatasetRecord, *, origin: str) -> float:
    """Give a --time as seconds: a bare number is in the unit the dataset's times were
    logged in; '30 min' names its own."""
    cleaned = str(text).strip()
    unit_text = record.time_unit_original
    try:
        number = float(cleaned)
    except ValueError:
        parsed = units.parse_quantity(cleaned, role="time")
        if parsed is None or parsed[1].dimensionality != "[time]":
            raise InputError(
                f"{origin}: --time '{text}' is not a time; give a number (in "
                f"{unit_text}, the unit the times were logged in) or a number with a time unit"
            ) from None
        return parsed[0]
    unit = units.canonical_unit(unit_text, role="time", dimension="[time]")
    return units.convert_scalar(number, unit)


def mask_times(
    record: DatasetRecord,
    arrays: SeriesArrays,
    times: Sequence[str],
    *,
    replicate: str | None,
    reason: str | None,
    actor: str,
    unmask: bool = False,
    now: dt.datetime | None = None,
    origin: str,
) -> tuple[PointMask, ...]:
    """Give the dataset's masks after masking (or unmasking) the points at ``times``.

    Refuses a time the dataset lacks (naming the nearest it has), a replicate it lacks, a time
    masked already (or, unmasking, not masked), and a mask without a reason.
    """
    if not times:
        raise InputError(f"{origin}: name at least one point with --time T")
    if not unmask and not (reason or "").strip():
        raise InputError(f"{origin}: a mask needs a reason (--reason TEXT)")
    labels = list(record.replicate_labels)
    if replicate is not None and replicate not in labels:
        have = ", ".join(labels) if labels else "none (the dataset has no replicates)"
        raise InputError(f"{origin}: no replicate '{replicate}'; the replicates are {have}")
    unit = units.canonical_unit(record.time_unit_original, role="time", dimension="[time]")
    per_unit = units.scale_factor(unit)
    masks = list(record.masks)
    now = now or dt.datetime.now(dt.UTC)
    for text in times:
        seconds = _time_seconds(text, record, origin=origin)
        at = np.isclose(arrays.time, seconds, rtol=1e-12, atol=1e-9)
        if not at.any():
            nearest = float(arrays.time[int(np.argmin(np.abs(arrays.time - seconds)))])
            raise InputError(
                f"{origin}: no point at time {text} ({seconds:g} s); the nearest is "
                f"{nearest / per_unit:g} {unit.original}"
            )
        seconds = float(arrays.time[int(np.argmax(at))])
        same = [m for m in masks if np.isclose(m.time, seconds, rtol=1e-12, atol=1e-9)
                and m.replicate in (None, replicate)]  # fmt: skip
        if unmask:
            if not same:
                raise InputError(f"{origin}: the points at time {text} are not masked")
            masks = [m for m in masks if m not in same]
            continue
        if same:
            raise InputError(
                f"{origin}: the points at time {text} are masked already ({same[0].reason})"
            )
        masks.append(
            PointMask(
                time=seconds, replicate=replicate, reason=str(reason), masked_by=actor,
                masked_at=now,
            )
        )  # fmt: skip
    return tuple(sorted(masks, key=lambda m: (m.time, m.replicate or "")))
