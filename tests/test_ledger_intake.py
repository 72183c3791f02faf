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


def _velarin_folder(folder, count):
    """Write ``count`` small files of one observable (two labs) and one unit clash."""
    for k in range(count):
        rows = "\n".join(f"{t},{(k + 1) * 0.5 + t / 10:g},0.1" for t in range(0, 40, 10))
        write(folder / f"run_{k:02d}.csv", "time,value,sd\n" + rows + "\n")
        write(
            folder / f"run_{k:02d}.toml",
            'observable.id = "velarin"\nobservable.unit = "nM"\ntime.unit = "min"\n'
            f'source.lab = "Lab {"AB"[k % 2]}"\n[conditions]\ndose = "{k} nM"\n',
        )
    # the values of run_03 under other conditions (a copy by mistake), and a unit of another
    # dimension for the same observable
    write(folder / "run_90.csv", (folder / "run_03.csv").read_text())
    write(folder / "run_90.toml", (folder / "run_03.toml").read_text().replace("3 nM", "30 nM"))
    write(folder / "run_91.csv", LONG_CSV)
    write(folder / "run_91.toml", 'observable.id = "velarin"\nobservable.unit = "s"\n'
          'time.unit = "min"\nsource.lab = "Lab A"\n')  # fmt: skip


def test_intake_reads_the_catalog_once_and_gives_what_file_by_file_adds_give(
    catalog, tmp_path, monkeypatch
):
    import curate.ledger.intake as intake_module
    from curate import open_catalog
    from curate.errors import CurateError

    builds = []

    class Counted(intake_module.ActionContext):
        def __init__(self, store):
            builds.append(1)
            super().__init__(store)

    monkeypatch.setattr(intake_module, "ActionContext", Counted)
    _velarin_folder(tmp_path / "inbox", 12)
    report = catalog.intake(tmp_path / "inbox")
    assert len(builds) == 1  # one read of the catalog for 14 files, a quarantined one among them
    assert report.count("added") == 13 and report.count("quarantined") == 1

    # the reference: each file added alone, each add reading the whole catalog afresh
    _velarin_folder(tmp_path / "again", 12)
    with open_catalog(tmp_path / "reference.db", actor="tester") as reference:
        expected = []
        for data in sorted((tmp_path / "again").glob("*.csv")):
            try:
                added = reference.add(data)
            except CurateError as err:  # the refusal is what is compared
                expected.append((data.name, "quarantined", None, str(err), ()))
                continue
            expected.append((data.name, "added", added.id, None, added.warnings))
    got = [(i.file, i.status, i.id, i.reason, i.warnings) for i in report.items]
    assert [row[:3] for row in got] == [row[:3] for row in expected]
    assert [row[4] for row in got] == [row[4] for row in expected]
    assert "values identical to dataset" in " ".join(dict((r[0], r[4]) for r in got)["run_90.csv"])
    assert "does not fit observable 'velarin'" in got[-1][3]
    assert got[-1][3].split(": ", 1)[1] == expected[-1][3].split(": ", 1)[1]
    assert catalog.verify().ok


def test_intake_reads_the_catalog_again_when_another_writer_logged_between_files(
    catalog, tmp_path
):
    from curate import open_catalog

    _velarin_folder(tmp_path / "inbox", 4)
    other_file = tmp_path / "other.csv"
    write(other_file, (tmp_path / "inbox" / "run_02.csv").read_text())
    write(tmp_path / "other.toml", (tmp_path / "inbox" / "run_02.toml").read_text())

    def other_writer(done, total, name):
        if name == "run_01.csv":  # before run_01 is read: run_02's data logged by someone else
            with open_catalog(catalog.path, actor="someone else") as other:
                other.add(other_file)

    report = catalog.intake(tmp_path / "inbox", progress=other_writer)
    status = {item.file: (item.status, item.id) for item in report.items}
    assert status["run_02.csv"][0] == "duplicate"
    assert status["run_01.csv"] == ("added", "lab_velarin_03")  # numbered past the other's 02
    assert catalog.verify().ok
