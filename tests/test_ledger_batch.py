"""Batch intake: many drafts written with a few statements and sealed by one event."""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest

import curate
from curate.errors import InputError
from curate.records import record_hash


def series_drafts(catalog, n, *, seed=0):
    rng = np.random.default_rng(seed)
    t = np.arange(20, dtype=float) * 30.0
    return [
        catalog.draft(t, 20 * (1 - np.exp(-t / 900.0)) + rng.normal(0, 0.5, 20),
                      sd=np.full(20, 0.5) + 0.01 * k, observable="velarin_conc", unit="nM",
                      time_unit="s", lab=f"Lab {k % 3}", conditions={"dose": f"{k % 5} nM"})
        for k in range(n)
    ]  # fmt: skip


@pytest.fixture
def batch_catalog(tmp_path):
    with curate.open_catalog(tmp_path / "batch.db", actor="tester") as catalog:
        results = catalog.add_drafts(series_drafts(catalog, 50), batch=True)
        assert [r.added for r in results] == [True] * 50
        yield catalog


def test_a_batch_is_sealed_by_one_event_naming_every_dataset(batch_catalog):
    events = batch_catalog.events()
    assert [e["kind"] for e in events] == ["add_batch"]
    entries = events[0]["payload"]["datasets"]
    assert len(entries) == 50
    for ident, version, sealed, content, _origin, _raw in entries:
        shown = batch_catalog.show(ident)
        assert (version, sealed, content) == (1, shown.record_hash, shown.record.content_hash)
    assert batch_catalog.verify().ok
    history = batch_catalog.history(entries[7][0])
    assert [(h.seq, h.kind, h.version) for h in history] == [(1, "add", 1)]


def test_a_batch_writes_the_records_one_by_one_adds_write(tmp_path):
    with curate.open_catalog(tmp_path / "each.db", actor="tester") as each, \
            curate.open_catalog(tmp_path / "batch.db", actor="tester") as batch:  # fmt: skip
        one = each.add_drafts(series_drafts(each, 12))
        many = batch.add_drafts(series_drafts(batch, 12), batch=True)
        assert [r.to_dict() for r in one] == [r.to_dict() for r in many]
        for result in one:
            a, b = each.show(result.id), batch.show(result.id)
            assert a.record == b.record and a.record_hash == b.record_hash
            assert np.array_equal(each.arrays(result.id).value, batch.arrays(result.id).value)
        assert len(each.events()) == 12 and len(batch.events()) == 1


def test_verify_names_the_one_tampered_record_of_a_batch(batch_catalog):
    victim = batch_catalog.list()[23].id
    conn = sqlite3.connect(batch_catalog.path)
    (text,) = conn.execute(
        "SELECT record_json FROM versions WHERE dataset_id = ?", [victim]
    ).fetchone()
    record = json.loads(text)
    record["source"]["lab"] = "Someone Else"
    conn.execute(
        "UPDATE versions SET record_json = ? WHERE dataset_id = ?", [json.dumps(record), victim]
    )
    conn.commit()
    conn.close()
    report = batch_catalog.verify()
    assert report.problems == [
        f"dataset {victim} version 1: its metadata no longer match their record hash "
        "(edited in the file)"
    ]


def test_verify_names_a_record_rehashed_to_hide_its_edit(batch_catalog):
    # the row's own hash recomputed after the edit: only the batch event can tell
    victim = batch_catalog.list()[41].id
    conn = sqlite3.connect(batch_catalog.path)
    (text,) = conn.execute(
        "SELECT record_json FROM versions WHERE dataset_id = ?", [victim]
    ).fetchone()
    edited = text.replace('"lab":"Lab', '"lab":"Lax')
    assert edited != text
    conn.execute("UPDATE versions SET record_json = ?, lab = ?, record_hash = ? WHERE dataset_id = ?",
                 [edited, json.loads(edited)["source"]["lab"], record_hash(victim, 1, edited), victim])  # fmt: skip
    conn.commit()
    conn.close()
    report = batch_catalog.verify()
    assert report.problems == [
        f"dataset {victim} version 1: no event in the log records this version as written"
    ]


def test_a_file_repeated_inside_a_batch_is_a_duplicate(memory_catalog):
    drafts = series_drafts(memory_catalog, 4)
    results = memory_catalog.add_drafts([*drafts, drafts[2]], batch=True)
    assert [r.added for r in results] == [True, True, True, True, False]
    assert results[4].duplicate_of == results[2].id
    assert len(memory_catalog.list()) == 4
    # and a batch again of what is logged adds nothing and writes no event
    again = memory_catalog.add_drafts(series_drafts(memory_catalog, 4), batch=True)
    assert [r.added for r in again] == [False] * 4
    assert len(memory_catalog.events()) == 1


def test_a_batch_is_all_or_nothing(memory_catalog):
    drafts = series_drafts(memory_catalog, 3)
    drafts.append(memory_catalog.draft([0, 1], [1, 3], observable="velarin_conc", unit="s",
                                       time_unit="s", lab="L"))  # fmt: skip
    with pytest.raises(InputError, match=r"unit 's' \(\[time\]\) does not fit observable"):
        memory_catalog.add_drafts(drafts, batch=True)
    assert memory_catalog.list() == [] and memory_catalog.events() == []
