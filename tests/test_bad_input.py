"""Every bad input gives one clear line naming file, line and field; exit 2; catalog unchanged."""

from __future__ import annotations

import json
import re
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import LONG_CSV, SIDECAR, write

BASE = ["--observable", "front_speed", "--unit", "um/min", "--time-unit", "min", "--lab", "L"]
# a Python exception class name (ValueError, AssertionError, BadZipFile...) in a user's message
CLASS_NAME = re.compile(r"\b(?:[A-Z]\w*(?:Error|Exception)|BadZipFile)\b")


def dump(catalog: Path) -> list[str]:
    """Give the catalog's whole content as SQL text lines."""
    conn = sqlite3.connect(catalog)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()


@pytest.fixture
def seeded(cli, tmp_path):
    """A CLI runner whose catalog already holds one dataset."""
    good = write(tmp_path / "good.csv", LONG_CSV)
    assert cli("add", good, *BASE).code == 0
    return cli


CASES = [
    # (name, file name, content, extra args, expected fragment of the one error line)
    (
        "non-numeric value",
        "a.csv",
        "time,value\n0,1\n1,abc\n",
        [],
        "a.csv, line 3, column 'value': 'abc' is not a number",
    ),
    (
        "nan value",
        "b.csv",
        "time,value\n0,1\n1,nan\n",
        [],
        "line 3, column 'value': 'nan' is not a finite number",
    ),
    (
        "inf time",
        "c.csv",
        "time,value\n0,1\ninf,2\n",
        [],
        "line 3, column 'time': 'inf' is not a finite number",
    ),
    (
        "huge number",
        "c2.csv",
        "time,value\n0,1\n1,1e999\n",
        [],
        "line 3, column 'value': '1e999' is not a finite",
    ),
    ("empty value", "d.csv", "time,value\n0,1\n1,\n", [], "line 3, column 'value': empty cell"),
    (
        "negative sd",
        "e.csv",
        "time,value,sd\n0,1,0.1\n1,2,-0.5\n",
        [],
        "line 3, column 'sd': negative uncertainty -0.5",
    ),
    (
        "too many cells",
        "f.csv",
        "time,value\n0,1\n1,2,3\n",
        [],
        "line 3: 3 cells, but the header has 2 columns",
    ),
    (
        "too few cells",
        "f2.csv",
        "time,value,sd\n0,1,0.1\n1,2\n",
        [],
        "line 3: 2 cells, but the header has 3",
    ),
    (
        "missing value column",
        "g.csv",
        "time,sd\n0,1\n",
        ["--layout", "long"],
        "required column 'value' is missing",
    ),
    ("missing time column", "h.csv", "t,value\n0,1\n", [], "required column 'time' is missing"),
    ("empty file", "i.csv", "", [], "i.csv: the file is empty"),
    ("header only", "j.csv", "time,value\n", [], "the file has a header but no data rows"),
    ("binary as csv", "k.csv", b"\x00\x01\x02PK\x00", [], "not a text file (binary content)"),
    ("text as xlsx", "l.xlsx", "time,value\n0,1\n", [], "not an XLSX workbook"),
    ("broken zip as xlsx", "l2.xlsx", b"PK\x03\x04garbage", [], "not a readable XLSX workbook"),
    (
        "not utf-8",
        "m.csv",
        b"time,value\n0,\xff\n",
        [],
        "is not a number; expected a measured value (the file is not UTF-8 and was read as ",
    ),
    ("unsupported type", "n.dat", "time,value\n0,1\n", [], "unsupported file type '.dat'"),
    ("duplicate header", "o.csv", "time,value,value\n0,1,2\n", [], "column 'value' appears twice"),
    (
        "censoring token with no limit",
        "p.csv",
        "time,value\n0,1\n1,n.d.\n",
        ["--censored-token", "n.d."],
        "p.csv, line 3, column 'value': 'n.d.' marks a value below a limit, but no limit is "
        "stated; give it with --detection-limit X",
    ),
    (
        "censoring token with no limit, wide",
        "p2.csv",
        "time,r1,r2\n0,1,2\n1,3,LOD\n",
        ["--censored-token", "LOD", "--layout", "wide"],
        "p2.csv, line 3, column 'r2': 'LOD' marks a value below a limit, but no limit is stated",
    ),
    (
        "unknown censoring word",
        "p3.csv",
        "time,value\n0,1\n1,BLQ\n2,3\n",
        [],
        "if it marks a value below a limit, write it '<0.5', or name the word with --censored-token",
    ),
    (
        "comparison without limit",
        "q.csv",
        "time,value\n0,1\n1,<\n",
        [],
        "line 3, column 'value': '<' names no limit; expected a comparison with its limit, e.g. '<0.5'",
    ),
    (
        "two comparison marks",
        "q2.csv",
        "time,value\n0,1\n1,<<2\n",
        [],
        "line 3, column 'value': '<<2' has two comparison marks",
    ),
    (
        "comparison with a word",
        "q3.csv",
        "time,value\n0,1\n1,<abc\n",
        [],
        "line 3, column 'value': 'abc' is not a number",
    ),
    (
        "censored sd",
        "r.csv",
        "time,value,sd\n0,1,0.1\n1,<0.5,<0.1\n",
        [],
        "r.csv, line 3, column 'sd': '<0.1' is a censored cell in the sd column",
    ),
]


