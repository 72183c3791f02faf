"""Benchmark case: intake of a 10,000-row workbook read by python-calamine against the same
intake read by openpyxl (pandas' own engine for .xlsx, curate's fallback reader).

Both build the whole draft (cells, merged-cell and formula scan of the sheet XML, numbers,
units, plausibility, hashes); only the cell reader differs. Run alone with
``python -m bench.workbook``.
"""

from __future__ import annotations

import datetime as dt
import functools
import tempfile
from pathlib import Path
from typing import Any
from unittest import mock

import numpy as np
import openpyxl

from bench.timing import median_time
from curate.ingest import build_draft, tables, workbook

OPTIONS = {"observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "min"},
           "source": {"lab": "Bench Lab"}}  # fmt: skip


def write_workbook(path: Path, rows: int) -> Path:
    """Write a workbook of ``rows`` data rows: a clock-time column, value, sd and a note."""
    rng = np.random.default_rng(7)
    book = openpyxl.Workbook(write_only=True)
    sheet = book.create_sheet("series")
    sheet.append(["Time", "value", "sd", "note"])
    start = dt.datetime(2026, 5, 4, 8, 0)
    values = rng.lognormal(0.0, 1.0, rows)
    for k in range(rows):
        sheet.append([start + dt.timedelta(seconds=30 * k), float(values[k]),
                      float(values[k]) * 0.1, f"well {k % 96}"])  # fmt: skip
    book.save(path)
    return path


def case_workbook_intake(folder: Path, rows: int, repeats: int) -> dict[str, Any]:
    """Time the intake of one workbook through calamine (ours) and openpyxl (the baseline)."""
    path = write_workbook(folder / "plate.xlsx", rows)

    def intake() -> Any:
        return build_draft(path, options=OPTIONS, actor="bench")

    ours_s, ours = median_time(intake, repeats)
    slower = functools.partial(workbook.read_sheet, engine="openpyxl")
    with mock.patch.object(tables, "read_sheet", slower):
        baseline_s, baseline = median_time(intake, repeats)
    assert ours.record.content_hash == baseline.record.content_hash  # the same data both ways
    return {"ratio": ours_s / baseline_s, "target": 0.3, "ours_s": ours_s,
            "baseline_s": baseline_s, "n": rows}  # fmt: skip


if __name__ == "__main__":
    with tempfile.TemporaryDirectory(prefix="curate-bench-") as name:
        found = case_workbook_intake(Path(name), 10_000, 3)
    print(f"workbook intake, {found['n']} rows: calamine {found['ours_s']:.3f} s, openpyxl "
          f"{found['baseline_s']:.3f} s, ratio {found['ratio']:.3f} (target {found['target']})")  # fmt: skip
