"""The command line: JSON shapes scripts rely on, help for every command, README coverage."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys

import numpy as np
import pytest
from conftest import (
    DATA,
    EXAMPLES,
    LONG_CSV,
    MIXED_SCALE,
    ROOT,
    add_mixed_observable,
    cut_event_tail,
    saturating_model,
    write,
)

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


@pytest.mark.parametrize(
    ("options", "header"),
    [
        (["--sd-type", "sd"], "sd (nM)"),
        (["--sd-type", "sem"], "sem (nM)"),
        (["--sd-type", "ci", "--ci-level", "0.95"], "ci95 (nM)"),
        (["--sd-type", "ci", "--ci-level", "0.9"], "ci90 (nM)"),
        (["--sd-type", "percent"], "sd (% of value)"),
        (["--sd-type", "estimated"], "estimated sd (nM)"),
        (["--sd-type", "sd", "--sd-scale", "ln"], "sd (ln scale)"),
        (["--sd-type", "sem", "--sd-scale", "log10"], "sem (log10 scale)"),
    ],
)
def test_show_labels_the_uncertainty_column_by_its_type(cli, tmp_path, options, header):
    data = write(tmp_path / "a.csv", "time,value,sd,n\n0,1.0,0.1,3\n10,2.0,0.2,3\n")
    assert cli("add", data, *ADD, *options).code == 0
    lines = cli("show", "harrow_velarin_conc_01").out.splitlines()
    columns = next(line for line in lines if line.strip().startswith("time (s)"))
    assert re.split(r"\s{2,}", columns.strip()) == ["time (s)", "value (nM)", header, "n"]


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
        "Correction",
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
        "PointMask",
        "Policy",
        "PythonFunction",
        "Selection",
        "SeriesArrays",
        "StoredProblem",
        "UnitError",
        "VerifyReport",
        "__version__",
        "load_policy",
        "open_catalog",
    }


def strict_json(text):
    # RFC 8259 section 6: NaN and Infinity are not JSON; json.loads accepts them unless told
    def refuse(name):
        raise ValueError(f"not JSON: {name}")

    return json.loads(text, parse_constant=refuse)


def json_commands():
    import typer.main

    commands = typer.main.get_command(app).commands
    return sorted(
        name
        for name, command in commands.items()
        if any("--json" in getattr(p, "opts", ()) for p in command.params)
    )


def test_every_json_output_is_strict_json(cli, tmp_path):
    # a demo-like catalog: the example data, noise, checklist grades, consistency, a fit, and a
    # dataset whose error model sits on a bound (b = 0: its standard error is not a number)
    import shutil

    import curate

    inbox = tmp_path / "inbox"
    shutil.copytree(EXAMPLES, inbox)
    checklists = ROOT / "example_datasets" / "checklists"
    model = ["--model", f"{ROOT / 'example_datasets' / 'model.py'}:predict"]
    params = ["--params", ROOT / "example_datasets" / "params.toml"]
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        catalog.intake(inbox)
        catalog.estimate_noise()
        by_file = {v.record.source.raw_file_name.split(".")[0]: v.id for v in catalog.list()}
        for path in sorted(checklists.glob("*.toml")):
            catalog.grade_from_checklist(by_file[path.stem], answers_file=path, accept=True)
        time = np.repeat(np.arange(6.0), 3)
        draft = catalog.draft(time, 10 * (time + 1) + np.tile([-1.0, 0.0, 1.0], 6),
                              observable="additive", unit="nM", time_unit="min", lab="Lab P",
                              replicate=np.tile([1, 2, 3], 6))  # fmt: skip
        additive = catalog.add_drafts([draft])[0].id
    first = sorted(by_file.values())[0]
    data = write(tmp_path / "new.csv", LONG_CSV)
    runs = {
        "add": ["add", data, "--observable", "extra", *ADD[2:]],  # not in the fitted observables
        "intake": ["intake", inbox],
        "inspect": ["inspect", data, "--observable", "extra", *ADD[2:]],
        "noise": ["noise", additive, "--method", "error-model"],
        "grade": ["grade", first, "B", "--reason", "looked at the raw files"],
        "consistency": ["consistency"],
        "list": ["list"],
        "show": ["show", additive, "--points"],
        "history": ["history", additive],
        "verify": ["verify"],
        "weights": ["weights"],
        "export": ["export", "table", tmp_path / "table"],
        "folds": ["folds", tmp_path / "folds", "--by", "lab"],
        "trace": ["trace", tmp_path / "table"],
        "fit": ["fit", *model, *params, "--observable", "velarin_conc", "--observable", "glint"],
        "sensitivity": [
            "sensitivity",
            *model,
            *params,
            "--observable",
            "velarin_conc",
            "--observable",
            "glint",
            "--by",
            "lab",
            "--method",
            "one-step",
        ],
        "profile": ["profile", *model, *params, "--observable", "velarin_conc", "--observable",
                    "glint", "--parameter", "q10"],
        "ensemble": ["ensemble", *model, *params, "--observable", "velarin_conc", "--observable",
                     "glint", "--starts", "3"],
        "predict": ["predict", *model, *params, "--observable", "velarin_conc", "--conditions",
                    "dose=10uM", "--conditions", "temperature=37degC", "--times", "0,60",
                    "--time-unit", "min", "--starts", "3", "--by", "none"],
        "impact": ["impact", first],
        "import-petab": [
            "import-petab",
            DATA / "petab" / "Fujita_SciSignal2010" / "Fujita_SciSignal2010.yaml",
        ],
        "models": ["models"],
    }
    assert sorted(runs) == json_commands(), "every command with --json needs a run here"
    for name, args in runs.items():
        run = cli(*args, "--json")
        assert run.code in (0, 1), f"{name}: {run.err}"
        strict_json(run.out)
    # the error model's b sits on its bound: its standard error is null, not NaN
    noise = strict_json(cli(*runs["noise"], "--json").out)
    assert noise[0]["parameters"]["b"] == 0.0 and noise[0]["parameters"]["b_stderr"] is None


def test_consistency_and_fit_give_one_scale_factor_by_calibration_group(cli, tmp_path):
    # one convention everywhere: data = s x model (consistency: data = s x consensus), named
    # by the calibration group, as PEtab's scale_blot_7 parameter
    import curate

    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        _, relative = add_mixed_observable(catalog)
    run = cli("consistency", "--json")
    row = next(
        r for g in json.loads(run.out)["groups"] for r in g["datasets"] if r["id"] == relative
    )
    assert row["scale"] == pytest.approx(MIXED_SCALE, rel=1e-6)
    assert row["calibration_group"] == "blot_7"
    assert "scale 1000 (blot_7)" in cli("consistency").out
    model, params = saturating_model(tmp_path)
    run = cli("fit", "--model", f"{model}:predict", "--params", params, "--json")
    fitted = json.loads(run.out)
    assert fitted["scale_factors"] == {"blot_7": pytest.approx(MIXED_SCALE, rel=1e-6)}
    assert fitted["parameters"]["top"]["value"] == pytest.approx(20.0, rel=1e-6)
    text = cli("fit", "--model", f"{model}:predict", "--params", params).out
    assert "scale factors by calibration group (data = s x model): blot_7 1000" in text


def test_verify_prints_the_chain_head_and_checks_a_kept_one(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    assert cli("add", data, *ADD).code == 0
    assert cli("retire", "harrow_velarin_conc_01", "--reason", "saturated").code == 0
    report = json.loads(cli("verify", "--json").out)
    for key in ("ok", "datasets", "versions", "events", "series", "sqlite", "problems"):
        assert key in report  # the fields scripts already read stay
    head = report["head"]
    assert head["seq"] == 2 and len(head["hash"]) == 64 and report["anchor"] is None
    run = cli("verify")
    assert run.code == 0 and f"chain head: 2:{head['hash']}" in run.out
    kept = f"2:{head['hash']}"
    run = cli("verify", "--head", kept)
    assert run.code == 0 and f"(extends head 2:{head['hash'][:12]})" in run.out
    backup = tmp_path / "b.db"
    run = cli("backup", backup)
    assert run.code == 0 and f"chain head: 2:{head['hash']}" in run.out
    assert f"curate verify --against {backup}" in run.out
    assert cli("verify", "--against", backup).code == 0
    cut_event_tail(cli.catalog, 1)  # the retirement silently undone
    assert cli("verify").code == 0  # the chain alone cannot tell
    for option, value, where in (
        ("--head", kept, ""),
        ("--against", backup, f" (from backup {backup})"),
    ):
        run = cli("verify", option, value)
        assert run.code == 1
        problem = (
            f"  the catalog no longer extends head 2:{head['hash'][:12]}{where}: it ends at "
            "event 1 (events were cut off, or an older copy was put back)"
        )
        assert run.out.splitlines().count(problem) == 1, run.out
        assert json.loads(cli("verify", option, value, "--json").out)["problems"] == [problem[2:]]


@pytest.mark.parametrize(
    "value", ["12", "x:" + "a" * 64, "-1:" + "a" * 64, "3:abc", "3:" + "g" * 64]
)
def test_verify_refuses_a_head_that_is_not_seq_colon_hash(cli, value):
    run = cli("verify", "--head", value)
    assert run.code == 2 and run.err.count("\n") == 1
    assert f"--head '{value}': expected SEQ:HASH" in run.err


def test_verify_refuses_head_and_against_together_and_a_missing_file(cli, tmp_path):
    import curate

    curate.open_catalog(cli.catalog).close()  # verify only reads: the catalog must exist
    run = cli("verify", "--head", "0:" + "0" * 64, "--against", tmp_path)
    assert run.code == 2 and "not both" in run.err
    run = cli("verify", "--against", tmp_path / "nowhere")
    assert run.code == 2 and "no such export folder, manifest or backup file" in run.err
    assert cli("verify", "--head", "0:" + "0" * 64).code == 0  # the empty log extends genesis


def test_verify_against_a_tampered_backup_is_refused(cli, tmp_path):
    import sqlite3

    data = write(tmp_path / "a.csv", LONG_CSV)
    assert cli("add", data, *ADD).code == 0
    assert cli("backup", tmp_path / "b.db").code == 0
    conn = sqlite3.connect(tmp_path / "b.db", isolation_level=None)
    conn.execute("UPDATE events SET actor = 'someone else'")
    conn.close()
    run = cli("verify", "--against", tmp_path / "b.db")
    assert run.code == 2 and "the backup's own event log does not hold" in run.err


def test_trace_exits_1_for_a_catalog_rolled_back_behind_the_export(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG_CSV)
    assert cli("add", data, *ADD).code == 0
    other = write(tmp_path / "b.csv", "time,value,sd\n0,1,0.1\n1,2,0.1\n")
    assert cli("add", other, *ADD).code == 0
    assert cli("retire", "harrow_velarin_conc_02", "--reason", "rerun").code == 0
    assert cli("export", "table", tmp_path / "t").code == 0
    assert cli("trace", tmp_path / "t").code == 0
    cut_event_tail(cli.catalog, 2)
    run = cli("trace", tmp_path / "t")
    assert run.code == 1 and "the catalog no longer extends head 3:" in run.out
    assert json.loads(cli("trace", tmp_path / "t", "--json").out)["chain_changed"][0].startswith(
        "the catalog no longer extends head 3:"
    )


def test_mistyped_command_gets_one_line_with_the_closest_names(cli):
    run = cli("verfy", catalog_path=None)
    assert run.code == 2, run
    assert run.err == (
        "curate: error: no command 'verfy'; did you mean 'verify' or 'version'? "
        "(see `curate --help`)\n"
    )


def test_usage_mistakes_exit_2_with_one_line_naming_the_help(cli):
    missing = cli("show", catalog_path=None)
    assert missing.code == 2
    assert missing.err == "curate: error: Missing argument 'ID' (see `curate show --help`)\n"
    bogus = cli("list", "--bogus", catalog_path=None)
    assert bogus.code == 2 and bogus.err.count("\n") == 1 and "No such option: --bogus" in bogus.err
    assert "internal error" not in missing.err + bogus.err
    emoji = cli("verify", "--head", ":abc:", catalog_path=None)
    assert ":abc:" in emoji.err  # text stays text, never an emoji
    bare = cli(catalog_path=None)
    assert bare.code == 0 and "Usage: curate" in bare.out


def test_verify_counts_in_words_a_person_would_write():
    from curate.ledger.verify import VerifyReport
    from curate.present.text import verify_text

    report = VerifyReport(datasets=1, versions=1, events=2, series=1)
    report.policies = 1
    first = verify_text(report).plain.splitlines()[0]
    assert first.startswith("intact: 1 dataset, 1 version, 1 series, 2 events, 1 policy recomputed")


def test_models_lists_stored_problems_in_the_documented_shape(cli):
    import hashlib

    run = cli("models", "--json")
    assert run.code == 2 and "does not exist" in run.err  # no catalog yet: not created
    folder = DATA / "petab" / "Fujita_SciSignal2010"
    imported = cli("import-petab", folder / "Fujita_SciSignal2010.yaml")
    assert imported.code == 0, imported.err
    assert imported.out.startswith(
        "problem Fujita_SciSignal2010.yaml: stored as fujita_scisignal2010_01 version 1"
    )
    again = cli("import-petab", folder / "Fujita_SciSignal2010.yaml")
    assert "already stored as fujita_scisignal2010_01 version 1" in again.out
    (item,) = json.loads(cli("models", "--json").out)
    assert list(item) == [
        "id", "source", "sbml_sha256", "parameters", "observables", "conditions", "datasets"
    ]  # fmt: skip
    model = (folder / "model_Fujita_SciSignal2010.xml").read_bytes()
    assert item["id"] == "fujita_scisignal2010_01"
    assert item["source"] == "Fujita_SciSignal2010.yaml"
    assert item["sbml_sha256"] == hashlib.sha256(model).hexdigest()
    assert item["observables"] == ["pAkt_tot", "pEGFR_tot", "pS6_tot"]  # the table's order
    assert len(item["parameters"]) == 19 and len(item["conditions"]) == 16
    listed = json.loads(cli("list", "--json").out)
    assert item["datasets"] == sorted(d["id"] for d in listed) and len(listed) == 18
    text = cli("models").out
    assert "fujita_scisignal2010_01" in text and hashlib.sha256(model).hexdigest()[:12] in text


def test_models_of_a_catalog_without_problems(cli, tmp_path):
    assert cli("add", write(tmp_path / "a.csv", LONG_CSV), *ADD).code == 0
    assert cli("models", "--json").out.strip() == "[]"
    assert "no stored problems" in cli("models").out