@pytest.mark.parametrize(
    ("name", "filename", "content", "extra", "expected"), CASES, ids=[c[0] for c in CASES]
)
def test_bad_data_file(seeded, tmp_path, name, filename, content, extra, expected):
    path = tmp_path / filename
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    before = dump(seeded.catalog)
    run = seeded("add", path, *BASE, *extra)
    assert run.code == 2, run
    assert run.out == ""
    lines = run.err.strip().splitlines()
    assert len(lines) == 1, run.err
    assert expected in lines[0]
    assert "Traceback" not in run.err
    assert not CLASS_NAME.search(run.err), run.err
    assert dump(seeded.catalog) == before


OPTION_CASES = [
    (
        "unknown unit",
        ["--observable", "x", "--unit", "wibbles", "--time-unit", "min", "--lab", "L"],
        "unknown value unit 'wibbles'",
    ),
    (
        "unit ending in a slash",
        ["--observable", "x", "--unit", "nM/", "--time-unit", "min", "--lab", "L"],
        "unknown value unit 'nM/': expected a unit such as",
    ),
    (
        "time unit of wrong dimension",
        ["--observable", "x", "--unit", "nM", "--time-unit", "um", "--lab", "L"],
        "time unit 'um' has dimension [length]",
    ),
    (
        "invalid condition key",
        [*BASE, "--condition", "bad-key=3"],
        "key 'bad-key' is not a valid identifier",
    ),
    ("condition without =", [*BASE, "--condition", "temperature"], "expected KEY=VALUE"),
    (
        "missing unit option",
        ["--observable", "x", "--time-unit", "min", "--lab", "L"],
        "field 'observable.unit' is required; pass --unit",
    ),
    ("missing lab", ["--observable", "x", "--unit", "nM", "--time-unit", "min"], "pass --lab"),
    (
        "invalid observable id",
        ["--observable", "9x", "--unit", "nM", "--time-unit", "min", "--lab", "L"],
        "field 'observable.id'",
    ),
    ("grade outside the scale", [*BASE, "--grade", "Q", "--reason", "r"], "field 'trust.grade'"),
    ("grade without reason", [*BASE, "--grade", "A"], "a grade needs its reason"),
    ("sem without n", [*BASE, "--sd-type", "sem"], "no n is known"),
    ("ci without level", [*BASE, "--sd-type", "ci"], "needs its level"),
    ("unknown sd type", [*BASE, "--sd-type", "stddev"], "field 'uncertainty.type'"),
    ("bad date", [*BASE, "--acquired", "last tuesday"], "field 'source.acquired'"),
]


@pytest.mark.parametrize(
    ("name", "args", "expected"), OPTION_CASES, ids=[c[0] for c in OPTION_CASES]
)
def test_bad_options(seeded, tmp_path, name, args, expected):
    data = write(tmp_path / "data.csv", "time,value,sd\n0,1,0.1\n1,2,0.1\n")
    before = dump(seeded.catalog)
    run = seeded("add", data, *args)
    assert run.code == 2, run
    assert len(run.err.strip().splitlines()) == 1, run.err
    assert expected in run.err
    assert not CLASS_NAME.search(run.err), run.err
    assert dump(seeded.catalog) == before


