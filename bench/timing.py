"""The one way benchmarks time things: the median of repeated wall times."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from typing import Any


def median_time(function: Callable[[], Any], repeats: int) -> tuple[float, Any]:
    """Give the median wall time of ``repeats`` calls and the last result."""
    times, result = [], None
    for _ in range(repeats):
        started = time.perf_counter()
        result = function()
        times.append(time.perf_counter() - started)
    return statistics.median(times), result
