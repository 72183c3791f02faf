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