SIDECAR_CASES = [
    (
        "missing required field",
        SIDECAR.replace('source.lab = "Test Lab"\n', ""),
        "field 'source': required but missing",
    ),
    ("unknown field", SIDECAR + 'colour = "red"\n', "field 'colour': unknown field"),
    ("invalid toml", "observable = [\n", "not valid TOML"),
    (
        "bad condition key in sidecar",
        SIDECAR + '[conditions]\n"2fast" = 1\n',
        "key '2fast' is not a valid identifier",
    ),
    ("wrong type", SIDECAR.replace('time.unit = "min"', "time.unit = 5"), "field 'time.unit'"),
    (
        "bad duration",
        SIDECAR + '[[protocol.pretreatment]]\nstep = "x"\nduration = "soon"\n',
        "'soon' is not a duration",
    ),
    (
        "censoring limit in a unit of another kind",
        SIDECAR + '[censoring]\ntokens = ["n.d."]\nlimit = 0.5\nunit = "s"\n',
        "field 'censoring.limit': the limit's unit 's' cannot be expressed in the values' unit",
    ),
    (
        "censoring limit not a number",
        SIDECAR + '[censoring]\nlimit = "low"\n',
        "field 'censoring.limit'",
    ),
    ("censoring limit infinite", SIDECAR + "[censoring]\nlimit = inf\n", "field 'censoring.limit'"),
    (
        "unknown censoring field",
        SIDECAR + "[censoring]\nlod = 1\n",
        "field 'censoring.lod': unknown field",
    ),
]


@pytest.mark.parametrize(
    ("name", "sidecar", "expected"), SIDECAR_CASES, ids=[c[0] for c in SIDECAR_CASES]
)
def test_bad_sidecar(seeded, tmp_path, name, sidecar, expected):
    data = write(tmp_path / "s.csv", LONG_CSV)
    write(tmp_path / "s.toml", sidecar)
    before = dump(seeded.catalog)
    run = seeded("add", data)
    assert run.code == 2, run
    assert len(run.err.strip().splitlines()) == 1, run.err
    assert expected in run.err
    assert "s.toml" in run.err
    assert dump(seeded.catalog) == before


def test_sidecar_naming_missing_data_file(seeded, tmp_path):
    sidecar = write(tmp_path / "meta.toml", 'data_file = "gone.csv"\n' + SIDECAR)
    run = seeded("add", sidecar)
    assert run.code == 2
    assert "meta.toml, field 'data_file': the data file 'gone.csv' does not exist" in run.err


@pytest.mark.parametrize("name", ["../outside.csv", "/etc/passwd"])
def test_sidecar_naming_file_outside_its_folder(seeded, tmp_path, name):
    write(tmp_path / "outside.csv", LONG_CSV)
    sidecar = write(tmp_path / "inner" / "meta.toml", f'data_file = "{name}"\n' + SIDECAR)
    run = seeded("add", sidecar)
    assert run.code == 2
    assert "is outside the sidecar's folder" in run.err


def test_missing_data_file(seeded, tmp_path):
    run = seeded("add", tmp_path / "nowhere.csv", *BASE)
    assert run.code == 2 and "nowhere.csv: no such file" in run.err


def test_zero_sd_is_a_warning_not_an_error(seeded, tmp_path):
    data = write(tmp_path / "zero.csv", "time,value,sd\n0,1,0\n1,2,0.1\n2,3,0.2\n")
    run = seeded("add", data, *BASE)
    assert run.code == 0
    assert "uncertainty exactly 0 at 1 point(s)" in run.err


def test_unknown_dataset(seeded):
    run = seeded("show", "no_such_dataset")
    assert run.code == 2 and "no dataset 'no_such_dataset'" in run.err


def test_catalog_in_missing_folder(cli, tmp_path):
    run = cli("list", catalog_path=tmp_path / "nope" / "c.db")
    assert run.code == 2 and "does not exist" in run.err


def test_file_that_is_not_a_catalog(cli, tmp_path):
    fake = tmp_path / "fake.db"
    fake.write_text("this is not sqlite" * 100)
    run = cli("list", catalog_path=fake)
    assert run.code == 2 and "not a usable catalog file" in run.err


NM = ["--observable", "velarin_conc", "--unit", "nM", "--time-unit", "min", "--lab", "L"]


@pytest.fixture
def concentrations(cli, tmp_path):
    """A CLI runner whose catalog holds one nM dataset with a dose condition."""
    good = write(tmp_path / "conc.csv", LONG_CSV)
    assert cli("add", good, *NM, "--condition", "dose=10uM").code == 0
    return cli


def refused(cli, args, expected):
    before = dump(cli.catalog)
    run = cli(*args)
    assert run.code == 2, run
    lines = run.err.strip().splitlines()
    assert len(lines) == 1, run.err
    assert expected in lines[0], lines[0]
    assert "Traceback" not in run.err and "Error" not in lines[0].split(":")[0]
    assert dump(cli.catalog) == before
    return lines[0]


def test_unit_of_another_dimension_is_refused(concentrations, tmp_path):
    data = write(tmp_path / "far.csv", "time,value\n0,1\n1,5\n2,8\n")
    line = refused(
        concentrations,
        ["add", data, *NM[:2], "--unit", "furlongs", *NM[4:]],
        "unit 'furlongs' ([length]) does not fit observable 'velarin_conc', whose datasets "
        "are in nM ([substance] / [length] ** 3), e.g. l_velarin_conc_01",
    )
    assert "far.csv" in line


