"""The points a prediction is asked for: times and conditions, in the catalog's canonical units.

A condition is given as ``KEY=VALUE`` with its unit (``dose=5uM``, ``temperature=33degC``) and
converted to the unit the selection's datasets hold it in; a bare number for a condition the
data give with a unit is refused (a dose of 5 could be nM or uM). A condition the selection
holds at one value only may be left out (that value is used, and a note says so); one the data
vary must be given. Times are numbers in ``time_unit``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from curate import units
from curate.errors import InputError, UnitError
from curate.ingest.files import parse_condition
from curate.records import DatasetVersion
from curate.weighting.table import condition_column

__all__ = ["new_points", "parse_times"]


def parse_times(given: Sequence[str]) -> list[float]:
    """Give the times of repeated or comma-separated ``--times`` values."""
    times: list[float] = []
    for item in given:
        for piece in str(item).split(","):
            piece = piece.strip()
            if not piece:
                continue
            try:
                value = float(piece)
            except ValueError:
                raise InputError(
                    f"--times '{piece}': expected a number (the unit goes in --time-unit)"
                ) from None
            if not math.isfinite(value) or value < 0:
                raise InputError(f"--times {piece}: expected a finite time >= 0")
            times.append(value)
    if not times:
        raise InputError("--times: give at least one time, e.g. --times 0,10,30,60")
    return times


def _held(versions: Sequence[DatasetVersion]) -> dict[str, list[Any]]:
    held: dict[str, list[Any]] = {}
    for version in versions:
        for key, condition in version.record.conditions.items():
            held.setdefault(key, []).append(condition)
    return held


def new_points(
    versions: Sequence[DatasetVersion],
    conditions: dict[str, str],
    times: Sequence[float],
    *,
    time_unit: str = "s",
    observable: str | None = None,
    last_time: float | None = None,
) -> tuple[pd.DataFrame, list[str]]:
    """Give the new points (time in seconds, one column per condition) and notes."""
    try:
        unit = units.canonical_unit(time_unit, role="--time-unit", dimension="[time]")
    except UnitError as err:
        raise InputError(str(err)) from None
    seconds = units.convert(np.asarray(times, dtype=float), unit)
    held = _held(versions)
    columns: dict[str, Any] = {"time": seconds}
    notes: list[str] = []
    shown: dict[str, str] = {}  # column -> the unit its values are in
    for key, raw in conditions.items():
        if key not in held:
            known = ", ".join(sorted(held)) or "none"
            raise InputError(
                f"--conditions {key}={raw}: no dataset of the selection has condition '{key}' "
                f"(they have: {known})"
            )
        value = parse_condition(key, raw, origin="--conditions")
        data_units = {c.unit for c in held[key] if c.unit}
        if data_units:
            expected = sorted(data_units)[0]
            if value.unit is None:
                raise InputError(
                    f"--conditions {key}={raw}: give a unit; the data hold {key} in "
                    f"{units.short_unit(expected)} (e.g. {key}={raw}{units.short_unit(expected)})"
                )
            if value.unit != expected:
                raise InputError(
                    f"--conditions {key}={raw}: {units.short_unit(value.unit)} is not a unit of "
                    f"{key}; the data hold it in {units.short_unit(expected)}"
                )
        columns[condition_column(key)] = value.value
        if value.unit:
            shown[condition_column(key)] = units.short_unit(value.unit)
    for key, values in held.items():
        if key in conditions:
            continue
        distinct = {str(v.value) for v in values}
        if len(distinct) > 1:
            raise InputError(
                f"--conditions: the data vary in '{key}' ({', '.join(sorted(distinct)[:4])}); "
                f"give its value, e.g. --conditions {key}=VALUE"
            )
        columns[condition_column(key)] = values[0].value
        if values[0].unit:
            shown[condition_column(key)] = units.short_unit(values[0].unit)
        notes.append(f"condition {key} is {units.condition_text(values[0])} in every dataset "
                     "of the selection; the prediction uses it")  # fmt: skip
    if observable is not None:
        columns["observable"] = observable
    notes += _outside(held, conditions, columns, last_time, seconds)
    frame = pd.DataFrame(columns)
    frame.attrs["units"] = shown
    return frame, notes


def _outside(held: dict[str, list[Any]], conditions: dict[str, str], columns: dict[str, Any],
             last: float | None, seconds: np.ndarray) -> list[str]:  # fmt: skip
    """Say where a prediction leaves the measured range: a numeric condition outside the
    values the data hold, times after the last measured one."""
    said = []
    for key in conditions:
        measured = [float(c.value) for c in held[key] if isinstance(c.value, int | float)]
        value = columns[condition_column(key)]
        if (
            measured
            and isinstance(value, int | float)
            and not min(measured) <= value <= max(measured)
        ):
            unit = next((c.unit for c in held[key] if c.unit), None)
            shown = f" {units.short_unit(unit)}" if unit else ""
            said.append(f"{key} {value:g}{shown} lies outside the measured {min(measured):g} to "
                        f"{max(measured):g}{shown}: the band there rests on the model, which no "
                        "leave-one-out can test")  # fmt: skip
    if last is not None and float(np.max(seconds)) > last:
        said.append(f"times after {last:g} s, the last measured, are extrapolated by the model")
    return said
