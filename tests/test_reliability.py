"""Nothing lost, nothing forged: killed intakes, concurrent writers, backups, hostile input."""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import SIDECAR, write

import curate
from curate.errors import InputError
from curate.ingest.tables import read_table

GOOD = 200
BAD = 10


def make_inbox(folder: Path) -> None:
    folder.mkdir(parents=True)
    for k in range(GOOD):
        values = "\n".join(f"{t},{(k + 1) * 0.01 + t * 0.5:.4f}" for t in range(8))
        (folder / f"run_{k:03d}.csv").write_text("time,value\n" + values + "\n")
        (folder / f"run_{k:03d}.toml").write_text(SIDECAR + f'\n[conditions]\nwell = "w{k}"\n')
    for k in range(BAD):
        (folder / f"bad_{k:02d}.csv").write_text("time,value\n0,1\n1,oops\n")
        (folder / f"bad_{k:02d}.toml").write_text(SIDECAR)


def intake_process(catalog: Path, inbox: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "curate.cli", "--catalog", str(catalog), "intake", str(inbox)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)  # fmt: skip


def check_after_kill(catalog: Path, inbox: Path) -> int:
    conn = sqlite3.connect(catalog)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()
    with curate.open_catalog(catalog) as opened:
        report = opened.verify()
        assert report.ok, report.problems
        logged = {v.record.source.raw_file_name for v in opened.list()}
        hashes = [v.record.content_hash for v in opened.list()]
    assert len(hashes) == len(set(hashes))  # never the same data twice
    jail = inbox / "quarantine"
    for k in range(GOOD):  # a good file is fully logged, or still waiting (never half-in)
        assert (inbox / f"run_{k:03d}.csv").exists()
    for k in range(BAD):  # a bad file is waiting or quarantined with its reason: never lost
        name = f"bad_{k:02d}.csv"
        in_jail = (jail / name).exists()
        assert (inbox / name).exists() or in_jail
        if in_jail:
            assert (jail / f"{name}.reason.txt").exists()
    return len(logged)


def kill_after_logged(process: subprocess.Popen, catalog: Path, count: int) -> None:
    """Kill the process as soon as the catalog holds ``count`` versions (or when it ends).

    Reading the catalog beside the writer (WAL lets readers in) puts the kill in the middle
    of an intake however fast or loaded the machine is; a kill at a random moment alone
    lands mid-intake only when the write phase is long against the timing noise.
    """
    while process.poll() is None:
        if catalog.exists():
            try:
                conn = sqlite3.connect(catalog, timeout=0.05)
                try:
                    held = conn.execute("SELECT count(*) FROM versions").fetchone()[0]
                finally:
                    conn.close()
            except sqlite3.OperationalError:  # not created yet, or locked for a moment
                held = 0
            if held >= count:
                break
        time.sleep(0.002)
    process.send_signal(signal.SIGKILL)


@pytest.mark.slow
@pytest.mark.xdist_group("own_processes")
def test_killed_intake_leaves_every_file_whole(tmp_path):
    rng = random.Random(20261202)
    # one uninterrupted run tells how long an intake takes on this machine
    make_inbox(tmp_path / "probe")
    started = time.monotonic()
    assert (
        intake_process(tmp_path / "probe.db", tmp_path / "probe").wait(timeout=600) == 1
    )  # bad files: exit 1
    duration = time.monotonic() - started
    # and how much of that is starting Python and importing: the kills must land after it
    started = time.monotonic()
    subprocess.run([sys.executable, "-m", "curate.cli", "--catalog", str(tmp_path / "probe.db"), "list", "--json"],
                   capture_output=True, check=True, timeout=120)  # fmt: skip
    startup = time.monotonic() - started
    working = max(duration - startup, 0.2)
    partial_seen = 0
    # at least 10 trials; more (up to 30) while fewer than 3 kills landed mid-intake, since a
    # loaded machine shifts the timing the random kill moments are drawn from
    for trial in range(30):
        if trial >= 10 and partial_seen >= 3:
            break
        inbox, catalog = tmp_path / f"inbox{trial}", tmp_path / f"c{trial}.db"
        make_inbox(inbox)
        process = intake_process(catalog, inbox)
        if trial % 2:  # at a random moment (early kills too: before the catalog exists)
            time.sleep(startup + rng.uniform(0.05, 0.95) * working)
            process.send_signal(signal.SIGKILL)
        else:  # once a random number of files is in: mid-intake on any machine
            kill_after_logged(process, catalog, rng.randint(1, GOOD - 1))
        process.wait(timeout=60)
        if not catalog.exists():
            continue  # killed before the catalog was even created: nothing to check
        logged = check_after_kill(catalog, inbox)
        partial_seen += 0 < logged < GOOD
        # a rerun completes the job, with no duplicate datasets
        assert intake_process(catalog, inbox).wait(timeout=600) in (0, 1)
        assert check_after_kill(catalog, inbox) == GOOD
        assert len(list((inbox / "quarantine").glob("bad_*.csv"))) == BAD
    assert partial_seen >= 3  # the kills really landed in the middle of intakes