def test_percent_of_peak_joins_a_concentration_observable(concentrations, tmp_path):
    data = write(tmp_path / "pct.csv", "time,value\n0,0\n5,40\n10,100\n20,70\n")
    run = concentrations("add", data, *NM[:2], "--unit", "%", *NM[4:], "--normalisation", "peak",
                         "--condition", "dose=10uM", "--json")  # fmt: skip
    assert run.code == 0, run.err
    shown = json.loads(concentrations("show", json.loads(run.out)["id"], "--json").out)
    assert shown["relative"] is True and shown["unit"] == "dimensionless"


def test_condition_of_another_kind_is_refused(concentrations, tmp_path):
    data = write(tmp_path / "abc.csv", "time,value\n0,1\n1,5\n2,8\n")
    refused(
        concentrations,
        ["add", data, *NM, "--condition", "dose=abc"],
        "condition 'dose': 'abc' is text, but other datasets hold 'dose' as a quantity in nM",
    )
    other = write(tmp_path / "other.csv", "time,value\n0,2\n1,6\n2,9\n")
    assert concentrations("add", other, *NM, "--condition", "dose=1uM").code == 0
    refused(
        concentrations,
        ["revise", "l_velarin_conc_01", "--reason", "r", "--condition", "dose=abc"],
        "condition 'dose': 'abc' is text, but other datasets hold 'dose' as a quantity in nM "
        "([substance] / [length] ** 3), e.g. l_velarin_conc_02",
    )


def test_condition_key_given_twice_is_refused(concentrations, tmp_path):
    data = write(tmp_path / "twice.csv", "time,value\n0,1\n1,5\n2,8\n")
    twice = ["--condition", "dose=10uM", "--condition", "dose=20uM"]
    expected = "--condition 'dose=20uM': key 'dose' is given twice (also 'dose=10uM')"
    refused(concentrations, ["add", data, *NM, *twice], expected)
    refused(concentrations, ["revise", "l_velarin_conc_01", "--reason", "r", *twice], expected)
    refused(concentrations, ["list", *twice], expected)


def test_import_petab_of_another_dimension_is_refused(cli):
    from conftest import DATA

    problem = DATA / "petab" / "Boehm_JProteomeRes2014" / "Boehm_JProteomeRes2014.yaml"
    assert cli("import-petab", problem, "--unit", "nM").code == 0
    refused(cli, ["import-petab", problem, "--unit", "s"], "unit 's' ([time]) does not fit")


def test_intake_quarantines_a_unit_of_another_dimension(concentrations, tmp_path):
    inbox = tmp_path / "inbox"
    write(inbox / "far.csv", "time,value\n0,1\n1,5\n2,8\n")
    write(inbox / "far.toml", 'observable.id = "velarin_conc"\nobservable.unit = "furlongs"\n'
          'time.unit = "min"\nsource.lab = "L"\n')  # fmt: skip
    run = concentrations("intake", inbox)
    assert run.code == 1
    reason = (inbox / "quarantine" / "far.csv.reason.txt").read_text()
    assert "does not fit observable 'velarin_conc'" in reason


def test_lowercase_grade_is_accepted_everywhere(concentrations, tmp_path):
    data = write(tmp_path / "g.csv", "time,value\n0,1\n1,5\n2,8\n3,9\n")
    run = concentrations("add", data, *NM, "--grade", "b", "--reason", "one run", "--json")
    assert run.code == 0, run.err
    new_id = json.loads(run.out)["id"]
    assert json.loads(concentrations("show", new_id, "--json").out)["grade"] == "B"
    assert concentrations("grade", "l_velarin_conc_01", "c", "--reason", "noisy").code == 0
    listed = json.loads(concentrations("list", "--grade", "c", "--json").out)
    assert [d["id"] for d in listed] == ["l_velarin_conc_01"]
    out = tmp_path / "t"
    assert concentrations("export", "table", out, "--grade", "b").code == 0
    assert set(pd.read_csv(out / "points.csv")["dataset_id"]) == {new_id}
    write(tmp_path / "s.csv", "time,value\n0,2\n1,6\n2,9\n")
    write(tmp_path / "s.toml", 'observable.id = "velarin_conc"\nobservable.unit = "nM"\n'
          'time.unit = "min"\nsource.lab = "L"\n[trust]\ngrade = "a"\nrationale = "calibrated"\n')  # fmt: skip
    run = concentrations("add", tmp_path / "s.csv", "--json")
    assert run.code == 0, run.err
    assert (
        json.loads(concentrations("show", json.loads(run.out)["id"], "--json").out)["grade"] == "A"
    )


