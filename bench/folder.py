"""Folder intake at scale: how `curate intake` grows with the number of files.

    python -m bench.folder [--quick]

Each size is a fresh folder of small CSV files with sidecars (one observable, eight labs, fifty
doses) logged into a fresh catalog; the baseline is reading the same files with
pandas.read_csv alone (parsing is the floor), timed in the same run. The case's ratio is the
scaling exponent: the slope of log(intake seconds) against log(number of files).
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import curate  # noqa: E402

POINTS_PER_FILE = 20


def write_folder(folder: Path, n_files: int, seed: int = 0) -> None:
    """Write ``n_files`` small CSV files with their sidecars into ``folder``."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True)
    t = np.arange(POINTS_PER_FILE) * 30.0
    for k in range(n_files):
        y = 20 * (1 - np.exp(-t / 900.0)) + rng.normal(0, 0.5, POINTS_PER_FILE)
        rows = "\n".join(f"{a:g},{b:.6g},0.5" for a, b in zip(t, y, strict=True))
        (folder / f"run_{k:05d}.csv").write_text("time,value,sd\n" + rows + "\n")
        (folder / f"run_{k:05d}.toml").write_text(
            'observable.id = "velarin_conc"\nobservable.unit = "nM"\ntime.unit = "s"\n'
            f'source.lab = "Lab {k % 8}"\n[conditions]\ndose = "{k % 50} nM"\n'
            'temperature = "37 degC"\n'
        )


def case_folder_scaling(folder: Path, sizes: list[int]) -> dict[str, Any]:
    """Intake seconds per size, pandas.read_csv of the same files beside it, the exponent."""
    intake_s, read_s = [], []
    for n_files in sizes:
        inbox = folder / f"inbox_{n_files}"
        write_folder(inbox, n_files, seed=n_files)
        started = time.perf_counter()
        for path in sorted(inbox.glob("*.csv")):
            pd.read_csv(path)
        read_s.append(time.perf_counter() - started)
        started = time.perf_counter()
        with curate.open_catalog(folder / f"folder_{n_files}.db", actor="bench") as catalog:
            report = catalog.intake(inbox)
        intake_s.append(time.perf_counter() - started)
        assert report.count("added") == n_files, report.to_dict()["quarantined"]
        print(f"    {n_files} files: intake {intake_s[-1]:.2f} s, read_csv {read_s[-1]:.2f} s",
              flush=True)  # fmt: skip
    exponent = float(np.polyfit(np.log(sizes), np.log(intake_s), 1)[0])
    return {"ratio": exponent, "target": 1.1, "ours_s": intake_s[-1], "baseline_s": read_s[-1],
            "n": sizes[-1], "files": sizes, "intake_s": intake_s, "read_csv_s": read_s,
            "intake_over_read_csv": [a / b for a, b in zip(intake_s, read_s, strict=True)],
            "ms_per_file": [1000 * a / n for a, n in zip(intake_s, sizes, strict=True)]}  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(
        prog="python -m bench.folder", description=__doc__.split("\n")[0]
    )
    parser.add_argument("--quick", action="store_true", help="300 and 3,000 files")
    args = parser.parse_args()
    sizes = [300, 3000] if args.quick else [1000, 10000]
    with tempfile.TemporaryDirectory(prefix="curate-bench-folder-") as name:
        row = case_folder_scaling(Path(name), sizes)
    print(json.dumps(row, indent=2))


if __name__ == "__main__":
    main()
