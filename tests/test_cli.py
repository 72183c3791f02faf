"""The command line: JSON shapes scripts rely on, help for every command, README coverage."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest
from conftest import LONG_CSV, ROOT, write

from curate.cli import app

ADD = [
    "--observable",
    "velarin_conc",
    "--unit",
    "nM",
    "--time-unit",
    "min",
    "--lab",
    "Harrow Point Lab",
]


def command_names():
    import typer.main

    return sorted(typer.main.get_command(app).commands)


def test_add_prints_id_and_json(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    run = cli("add", data, *ADD, "--condition", "temperature=37degC")
    assert run.code == 0 and run.out.strip() == "harrow_velarin_conc_01"
    other = write(tmp_path / "b.csv", "time,value\n0,1\n1,2\n")
    run = cli("add", other, *ADD, "--json")
    payload = json.loads(run.out)
    assert payload["id"] == "harrow_velarin_conc_02" and payload["version"] == 1


def test_list_and_show_json_shapes(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    cli("add", data, *ADD, "--grade", "B", "--reason", "calibrated")
    listed = json.loads(cli("list", "--json").out)
    assert len(listed) == 1
    for key in ("id", "version", "observable", "lab", "n_points", "grade"):
        assert key in listed[0]
    assert listed[0]["grade"] == "B" and listed[0]["n_points"] == 4
    shown = json.loads(cli("show", listed[0]["id"], "--json", "--points").out)
    for key in ("id", "version", "observable", "lab", "n_points", "grade", "record", "points"):
        assert key in shown
    assert [p["time"] for p in shown["points"]] == [0, 600, 1200, 1800]


def test_show_text_mentions_units_and_trust(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    cli("add", data, *ADD, "--condition", "dose=10uM", "--grade", "B", "--reason", "calibrated")
    run = cli("show", "harrow_velarin_conc_01")
    assert run.code == 0
    assert "given as 'nM'" in run.out and "dose = 10 uM" in run.out
    assert "B: calibrated" in run.out


def test_history_and_retire_cli(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    cli("add", data, *ADD)
    assert cli("retire", "harrow_velarin_conc_01", "--reason", "rerun").code == 0
    assert json.loads(cli("list", "--json").out) == []
    assert len(json.loads(cli("list", "--retired", "--json").out)) == 1
    history = json.loads(cli("history", "harrow_velarin_conc_01", "--json").out)
    assert [h["kind"] for h in history] == ["add", "retire"]
    assert (
        cli("revise", "harrow_velarin_conc_01", "--unretire", "--reason", "rerun failed").code == 0
    )


def test_dry_run_cli(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    run = cli("add", data, *ADD, "--dry-run")
    assert run.code == 0 and "dry run: would add" in run.out
    assert json.loads(cli("list", "--json").out) == []


def test_demo_runs_on_examples(cli, tmp_path):
    run = cli("demo", tmp_path / "demo", catalog_path=None)
    assert run.code == 0, run.err
    assert "logged 13 datasets" in run.out and "(0 quarantined)" in run.out
    assert "4 x A, 6 x B, 3 x C" in run.out
    assert "marrowby_velarin_conc_01 (Marrowby Group): Birge ratio" in run.out
    assert "suggested marrowby_velarin_conc_01 C -> D (accepted by the demo" in run.out
    assert "worst held-out fit: marrowby_velarin_conc_01" in run.out
    assert "7. fitted the scenario's ODE model" in run.out and "true 0.2" in run.out
    assert (
        "8. after review, leave one dataset out" in run.out and "\n   leave one lab out" in run.out
    )
    steps = [line.split(".")[0] for line in run.out.splitlines() if line[:1].isdigit()]
    assert steps == [str(k) for k in range(1, 10)]  # each step numbered once, in order
    assert "intact: 13 datasets, 40 versions" in run.out
    assert (tmp_path / "demo" / "report.html").stat().st_size > 100_000
    refused = cli("demo", tmp_path / "demo", catalog_path=None)
    assert refused.code == 2 and "not empty" in refused.err


@pytest.mark.parametrize("name", command_names())
def test_every_command_has_help_and_is_in_readme(cli, name):
    run = cli(name, "--help", catalog_path=None)
    assert run.code == 0 and "Usage:" in run.out
    readme = (ROOT / "README.md").read_text()
    assert f"curate {name}" in readme, f"README does not show `curate {name}`"


def test_console_script_gives_one_line_and_no_traceback(tmp_path):
    # through a real subprocess, as a user's shell would run it
    bad = write(tmp_path / "bad.csv", "time,value\n0,oops\n")
    env = {**os.environ, "CURATE_CATALOG": str(tmp_path / "c.db")}
    proc = subprocess.run(
        [sys.executable, "-m", "curate.cli", "add", str(bad), *ADD],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert "bad.csv, line 2, column 'value': 'oops' is not a number" in proc.stderr


def test_importing_curate_does_not_import_the_cli_stack():
    code = "import sys, curate; print('typer' in sys.modules, 'rich' in sys.modules)"
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.stdout.strip() == "False False"


def test_public_api_is_exactly_this():
    import curate

    assert set(curate.__all__) == {
        "EXCLUSION_GRADE",
        "GRADES",
        "AddPlan",
        "AddResult",
        "Catalog",
        "CatalogError",
        "CurateError",
        "DatasetRecord",
        "DatasetVersion",
        "Draft",
        "FitOptions",
        "FitResult",
        "HistoryEntry",
        "InputError",
        "IntakeItem",
        "IntakeReport",
        "IntegrityError",
        "ModelBackend",
        "NotFoundError",
        "Policy",
        "PythonFunction",
        "Selection",
        "SeriesArrays",
        "UnitError",
        "VerifyReport",
        "__version__",
        "load_policy",
        "open_catalog",
    }


def test_mistyped_command_gets_usage_and_closest_names(cli):
    run = cli("verfy", catalog_path=None)
    assert run.code == 2, run
    lines = run.err.strip().splitlines()
    assert lines[0].startswith("Usage: curate [OPTIONS] COMMAND")
    assert lines[-1] == "curate: error: no command 'verfy'; did you mean 'verify' or 'version'?"
    assert "internal error" not in run.err


def test_usage_mistakes_exit_2_with_the_usage_line(cli):
    missing = cli("show", catalog_path=None)
    assert missing.code == 2 and missing.err.startswith("Usage: curate show")
    assert missing.err.strip().splitlines()[-1] == "curate: error: Missing argument 'ID'."
    bogus = cli("list", "--bogus", catalog_path=None)
    assert bogus.code == 2 and "No such option: --bogus" in bogus.err
    assert "internal error" not in missing.err + bogus.err
    bare = cli(catalog_path=None)
    assert bare.code == 0 and "Usage: curate" in bare.out