READING_COMMANDS = [
    ["list"],
    ["show", "x_01"],
    ["history", "x_01"],
    ["verify"],
    ["weights"],
    ["export", "table", "out"],
    ["folds", "out"],
    ["trace", "out"],
    ["impact", "x_01"],
    ["fit", "--model", "m.py:f", "--params", "p.toml"],
    ["sensitivity", "--model", "m.py:f", "--params", "p.toml"],
    ["report", "r.html"],
    ["consistency"],
    ["noise", "--all"],
    ["grade", "x_01", "B", "--reason", "r"],
    ["backup", "b.db"],
    ["revise", "x_01", "--reason", "r", "--lab", "L"],
    ["retire", "x_01", "--reason", "r"],
]


@pytest.mark.parametrize("args", READING_COMMANDS, ids=[a[0] for a in READING_COMMANDS])
def test_mistyped_catalog_is_refused_not_created(cli, tmp_path, monkeypatch, args):
    monkeypatch.chdir(tmp_path)  # relative output names land here, never in the checkout
    missing = tmp_path / "typo.db"
    run = cli(*args, catalog_path=missing)
    assert run.code == 2, run
    assert len(run.err.strip().splitlines()) == 1, run.err
    assert f"{missing}: the catalog file does not exist" in run.err
    assert not missing.exists()


def test_commands_that_log_data_create_the_catalog(cli, tmp_path):
    fresh = tmp_path / "fresh.db"
    data = write(tmp_path / "a.csv", LONG_CSV)
    assert cli("add", data, *BASE, catalog_path=fresh).code == 0
    assert fresh.exists()
    inbox = tmp_path / "inbox"
    write(inbox / "b.csv", LONG_CSV.replace("4.0", "4.5"))
    write(inbox / "b.toml", SIDECAR)
    assert cli("intake", inbox, catalog_path=tmp_path / "other.db").code == 0
    assert (tmp_path / "other.db").exists()


def test_negative_workers_are_refused(seeded, tmp_path):
    before = dump(seeded.catalog)
    params = write(tmp_path / "p.toml", "[parameters.a]\nstart = 1\n")
    model = write(tmp_path / "m.py", "def f(p, points):\n    return p['a'] + 0 * points['time']\n")
    run = seeded("sensitivity", "--model", f"{model}:f", "--params", params, "--workers", "-3")
    assert run.code == 2, run
    assert run.err.strip() == (
        "curate: error: --workers -3: expected 0 (every core) or a number of processes"
    )
    assert dump(seeded.catalog) == before


def test_broken_petab_yaml_names_the_line_not_the_parser(cli, tmp_path):
    problem = write(tmp_path / "problem.yaml", "format_version: 1\nproblems: [\n  - a: b\n")
    run = cli("import-petab", problem)
    assert run.code == 2, run
    assert len(run.err.strip().splitlines()) == 1
    assert f"{problem}: not a readable YAML file (line " in run.err
    assert not CLASS_NAME.search(run.err), run.err


@pytest.mark.parametrize(
    ("command", "option"),
    [("fit", "--max-evaluations"), ("fit", "--generations"), ("sensitivity", "--max-evaluations")],
)
def test_budget_below_one_is_refused(seeded, tmp_path, command, option):
    params = write(tmp_path / "p.toml", "[parameters.a]\nstart = 1\n")
    model = write(tmp_path / "m.py", "def f(p, points):\n    return p['a'] + 0 * points['time']\n")
    run = seeded(command, "--model", f"{model}:f", "--params", params, option, "0")
    assert run.code == 2, run
    assert run.err.strip() == f"curate: error: {option} 0: expected at least 1"


def test_a_bad_petab_problem_creates_no_catalog(cli, tmp_path):
    problem = write(tmp_path / "p.yaml", "format_version: 1\nproblems: [\n")
    run = cli("import-petab", problem)
    assert run.code == 2 and run.err.count("\n") == 1
    assert not cli.catalog.exists()


def test_a_report_into_a_missing_folder_is_refused_not_created(seeded, tmp_path):
    run = seeded("report", tmp_path / "nowhere" / "deeper" / "r.html")
    assert run.code == 2 and "nowhere/deeper: no such folder" in run.err
    assert not (tmp_path / "nowhere").exists()
    run = seeded("report", tmp_path)  # a folder where a file is meant
    assert run.code == 2 and run.err.count("\n") == 1


