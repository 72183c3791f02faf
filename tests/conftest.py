"""Shared fixtures: catalogs (file and in-memory), example data, and an in-process CLI runner."""

from __future__ import annotations

import shutil
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

import curate
from curate.cli import main

ROOT = Path(__file__).resolve().parent.parent
DATA = Path(__file__).resolve().parent / "data"
EXAMPLES = ROOT / "example_datasets" / "data"


@dataclass
class Run:
    code: int
    out: str
    err: str


def run_main(capsys: pytest.CaptureFixture[str], argv: list[str]) -> Run:
    """Run ``curate`` in-process with ``argv``; give its exit code, stdout and stderr."""
    capsys.readouterr()
    try:
        main(argv)
        code = 0
    except SystemExit as exit_:
        code = int(exit_.code or 0)
    captured = capsys.readouterr()
    return Run(code, captured.out, captured.err)


@pytest.fixture
def cli(capsys: pytest.CaptureFixture[str], tmp_path: Path):
    """Run the curate CLI in-process against a catalog in tmp_path; give code, stdout, stderr."""
    catalog = tmp_path / "cli.db"

    def run(*args: str, catalog_path: Path | None = catalog) -> Run:
        argv = (["--catalog", str(catalog_path)] if catalog_path else []) + [str(a) for a in args]
        return run_main(capsys, argv)

    run.catalog = catalog  # type: ignore[attr-defined]
    return run


@pytest.fixture
def catalog(tmp_path: Path):
    """Give a fresh catalog file in tmp_path."""
    with curate.open_catalog(tmp_path / "test.db", actor="tester") as cat:
        yield cat


@pytest.fixture
def memory_catalog():
    """Give a fresh in-memory catalog."""
    with curate.open_catalog(":memory:", actor="tester") as cat:
        yield cat


@pytest.fixture
def examples(tmp_path: Path) -> Path:
    """Give a private copy of the example data folder."""
    target = tmp_path / "examples"
    shutil.copytree(EXAMPLES, target)
    return target


# a weighting policy under which trust changes nothing (inflation 1 for every grade, no floors,
# no balancing): a stored problem's objective is then the problem's own
NEUTRAL = """
name = "neutral"
exclude = ["X"]
ungraded = "A"
[inflation]
A = 1.0
B = 1.0
C = 1.0
D = 1.0
[floors]
absolute = 0.0
relative = 0.0
[balance]
mode = "none"
"""


def write(path: Path, text: str) -> Path:
    """Write dedented text to path; give the path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text).lstrip("\n"), encoding="utf-8")
    return path


SIDECAR = """
observable.id = "front_speed"
observable.unit = "um/min"
time.unit = "min"
source.lab = "Test Lab"
"""

LONG_CSV = """
time,value,sd
0,1.0,0.1
10,2.0,0.2
20,3.5,0.2
30,4.0,0.3
"""


MIXED_SCALE = 1000.0  # the relative dataset reads MIXED_SCALE x the absolute concentration


def mixed_truth(minutes):
    """Give the true concentration (nM) of the mixed observable at times in minutes."""
    import numpy as np

    return 20.0 * (1.0 - np.exp(-np.asarray(minutes, dtype=float) / 15.0))


def add_mixed_observable(catalog):
    """Log one observable measured in absolute and in relative units; give (absolute, relative) ids.

    Absolute: 60 points in nM, sd 0.5 nM, grade A. Relative: 10 of those times in a.u. with
    exactly MIXED_SCALE x the truth, sd MIXED_SCALE x 1 nM, grade C, calibration group blot_7.
    """
    import numpy as np

    minutes = np.arange(60.0)
    rows = np.arange(0, 60, 6)
    conditions = {"dose": "10 uM"}
    absolute = catalog.draft(minutes, mixed_truth(minutes), observable="velarin_conc", unit="nM",
                             time_unit="min", lab="Harrow Point Lab", sd=np.full(60, 0.5),
                             conditions=conditions, uncertainty={"type": "sd"},
                             trust={"grade": "A", "rationale": "calibrated"})  # fmt: skip
    relative = catalog.draft(minutes[rows], MIXED_SCALE * mixed_truth(minutes[rows]),
                             observable="velarin_conc", unit="a.u.", time_unit="min",
                             lab="Quillfen Institute", sd=np.full(10, MIXED_SCALE * 1.0),
                             conditions=conditions, uncertainty={"type": "sd"},
                             protocol={"calibration_group": "blot_7"},
                             trust={"grade": "C", "rationale": "uncalibrated blot"})  # fmt: skip
    added = catalog.add_drafts([absolute, relative])
    return added[0].id, added[1].id


SATURATING_MODEL = """
import numpy as np


def predict(params, points):
    return params["top"] * (1.0 - np.exp(-points["time"].to_numpy() / 60.0 / params["tau"]))
"""
SATURATING_PARAMS = """
[parameters.top]
start = 10.0
lower = 0.1
upper = 1000
log = true

[parameters.tau]
start = 5.0
lower = 0.1
upper = 100
log = true
"""


def saturating_model(folder):
    """Write the model top * (1 - exp(-t / tau)) and its spec; give (model.py, params.toml)."""
    return (
        write(folder / "saturating.py", SATURATING_MODEL),
        write(folder / "saturating.toml", SATURATING_PARAMS),
    )


def cut_event_tail(catalog_file: Path | str, after_seq: int) -> None:
    """Delete every event after ``after_seq``, the versions they wrote and the policies only they
    named, straight in the file (a catalog cut back, or an older copy put back)."""
    import sqlite3

    conn = sqlite3.connect(catalog_file, isolation_level=None)
    cut = conn.execute(
        "SELECT dataset_id, version FROM events WHERE seq > ? AND version IS NOT NULL",
        [after_seq],
    ).fetchall()
    for dataset_id, version in cut:
        conn.execute(
            "DELETE FROM versions WHERE dataset_id = ? AND version = ?", [dataset_id, version]
        )
    conn.execute("DELETE FROM events WHERE seq > ?", [after_seq])
    conn.execute(
        "DELETE FROM policies WHERE sha256 NOT IN (SELECT json_extract(payload, '$.policy_sha256')"
        " FROM events WHERE json_extract(payload, '$.policy_sha256') IS NOT NULL)"
    )
    conn.close()
