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

import re
from collections.abc import Callable

import numpy as np
import pandas as pd

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


_PATTERNS = {"duration": _DURATION, "time of day": _TIME_OF_DAY, "date and time": _DATE_TIME}


def times_in_unit(cells: np.ndarray, unit: str, locate: Callable[[int], str]
                  ) -> tuple[np.ndarray, str] | None:  # fmt: skip
    """Give the cells as numbers of ``unit`` with a note of the conversion, or None when the
    first cell is no clock time or duration (the column is read as numbers)."""
    if len(cells) == 0:
        return None
    first = _kind(str(cells[0]))
    if first is None:
        return None
    text = pd.Series(cells, dtype=object).astype(str)
    alike = text.str.match(_PATTERNS[first].pattern).to_numpy(dtype=bool)
    if not alike.all():
        index = int(np.argmin(alike))
        cell = str(cells[index])
        found = "empty" if not cell else f"'{cell}'"
        raise InputError(
            locate(index)
            + f"{found}, but the first time is {_KINDS[first]} ('{cells[0]}'); expected every "
            f"time as {_KINDS[first]} (or every time a number of '{unit}')"
        )
    if first == "date and time":
        stamps = pd.to_datetime(text, format="ISO8601", errors="coerce")
        bad = stamps.isna().to_numpy()
        if bad.any():
            index = int(np.argmax(bad))
            raise InputError(locate(index) + f"'{cells[index]}' is not a date with a time")
        seconds = ((stamps - stamps.iloc[0]) / pd.Timedelta(seconds=1)).to_numpy(dtype=np.float64)
        note = (f"the times were clock times (dates with times), converted to elapsed time from "
                f"the first row's {stamps.iloc[0].isoformat(sep=' ')}")  # fmt: skip
        return seconds / units.to_unit(1.0, unit, "s"), note
    parts = text.str.extract(_PATTERNS[first].pattern)
    hours = parts["h"].astype(np.float64).to_numpy()
    minutes = parts["m"].astype(np.float64).to_numpy()
    rest = parts["s"].fillna("0").astype(np.float64).to_numpy()
    over = (minutes > 59) | (rest >= 60)
    if over.any():
        index = int(np.argmax(over))
        raise InputError(locate(index) + f"'{cells[index]}' is not h:mm:ss (minutes and seconds "
                         "below 60); expected a duration such as 0:15:00")  # fmt: skip
    seconds = hours * 3600.0 + minutes * 60.0 + rest
    if first == "duration":
        seconds = np.where(parts["sign"].to_numpy() == "-", -seconds, seconds)
        note = "the times were durations (h:mm:ss), taken as written"
    else:
        back = np.flatnonzero(np.diff(seconds) < 0)
        if len(back):
            index = int(back[0]) + 1
            raise InputError(
                locate(index) + f"the clock time '{str(cells[index]).lstrip('T')}' is before "
                "the one above it (past midnight?); give the times as dates with times, or as "
                "durations"
            )
        note = (f"the times were clock times (time of day), converted to elapsed time from the "
                f"first row's {str(cells[0]).lstrip('T')}")  # fmt: skip
        seconds = seconds - seconds[0]
    return seconds / units.to_unit(1.0, unit, "s"), note