def _boehm_copy(folder: Path) -> Path:
    import shutil

    from conftest import DATA

    shutil.copytree(DATA / "petab" / "Boehm_JProteomeRes2014", folder)
    return folder / "Boehm_JProteomeRes2014.yaml"


def _replace(path: Path, old: str, new: str) -> None:
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new, 1))


MODEL = "model_Boehm_JProteomeRes2014.xml"
PARAMETERS = "parameters_Boehm_JProteomeRes2014.tsv"
BAD_PROBLEMS = [
    # (name, how the copy is spoilt, expected fragment of the one error line)
    (
        "SBML file missing",
        lambda f: (f / MODEL).unlink(),
        f"field 'sbml_files': file '{MODEL}' does not exist beside the problem; put it there",
    ),
    (
        "SBML file not XML",
        lambda f: (f / MODEL).write_text("<sbml><model id='m'>\n"),
        f"{MODEL}: not a readable SBML file (no element found: line 2, column 0)",
    ),
    (
        "SBML file of another XML kind",
        lambda f: (f / MODEL).write_text("<html><body/></html>"),
        f"{MODEL}: not an SBML file (its root element is <html>, expected <sbml>)",
    ),
    (
        "SBML without a model",
        lambda f: (f / MODEL).write_text('<sbml xmlns="http://www.sbml.org/sbml/level3"/>'),
        f"{MODEL}: the SBML file has no <model> element",
    ),
    (
        "parameter table without parameterId",
        lambda f: _replace(f / PARAMETERS, "parameterId", "parameterID"),
        f"{PARAMETERS}: required column 'parameterId' is missing",
    ),
    (
        "visualization table not UTF-8",
        lambda f: (f / "visualizationSpecification_Boehm_JProteomeRes2014.tsv").write_bytes(
            b"plotId\tplotName\np1\t\xff\n"
        ),
        "visualizationSpecification_Boehm_JProteomeRes2014.tsv: byte 19 is not UTF-8 text",
    ),
    (
        "problems not a list of entries",
        lambda f: (f / "Boehm_JProteomeRes2014.yaml").write_text(
            "format_version: 1\nparameter_file: x.tsv\nproblems: [1]\n"
        ),
        "field 'problems': expected a list of problem entries",
    ),
    (
        "file list not a list of names",
        lambda f: _replace(
            f / "Boehm_JProteomeRes2014.yaml", f"sbml_files:\n  - {MODEL}", "sbml_files: 3"
        ),
        "field 'sbml_files': expected a list of file names",
    ),
]


@pytest.mark.parametrize(
    ("name", "spoil", "expected"), BAD_PROBLEMS, ids=[c[0] for c in BAD_PROBLEMS]
)
def test_a_bad_petab_problem_stores_nothing(seeded, tmp_path, name, spoil, expected):
    problem = _boehm_copy(tmp_path / "problem")
    spoil(problem.parent)
    line = refused(seeded, ["import-petab", problem], expected)
    assert not CLASS_NAME.search(line), line


# -- stored problems whose model cannot be simulated ------------------------------------------
SMALL = "_0001.yaml"  # the PEtab test suite's case 0001 (see tests/test_fit_problem.py)


def _small_copy(folder: Path) -> Path:
    import shutil

    from conftest import DATA

    shutil.copytree(DATA / "petab_suite" / "sbml" / "0001", folder)
    return folder / SMALL


