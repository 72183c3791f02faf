"""Folder intake: valid files logged, bad ones quarantined with a reason, nothing lost."""

from __future__ import annotations

import json
import os

from conftest import LONG_CSV, SIDECAR, write


def test_examples_intake_cleanly(catalog, examples):
    report = catalog.intake(examples)
    assert report.count("added") == 13
    assert report.count("quarantined") == 0
    assert len(catalog.list()) == 13
    labs = {v.record.source.lab for v in catalog.list()}
    assert labs == {
        "Harrow Point Lab",
        "Quillfen Institute",
        "Corvane Biophysics",
        "Marrowby Group",
    }
    relative = {v.record.observable.id for v in catalog.list() if v.record.observable.relative}
    assert relative == {"glint"}
    assert catalog.verify().ok
    again = catalog.intake(examples)
    assert again.count("duplicate") == 13 and again.count("added") == 0


def test_rerunning_an_intake_does_not_undo_a_revision(catalog, tmp_path):
    # a file logged, its metadata corrected, the same file intaken again: still one dataset
    inbox = tmp_path / "inbox"
    write(inbox / "run.csv", LONG_CSV)
    write(inbox / "run.toml", SIDECAR + '[conditions]\ntemperature = "37 degC"\n')
    first = catalog.intake(inbox)
    (logged,) = [item.id for item in first.items]
    catalog.revise(logged, reason="incubator log", conditions={"temperature": "36.5 degC"})
    again = catalog.intake(inbox)
    assert again.count("duplicate") == 1 and again.count("added") == 0
    assert again.items[0].id == logged
    assert [v.id for v in catalog.list()] == [logged]
    assert catalog.show(logged).record.conditions["temperature"].value == 36.5


def test_bad_file_is_quarantined_with_reason(catalog, tmp_path):
    inbox = tmp_path / "inbox"
    write(inbox / "good.csv", LONG_CSV)
    write(inbox / "good.toml", SIDECAR)
    write(inbox / "bad.csv", "time,value\n0,1\n1,n.d.\n")
    write(inbox / "bad.toml", SIDECAR)
    write(inbox / "nometa.csv", LONG_CSV)
    write(inbox / "notes.txt", "not data")
    report = catalog.intake(inbox)
    assert report.count("added") == 1
    assert report.count("quarantined") == 2
    jail = inbox / "quarantine"
    assert sorted(p.name for p in jail.iterdir()) == [
        "bad.csv",
        "bad.csv.reason.txt",
        "bad.toml",
        "nometa.csv",
        "nometa.csv.reason.txt",
    ]
    reason = (jail / "bad.csv.reason.txt").read_text()
    assert "line 3, column 'value': 'n.d.' is not a number" in reason
    assert "field 'observable' is required" in (jail / "nometa.csv.reason.txt").read_text()
    # the good file and unrelated files stay where they were
    assert sorted(p.name for p in inbox.iterdir()) == [
        "good.csv",
        "good.toml",
        "notes.txt",
        "quarantine",
    ]


def test_sidecar_pointing_at_missing_file_is_quarantined(catalog, tmp_path):
    inbox = tmp_path / "inbox"
    write(inbox / "orphan.toml", 'data_file = "gone.csv"\n' + SIDECAR)
    report = catalog.intake(inbox)
    assert report.count("quarantined") == 1
    assert "the data file 'gone.csv' does not exist" in report.items[0].reason
    assert (inbox / "quarantine" / "orphan.toml").exists()


def test_symlink_leading_outside_is_refused(catalog, tmp_path):
    outside = write(tmp_path / "secret.csv", LONG_CSV)
    inbox = tmp_path / "inbox"
    write(inbox / "ok.csv", LONG_CSV)
    write(inbox / "ok.toml", SIDECAR)
    os.symlink(outside, inbox / "link.csv")
    report = catalog.intake(inbox)
    refused = [i for i in report.items if i.status == "refused"]
    assert [i.file for i in refused] == ["link.csv"]
    assert (inbox / "link.csv").is_symlink()  # left alone, not followed, not moved
    assert report.count("added") == 1


def test_quarantine_never_overwrites(catalog, tmp_path):
    inbox = tmp_path / "inbox"
    for _ in range(2):
        write(inbox / "bad.csv", "time,value\n0,x\n")
        catalog.intake(inbox)
    names = sorted(p.name for p in (inbox / "quarantine").iterdir())
    assert names == ["bad.1.csv", "bad.csv", "bad.csv.reason.1.txt", "bad.csv.reason.txt"]


def test_intake_cli_exit_code_and_json(cli, tmp_path):
    inbox = tmp_path / "inbox"
    write(inbox / "good.csv", LONG_CSV)
    write(inbox / "good.toml", SIDECAR)
    run = cli("intake", inbox, "--json")
    assert run.code == 0
    import json

    payload = json.loads(run.out)
    assert payload["added"] == 1 and payload["items"][0]["id"] == "test_front_speed_01"
    write(inbox / "bad.csv", "time,value\n")
    run = cli("intake", inbox)
    assert run.code == 1
    assert "1 already present, 1 quarantined" in run.out


def test_intake_lab_fills_in_only_where_the_sidecar_names_none(cli, tmp_path):
    inbox = tmp_path / "inbox"
    no_lab = SIDECAR.replace('source.lab = "Test Lab"\n', "")
    write(inbox / "a.csv", LONG_CSV)
    write(inbox / "a.toml", no_lab)
    write(inbox / "b.csv", LONG_CSV.replace("4.0", "4.4"))
    write(inbox / "b.toml", SIDECAR)
    # without --lab the file is quarantined with a remedy intake now accepts
    first = cli("intake", inbox, "--json")
    assert first.code == 1
    reason = (inbox / "quarantine" / "a.csv.reason.txt").read_text()
    assert "field 'source': required but missing (or pass --lab)" in reason
    os.replace(inbox / "quarantine" / "a.csv", inbox / "a.csv")
    os.replace(inbox / "quarantine" / "a.toml", inbox / "a.toml")
    run = cli("intake", inbox, "--lab", "Default Lab", "--json")
    assert run.code == 0, run
    listed = {d["id"]: d["lab"] for d in json.loads(cli("list", "--json").out)}
    assert sorted(listed.values()) == ["Default Lab", "Test Lab"]


def test_logging_a_fixed_file_resolves_its_old_quarantine_note(catalog, tmp_path):
    inbox = tmp_path / "inbox"
    write(inbox / "run.csv", "time,value\n0,1\n1,n.d.\n")
    write(inbox / "run.toml", SIDECAR)
    assert catalog.intake(inbox).count("quarantined") == 1
    jail = inbox / "quarantine"
    assert (jail / "run.csv.reason.txt").is_file()
    # the lab sends the fixed file under the same name
    write(inbox / "run.csv", LONG_CSV)
    os.replace(jail / "run.toml", inbox / "run.toml")
    report = catalog.intake(inbox)
    assert report.count("added") == 1
    assert sorted(p.name for p in jail.iterdir()) == ["run.csv", "run.csv.resolved.txt"]
    note = (jail / "run.csv.resolved.txt").read_text().splitlines()
    assert "'n.d.' is not a number" in note[2]
    assert note[-1].endswith(f"run.csv was logged later as {report.items[0].id}")
