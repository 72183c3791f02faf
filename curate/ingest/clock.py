"""Times written as clock times or durations, turned into numbers in the stated time unit.

A time column may hold, instead of numbers:

- dates with times (a workbook's date cells; text ``2026-05-04 10:15:00`` or ISO 8601
  ``2026-05-04T10:15:00``): clock times, read as the time elapsed since the first row's;
- times of day (a workbook's time cells, given by the readers as ISO 8601 ``T10:15:00``): clock
  times too, elapsed since the first row's; a clock that goes back (past midnight) is refused;
- durations (a workbook's duration cells; text ``h:mm`` or ``h:mm:ss[.fff]`` such as
  ``0:15:00`` or ``1:30``): taken as they are written, ``1:30`` being 1 h 30 min as spreadsheet
  programs read it (common practice; a CSV file has no cell types to say more).

Each kind is converted whole; a column mixing kinds (or numbers and times) is refused with the
first cell of another kind. What was converted is said in the dataset's provenance.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Callable

import numpy as np

from curate import units
from curate.errors import InputError

__all__ = ["times_in_unit"]

_DURATION = re.compile(r"^(?P<sign>[+-]?)(?P<h>\d+):(?P<m>\d{1,2})(?::(?P<s>\d{1,2}(?:\.\d+)?))?$")
_TIME_OF_DAY = re.compile(r"^T(?P<h>\d{2}):(?P<m>\d{2})(?::(?P<s>\d{2}(?:\.\d+)?))?$")
_DATE_TIME = re.compile(r"^\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?$")
_KINDS = {"duration": "a duration (h:mm:ss)", "time of day": "a time of day",
          "date and time": "a date with a time"}  # fmt: skip


def _kind(cell: str) -> str | None:
    if _DURATION.match(cell):
        return "duration"
    if _TIME_OF_DAY.match(cell):
        return "time of day"
    if _DATE_TIME.match(cell):
        return "date and time"
    return None


def times_in_unit(cells: np.ndarray, unit: str, locate: Callable[[int], str]
                  ) -> tuple[np.ndarray, str] | None:  # fmt: skip
    """Give the cells as numbers of ``unit`` with a note of the conversion, or None when the
    first cell is no clock time or duration (the column is read as numbers)."""
    if len(cells) == 0:
        return None
    first = _kind(str(cells[0]))
    if first is None:
        return None
    seconds = np.empty(len(cells), dtype=np.float64)
    origin: dt.datetime | None = None
    for index, raw in enumerate(cells):
        cell = str(raw)
        kind = _kind(cell)
        if kind != first:
            found = "empty" if not cell else f"'{cell}'"
            raise InputError(
                locate(index)
                + f"{found}, but the first time is {_KINDS[first]} ('{cells[0]}'); expected every "
                f"time as {_KINDS[first]} (or every time a number of '{unit}')"
            )
        if kind == "duration":
            found_duration = _DURATION.match(cell)
            assert found_duration is not None
            value = _clock_seconds(found_duration)
            if int(found_duration["m"]) > 59 or float(found_duration["s"] or 0) >= 60:
                raise InputError(locate(index) + f"'{cell}' is not h:mm:ss (minutes and seconds "
                                 "below 60); expected a duration such as 0:15:00")  # fmt: skip
            seconds[index] = -value if found_duration["sign"] == "-" else value
        elif kind == "time of day":
            found_time = _TIME_OF_DAY.match(cell)
            assert found_time is not None
            seconds[index] = _clock_seconds(found_time)
        else:
            try:
                stamp = dt.datetime.fromisoformat(cell)
            except ValueError:
                raise InputError(locate(index) + f"'{cell}' is not a date with a time") from None
            origin = origin or stamp
            seconds[index] = (stamp - origin).total_seconds()
    if first == "duration":
        note = "the times were durations (h:mm:ss), taken as written"
    elif first == "time of day":
        back = np.flatnonzero(np.diff(seconds) < 0)
        if len(back):
            index = int(back[0]) + 1
            raise InputError(
                locate(index)
                + f"the clock time '{str(cells[index]).lstrip('T')}' is before the one above it "
                "(past midnight?); give the times as dates with times, or as durations"
            )
        note = (f"the times were clock times (time of day), converted to elapsed time from the "
                f"first row's {str(cells[0]).lstrip('T')}")  # fmt: skip
        seconds = seconds - seconds[0]
    else:
        assert origin is not None
        note = (f"the times were clock times (dates with times), converted to elapsed time from "
                f"the first row's {origin.isoformat(sep=' ')}")  # fmt: skip
    return seconds / units.to_unit(1.0, unit, "s"), note


def _clock_seconds(found: re.Match[str]) -> float:
    return int(found["h"]) * 3600.0 + int(found["m"]) * 60.0 + float(found["s"] or 0)