BAD_MODELS = [
    # (name, how the copy is spoilt, expected fragment of the one error line at import)
    (
        "SBML libroadrunner cannot load",
        lambda f: _replace(f / "_model.xml", "<ci> k1 </ci>", "<ci> nothere </ci>"),
        "_model.xml: libroadrunner cannot load the SBML model: The symbol 'nothere' is not",
    ),
    (
        "observable formula naming an unknown symbol",
        lambda f: _replace(f / "_observables.tsv", "obs_a\tA\t", "obs_a\tA + zz\t"),
        "_observables.tsv, row 2 (obs_a), observableFormula: 'zz' is neither a model symbol",
    ),
    (
        "condition overriding a symbol the model lacks",
        lambda f: (f / "_conditions.tsv").write_text("conditionId\tnosuch\nc0\t1\n"),
        "_conditions.tsv, column nosuch: the model has no symbol 'nosuch'",
    ),
    (
        "measurement before t = 0",
        lambda f: _replace(f / "_measurements.tsv", "obs_a\tc0\t10\t", "obs_a\tc0\t-5\t"),
        "_measurements.tsv, row 3: time -5 is before 0; a PEtab v1 simulation starts at t = 0",
    ),
    (
        "an operator without its operand",
        lambda f: _replace(f / "_observables.tsv", "obs_a\tA\t", "obs_a\t2 * * A\t"),
        "observableFormula: cannot read formula '2 * * A' (an operator without its operand)",
    ),
    (
        "bounds the wrong way round",
        lambda f: _replace(f / "_parameters.tsv", "k1\tlin\t0\t10", "k1\tlin\t10\t0"),
        "_parameters.tsv, row 4 (k1): lowerBound 10 is not below upperBound 0",
    ),
    (
        "log scale from zero",
        lambda f: _replace(f / "_parameters.tsv", "k1\tlin\t0\t10", "k1\tlog10\t0\t10"),
        "_parameters.tsv, row 4 (k1): parameterScale log10 needs a positive lowerBound, not 0",
    ),
    (
        "a condition defined twice",
        lambda f: (f / "_conditions.tsv").write_text("conditionId\nc0\nc0\n"),
        "_conditions.tsv, row 3: condition 'c0' is defined twice",
    ),
    (
        "more noise parameters than placeholders",
        lambda f: (f / "_measurements.tsv").write_text(
            "observableId\tsimulationConditionId\ttime\tmeasurement\tnoiseParameters\n"
            "obs_a\tc0\t0\t0.7\t0.5;2\nobs_a\tc0\t10\t0.1\t\n"
        ),
        "_measurements.tsv, row 2, noiseParameters: '0.5;2' gives 2 values, but observable obs_a's formula has 0 noiseParameter placeholders",
    ),
    (
        "a negative numeric noise parameter",
        lambda f: (f / "_measurements.tsv").write_text(
            "observableId\tsimulationConditionId\ttime\tmeasurement\tnoiseParameters\n"
            "obs_a\tc0\t0\t0.7\t0.5\nobs_a\tc0\t10\t0.1\t-0.5\n"
        ),
        "_measurements.tsv, line 3, column 'noiseParameters': '-0.5' is a noise standard deviation of -0.5; expected > 0",
    ),
    (
        "noise formula that does not parse",
        lambda f: _replace(f / "_observables.tsv", "obs_a\tA\t0.5", "obs_a\tA\t0.5 *"),
        "_observables.tsv, row 2 (obs_a), noiseFormula",
    ),
]


@pytest.mark.parametrize(("name", "spoil", "expected"), BAD_MODELS, ids=[c[0] for c in BAD_MODELS])
def test_a_problem_whose_model_cannot_run_is_refused_at_import(
    seeded, tmp_path, name, spoil, expected
):
    problem = _small_copy(tmp_path / "problem")
    spoil(problem.parent)
    line = refused(seeded, ["import-petab", problem, "--lab", "L"], expected)
    assert not CLASS_NAME.search(line), line
    assert "at virtual" not in line  # libroadrunner's C++ location is not the user's business


def _stored(cli, problem: Path) -> str:
    assert cli("import-petab", problem, "--lab", "L").code == 0
    (stored,) = json.loads(cli("models", "--json").out)
    return str(stored["id"])


def _fit_events(catalog: Path) -> int:
    conn = sqlite3.connect(catalog)
    try:
        return int(conn.execute("select count(*) from events where kind = 'fit'").fetchone()[0])
    finally:
        conn.close()


BLOW_UP = """<times/>
              <cn> -1 </cn>
              <ci> k1 </ci>
              <ci> A </ci>
              <ci> A </ci>"""  # dA/dt = k1 A^2 runs off to infinity at t = 1 / (k1 A(0))
RATE_FWD = """<times/>
              <ci> compartment </ci>
              <ci> k1 </ci>
              <ci> A </ci>"""


@pytest.mark.parametrize(
    ("name", "spoil", "expected"),
    [
        (
            "noise formula <= 0",
            lambda f: _replace(f / "_observables.tsv", "obs_a\tA\t0.5", "obs_a\tA\tA - 0.5"),
            "_observables.tsv, observable obs_a: the noise formula gives -0.0714",
        ),
        (
            "integration fails at the start point",
            lambda f: _replace(f / "_model.xml", RATE_FWD, BLOW_UP),
            "_model.xml: the simulation of condition c0 failed at a0=1, b0=0, k1=0.8, k2=0.6: "
            "CVODE Error",
        ),
    ],
    ids=["noise <= 0", "failed integration"],
)
def test_an_evaluation_that_cannot_be_done_is_one_line_and_stores_no_run(
    cli, tmp_path, name, spoil, expected
):
    problem = _small_copy(tmp_path / "problem")
    spoil(problem.parent)
    problem_id = _stored(cli, problem)
    line = refused(cli, ["fit", "--problem", problem_id, "--evaluate"], expected)
    assert not CLASS_NAME.search(line.replace("CVODE Error", "")), line
    assert _fit_events(cli.catalog) == 0