BATCH = 25
# a bulk intake: the inbox's good files read into drafts, logged 25 at a time, each batch one
# transaction sealed by one event (bad files are left where they are)
_BULK_INTAKE = """
import sys
from pathlib import Path
import curate
from curate.errors import CurateError
catalog, inbox, batch = sys.argv[1], Path(sys.argv[2]), int(sys.argv[3])
with curate.open_catalog(catalog, actor="bulk") as opened:
    drafts = []
    for path in sorted(inbox.glob("*.csv")):
        try:
            drafts.append(opened.read_file(path))
        except CurateError:
            continue
        if len(drafts) == batch:
            opened.add_drafts(drafts, batch=True)
            drafts = []
    if drafts:
        opened.add_drafts(drafts, batch=True)
"""


def bulk_intake_process(catalog: Path, inbox: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", _BULK_INTAKE, str(catalog), str(inbox), str(BATCH)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)  # fmt: skip


def check_after_bulk_kill(catalog: Path, inbox: Path) -> int:
    logged = check_after_kill(catalog, inbox)
    with curate.open_catalog(catalog) as opened:
        events = opened.events()
        for version in opened.list():  # every logged file whole: its bytes as they were read
            raw = (inbox / str(version.record.source.raw_file_name)).read_bytes()
            assert hashlib.sha256(raw).hexdigest() == version.record.source.raw_file_sha256
    # whole batches or none: each batch event names 25 datasets (or the last few)
    sizes = [len(e["payload"]["datasets"]) for e in events if e["kind"] == "add_batch"]
    assert all(size == BATCH for size in sizes[:-1]) and sum(sizes) == logged
    assert logged % BATCH == 0 or logged == GOOD
    return logged


@pytest.mark.slow
@pytest.mark.xdist_group("own_processes")
def test_killed_bulk_intake_leaves_every_file_logged_whole_or_waiting(tmp_path):
    rng = random.Random(20261205)
    make_inbox(tmp_path / "probe")
    started = time.monotonic()
    assert bulk_intake_process(tmp_path / "probe.db", tmp_path / "probe").wait(timeout=600) == 0
    duration = time.monotonic() - started
    started = time.monotonic()
    subprocess.run([sys.executable, "-c", "import curate"], check=True, timeout=120)
    startup = time.monotonic() - started
    working = max(duration - startup, 0.2)
    partial_seen = 0
    for trial in range(30):
        if trial >= 10 and partial_seen >= 3:
            break
        inbox, catalog = tmp_path / f"inbox{trial}", tmp_path / f"c{trial}.db"
        make_inbox(inbox)
        process = bulk_intake_process(catalog, inbox)
        if trial % 2:  # at a random moment (early kills too: before the catalog exists)
            time.sleep(startup + rng.uniform(0.05, 0.95) * working)
            process.send_signal(signal.SIGKILL)
        else:  # once a random number of files is in: mid-intake on any machine
            kill_after_logged(process, catalog, rng.randint(1, GOOD - 1))
        process.wait(timeout=60)
        if not catalog.exists():
            continue
        logged = check_after_bulk_kill(catalog, inbox)
        partial_seen += 0 < logged < GOOD
        # a rerun logs the rest: what was logged is recognised, nothing is added twice
        assert bulk_intake_process(catalog, inbox).wait(timeout=600) == 0
        assert check_after_bulk_kill(catalog, inbox) == GOOD
    assert partial_seen >= 3


def _writer(catalog: str, worker: int, count: int, queue) -> None:
    try:
        with curate.open_catalog(catalog, actor=f"writer{worker}") as opened:
            for k in range(count):
                draft = opened.draft(np.arange(5.0), np.arange(5.0) + worker * 1000 + k, observable="v", unit="nM",
                                     time_unit="s", lab=f"Lab {worker}")  # fmt: skip
                opened.add_drafts([draft])
        queue.put((worker, "ok"))
    except Exception as err:  # reported to the parent, which fails the test
        queue.put((worker, f"{type(err).__name__}: {err}"))


@pytest.mark.slow
@pytest.mark.xdist_group("own_processes")
def test_four_concurrent_writers_lose_nothing(tmp_path):
    catalog = tmp_path / "shared.db"
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    workers = [
        context.Process(target=_writer, args=(str(catalog), w, 100, queue)) for w in range(4)
    ]
    for process in workers:
        process.start()
    for process in workers:
        process.join(timeout=600)
    outcomes = dict(queue.get(timeout=10) for _ in workers)
    assert outcomes == {w: "ok" for w in range(4)}, (
        outcomes
    )  # no "database is locked" reached anyone
    with curate.open_catalog(catalog) as opened:
        assert len(opened.list()) == 400
        assert len(opened.events()) == 400
        assert opened.verify().ok
        assert {e["actor"] for e in opened.events()} == {"writer0", "writer1", "writer2", "writer3"}


def _busy_writer(catalog: str, stop_after: float) -> None:
    with curate.open_catalog(catalog, actor="busy") as opened:
        deadline = time.monotonic() + stop_after
        k = 0
        while time.monotonic() < deadline:
            opened.add_drafts(
                [
                    opened.draft(
                        [0, 1, 2],
                        [k, k + 1, k + 3.5],
                        observable="v",
                        unit="nM",
                        time_unit="s",
                        lab="Busy",
                    )
                ]
            )
            k += 1


@pytest.mark.slow
@pytest.mark.xdist_group("own_processes")
def test_backup_while_another_process_writes_and_restore(tmp_path, cli):
    catalog = tmp_path / "live.db"
    with curate.open_catalog(catalog) as opened:
        for k in range(50):
            opened.add_drafts(
                [
                    opened.draft(
                        [0, 1], [k, k + 0.5], observable="v", unit="nM", time_unit="s", lab="Seed"
                    )
                ]
            )
    writer = multiprocessing.get_context("spawn").Process(
        target=_busy_writer, args=(str(catalog), 4.0)
    )
    writer.start()
    time.sleep(1.0)
    copies = []
    for k in range(3):
        run = cli("backup", tmp_path / f"copy{k}.db", catalog_path=catalog)
        assert run.code == 0, run.err
        assert "intact" in run.out
        copies.append(tmp_path / f"copy{k}.db")
        time.sleep(0.5)
    writer.join(timeout=60)
    sizes = []
    for copy in copies:
        with curate.open_catalog(copy) as opened:
            assert opened.verify().ok
            sizes.append(len(opened.list()))
    assert sizes == sorted(sizes) and sizes[0] >= 50  # snapshots taken while the writer went on
    with curate.open_catalog(catalog) as opened:
        live = len(opened.list())
    assert live > sizes[-1] or live >= sizes[-1]
    run = cli("restore", copies[0], catalog_path=catalog)
    assert run.code == 0 and "the previous catalog is kept as" in run.out
    with curate.open_catalog(catalog) as opened:
        assert len(opened.list()) == sizes[0] and opened.verify().ok
    kept = next(tmp_path.glob("live.db.before-restore-*"))
    with curate.open_catalog(kept) as opened:
        assert len(opened.list()) == live  # nothing lost: the catalog before the restore is kept
    refused = cli("backup", copies[0], catalog_path=catalog)
    assert refused.code == 2 and "exists" in refused.err


def test_restore_refuses_a_tampered_backup(tmp_path, cli):
    catalog = tmp_path / "c.db"
    with curate.open_catalog(catalog) as opened:
        opened.add_drafts(
            [opened.draft([0, 1], [1, 2.0], observable="v", unit="nM", time_unit="s", lab="L")]
        )
        opened.backup(tmp_path / "b.db")
    conn = sqlite3.connect(tmp_path / "b.db", isolation_level=None)
    conn.execute("UPDATE events SET actor = 'someone else'")
    conn.close()
    backup_bytes = (tmp_path / "b.db").read_bytes()
    run = cli("restore", tmp_path / "b.db", catalog_path=catalog)
    assert run.code == 2 and "the backup does not verify" in run.err
    with curate.open_catalog(catalog) as opened:
        assert opened.verify().ok and len(opened.list()) == 1
    # the backup itself is read, never changed: no migration, no write-ahead files beside it
    assert (tmp_path / "b.db").read_bytes() == backup_bytes
    assert not list(tmp_path.glob("b.db-*")) and not list(tmp_path.glob("c.db.restoring*"))


def test_restoring_a_file_that_is_no_backup_leaves_nothing_behind(tmp_path, cli):
    catalog = tmp_path / "c.db"
    curate.open_catalog(catalog).close()
    not_a_backup = tmp_path / "data.csv"
    not_a_backup.write_text("time,value\n0,1\n")
    run = cli("restore", not_a_backup, catalog_path=catalog)
    assert run.code == 2 and run.err.count("\n") == 1
    assert f"{not_a_backup}: not a catalog backup" in run.err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.db", "data.csv"]


HOSTILE = [
    "'; DROP TABLE versions; --",
    'x" OR "1"="1',
    "Robert'); DELETE FROM events;--",
    "💥\u0000?",
    "%_\\",
]


@pytest.mark.parametrize("text", HOSTILE)
def test_hostile_strings_are_data_not_sql(catalog, tmp_path, text):
    data = write(tmp_path / "h.csv", "time,value\n0,1\n1,2\n")
    result = catalog.add(data, options={"observable": {"id": "v", "unit": "nM", "label": text}, "time": {"unit": "s"},
                                        "source": {"lab": text, "reference": text}, "conditions": {"note": {"text": text}}})  # fmt: skip
    stored = catalog.show(result.id).record
    assert stored.source.lab == text.strip() and stored.conditions["note"].value == text
    assert [v.id for v in catalog.list(lab=text.strip())] == [result.id]
    assert catalog.verify().ok
    tables = {
        r[0] for r in catalog.store.db.execute("SELECT name FROM sqlite_master WHERE type='table'")
    }
    assert {"versions", "events", "series", "meta"} <= tables
    with pytest.raises(InputError, match="not a valid identifier"):
        catalog.add(data, options={"observable": {"id": "v", "unit": "nM"}, "time": {"unit": "s"}, "source": {"lab": "L"},
                                   "conditions": {text: "1"}})  # fmt: skip
    with pytest.raises(InputError, match="field 'observable.id'"):
        catalog.add(
            data,
            options={
                "observable": {"id": text, "unit": "nM"},
                "time": {"unit": "s"},
                "source": {"lab": "L"},
            },
        )


def test_dataset_id_prefix_search_escapes_like_wildcards(catalog, tmp_path):
    data = write(tmp_path / "a.csv", "time,value\n0,1\n1,2\n")
    catalog.add(
        data,
        options={
            "observable": {"id": "v", "unit": "nM"},
            "time": {"unit": "s"},
            "source": {"lab": "L"},
        },
    )
    assert catalog.store.dataset_ids_like("l_v_") == {"l_v_01"}
    assert catalog.store.dataset_ids_like("l%") == set()  # % is a character here, not a wildcard


def test_file_size_limits(tmp_path):
    path = write(tmp_path / "big.csv", "time,value\n" + "0,1\n" * 100)
    with pytest.raises(InputError, match="more than the limit of 50 bytes"):
        read_table(path, max_bytes=50)
    sidecar = tmp_path / "huge.toml"
    sidecar.write_text("# " + "x" * (1024 * 1024 + 10))
    from curate.ingest.sidecar import load_sidecar

    with pytest.raises(InputError, match="a sidecar larger than"):
        load_sidecar(sidecar)


def test_symlinked_sidecar_target_outside_is_refused(catalog, tmp_path):
    outside = write(tmp_path / "outside" / "secret.csv", "time,value\n0,1\n1,2\n")
    inner = tmp_path / "inner"
    inner.mkdir()
    os.symlink(outside, inner / "data.csv")
    sidecar = write(inner / "meta.toml", 'data_file = "data.csv"\n' + SIDECAR)
    with pytest.raises(InputError, match="leads outside the sidecar's folder"):
        catalog.add(sidecar)