def test_a_start_whose_integration_fails_is_a_recorded_failed_start(cli, tmp_path):
    problem = _small_copy(tmp_path / "problem")
    folder = problem.parent
    _replace(folder / "_model.xml", RATE_FWD, BLOW_UP)
    # eleven points; a0 and b0 fixed; k1 = 0.01 runs off at t = 100, past the last time (10),
    # while most starts drawn in [0, 10] run off before it
    rows = [f"obs_a\tc0\t{t}\t{1 / (1 - 0.01 * t):.6f}" for t in range(11)]
    (folder / "_measurements.tsv").write_text(
        "observableId\tsimulationConditionId\ttime\tmeasurement\n" + "\n".join(rows) + "\n"
    )
    (folder / "_parameters.tsv").write_text(
        "parameterId\tparameterScale\tlowerBound\tupperBound\tnominalValue\testimate\n"
        "a0\tlin\t0\t10\t1.0\t0\nb0\tlin\t0\t10\t0.0\t0\n"
        "k1\tlin\t0\t10\t0.01\t1\nk2\tlin\t0\t10\t0.6\t1\n"
    )
    problem_id = _stored(cli, problem)
    run = cli("fit", "--problem", problem_id, "--starts", "6", "--json")
    assert run.code == 0, run.err
    result = json.loads(run.out)
    failed = [s for s in result["starts"] if s["chi2"] is None]
    assert failed, result["starts"]
    assert all("the simulation of condition c0 failed" in s["message"] for s in failed)
    assert result["parameters"]["k1"]["value"] == pytest.approx(0.01, rel=1e-4)


def test_the_solver_prints_nothing_of_its_own_when_it_fails(tmp_path, capfd):
    from curate.errors import SimulationFailed
    from curate.fit.petab.model import PetabModel

    problem = _small_copy(tmp_path / "problem")
    _replace(problem.parent / "_model.xml", RATE_FWD, BLOW_UP)
    files = {
        p.name: p.read_bytes()
        for p in problem.parent.iterdir()
        if p.suffix in (".yaml", ".tsv", ".xml")
    }
    model = PetabModel(files, SMALL)
    capfd.readouterr()
    with pytest.raises(SimulationFailed, match="CV_CONV_FAILURE"):
        model.simulate("", "c0", np.array([0.0, 10.0]), ["A"], {"k1": 0.8, "a0": 1.0})
    captured = capfd.readouterr()  # what reached file descriptors 1 and 2
    assert "CVODE" not in captured.err and "cvodes" not in captured.err, captured.err
    assert captured.out == ""


def test_a_failed_import_into_a_new_catalog_leaves_no_file(cli, tmp_path):
    problem = _small_copy(tmp_path / "problem")
    folder = problem.parent
    # one dataset holds genotype as text, the other as a number: refused inside the catalog
    (folder / "_conditions.tsv").write_text("conditionId\tgenotype\nc0\twt\nc1\t5\n")
    _replace(folder / "_measurements.tsv", "obs_a\tc0\t10\t", "obs_a\tc1\t10\t")
    _replace(folder / "_model.xml", "<listOfParameters>", "<listOfParameters>\n      "
             '<parameter id="genotype" value="0" constant="true"/>')  # fmt: skip
    catalog = tmp_path / "new.db"
    run = cli("import-petab", problem, "--lab", "L", catalog_path=catalog)
    assert run.code == 2 and "genotype" in run.err, run.err
    assert not catalog.exists()


def test_nan_in_a_species_column_keeps_the_value_as_an_empty_cell_does(cli, tmp_path):
    # PEtab v1: NaN (or an empty cell) in the condition table keeps the model's own value
    results = {}
    for cell in ("NaN", ""):
        problem = _small_copy(tmp_path / f"p{cell or 'empty'}")
        (problem.parent / "_conditions.tsv").write_text(f"conditionId\tA\nc0\t{cell}\n")
        catalog = tmp_path / f"{cell or 'empty'}.db"
        assert cli("import-petab", problem, "--lab", "L", catalog_path=catalog).code == 0
        (stored,) = json.loads(cli("models", "--json", catalog_path=catalog).out)
        run = cli("fit", "--problem", stored["id"], "--evaluate", "--json", catalog_path=catalog)
        assert run.code == 0, run.err
        results[cell] = json.loads(run.out)["nllh"]
    assert results["NaN"] == results[""]
