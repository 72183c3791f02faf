"""The catalog: immutable versions, retire/revise, history, filters, verify and tamper evidence."""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
from conftest import LONG_CSV, cut_event_tail, write

import curate
from curate.errors import InputError, NotFoundError
from curate.present.text import verify_text
from curate.weighting import Selection

OPTIONS = {
    "observable": {"id": "velarin_conc", "unit": "nM"},
    "time": {"unit": "min"},
    "source": {"lab": "Harrow Point Lab"},
}


def add(catalog, tmp_path, name, **overrides):
    text = LONG_CSV if "values" not in overrides else overrides.pop("values")
    data = write(tmp_path / f"{name}.csv", text)
    options = {**OPTIONS, **overrides}
    return catalog.add(data, options=options)


@pytest.fixture
def filled(catalog, tmp_path):
    add(catalog, tmp_path, "a", conditions={"temperature": "37 degC", "dose": "1 uM"})
    add(
        catalog,
        tmp_path,
        "b",
        values="time,value\n0,2\n1,3\n2,5\n",
        conditions={"temperature": "30 degC", "dose": "10 uM"},
        trust={"grade": "A", "rationale": "replicated, calibrated"},
    )
    add(
        catalog,
        tmp_path,
        "c",
        values="time,value\n0,5\n1,6\n2,8\n",
        source={"lab": "Quillfen Institute"},
        observable={"id": "glint", "unit": "a.u."},
        conditions={"temperature": "37 degC", "dose": "10 uM"},
    )
    return catalog


def test_open_catalog_uses_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("CURATE_CATALOG", str(tmp_path / "env.db"))
    with curate.open_catalog() as catalog:
        assert catalog.path == str(tmp_path / "env.db")
    assert (tmp_path / "env.db").exists()


def test_wal_mode_and_migrations(catalog):
    mode = catalog.store.db.execute("PRAGMA journal_mode").fetchone()[0]
    assert mode == "wal"
    assert catalog.store.applied_migrations() == [
        "0001_initial", "0002_policies", "0003_problems", "0004_censored",
    ]  # fmt: skip
    assert len(catalog.catalog_id) == 36


def test_reopening_keeps_catalog_id(tmp_path):
    with curate.open_catalog(tmp_path / "x.db") as first:
        ident = first.catalog_id
    with curate.open_catalog(tmp_path / "x.db") as second:
        assert second.catalog_id == ident
        assert second.store.applied_migrations() == [
            "0001_initial",
            "0002_policies",
            "0003_problems",
            "0004_censored",
        ]


def test_a_condition_filter_without_its_unit_is_refused_not_silently_empty(filled):
    # dose is stored as a quantity (1 uM = 1000 nM): "dose=1" would match nothing in silence
    with pytest.raises(
        InputError,
        match=r"holds dose as a quantity in nM .* not a plain number; give it with its unit",
    ):
        filled.list(conditions={"dose": "1"})
    from curate.weighting import Selection

    with pytest.raises(InputError, match="not a plain number"):
        filled.weighted_table(selection=Selection(conditions=(("dose", "1"),)))
    assert len(filled.list(conditions={"dose": "1 uM"})) >= 1


def test_list_filters(filled):
    assert [v.id for v in filled.list()] == [
        "harrow_velarin_conc_01",
        "harrow_velarin_conc_02",
        "quillfen_glint_01",
    ]
    assert [v.id for v in filled.list(observable="glint")] == ["quillfen_glint_01"]
    assert [v.id for v in filled.list(lab="Harrow Point Lab")] == [
        "harrow_velarin_conc_01",
        "harrow_velarin_conc_02",
    ]
    assert [v.id for v in filled.list(grade="A")] == ["harrow_velarin_conc_02"]
    assert len(filled.list(grade="none")) == 2
    # condition filters compare canonical values: 10 uM equals 10000 nM
    assert [v.id for v in filled.list(conditions={"dose": "10000 nM"})] == [
        "harrow_velarin_conc_02",
        "quillfen_glint_01",
    ]
    assert [v.id for v in filled.list(conditions={"temperature": "37degC", "dose": "10 uM"})] == [
        "quillfen_glint_01"
    ]
    with pytest.raises(InputError, match="unknown grade 'Z'"):
        filled.list(grade="Z")


def test_versions_are_immutable_and_retire_hides(filled):
    target = "harrow_velarin_conc_01"
    before = filled.show(target)
    retired = filled.retire(target, reason="superseded by a rerun")
    assert retired.version == 2 and retired.record.retired
    assert target not in [v.id for v in filled.list()]
    assert target in [v.id for v in filled.list(include_retired=True)]
    # version 1 is still there, unchanged, with the same arrays
    again = filled.show(target, version=1)
    assert again.record == before.record and again.record_hash == before.record_hash
    assert filled.arrays(target, 1).value.tolist() == filled.arrays(target).value.tolist()
    with pytest.raises(InputError, match="already retired"):
        filled.retire(target, reason="again")
    back = filled.revise(target, reason="rerun failed", unretire=True)
    assert back.version == 3 and not back.record.retired


def test_revise_makes_a_new_version_with_history(filled):
    target = "harrow_velarin_conc_01"
    new = filled.revise(
        target,
        reason="lab sent the right temperature",
        conditions={"temperature": "36.5 degC"},
        label="velarin (nM)",
    )
    assert new.version == 2
    assert new.record.conditions["temperature"].value == 36.5
    assert new.record.content_hash == filled.show(target, 1).record.content_hash
    history = filled.history(target)
    assert [h.kind for h in history] == ["add", "revise"]
    assert history[1].reason == "lab sent the right temperature"
    assert "conditions.temperature.value: 37.0 -> 36.5" in history[1].changes
    assert filled.verify().ok


def test_revise_requires_reason_and_a_change(filled):
    with pytest.raises(InputError, match="a reason is required"):
        filled.revise("harrow_velarin_conc_01", reason=" ", label="x")
    with pytest.raises(InputError, match="nothing would change"):
        filled.revise("harrow_velarin_conc_01", reason="r")


def test_show_unknown_version(filled):
    with pytest.raises(NotFoundError, match="has versions 1 to 1, not 4"):
        filled.show("harrow_velarin_conc_01", version=4)


def test_summary_shape(filled):
    summary = filled.show("harrow_velarin_conc_02").summary()
    for key in ("id", "version", "observable", "lab", "n_points", "grade"):
        assert key in summary
    assert summary["grade"] == "A" and summary["n_points"] == 3


def test_verify_clean(filled):
    report = filled.verify()
    assert report.ok, report.problems
    assert (report.datasets, report.versions, report.events, report.series) == (3, 3, 3, 3)


# -- tamper evidence: each edit made directly in the SQLite file is named by verify ------------


def _raw(catalog):
    return sqlite3.connect(catalog.path, isolation_level=None)


def test_verify_detects_edited_point_value(filled):
    content = filled.show("harrow_velarin_conc_02").record.content_hash
    conn = _raw(filled)
    blob = conn.execute("SELECT value FROM series WHERE content_hash = ?", [content]).fetchone()[0]
    values = np.frombuffer(blob, dtype="<f8").copy()
    values[1] *= 1.001
    conn.execute("UPDATE series SET value = ? WHERE content_hash = ?", [values.tobytes(), content])
    conn.close()
    report = filled.verify()
    assert not report.ok
    assert report.problems[0].startswith(
        "dataset harrow_velarin_conc_02 version 1: its measured values no longer match"
    )


def test_verify_detects_edited_metadata(filled):
    conn = _raw(filled)
    row = conn.execute(
        "SELECT record_json FROM versions WHERE dataset_id = 'quillfen_glint_01'"
    ).fetchone()
    record = json.loads(row[0])
    record["source"]["lab"] = "Someone Else"
    conn.execute(
        "UPDATE versions SET record_json = ? WHERE dataset_id = 'quillfen_glint_01'",
        [json.dumps(record)],
    )
    conn.close()
    report = filled.verify()
    assert not report.ok
    assert report.problems[0].startswith(
        "dataset quillfen_glint_01 version 1: its metadata no longer match"
    )


def test_verify_detects_edited_searchable_column(filled):
    conn = _raw(filled)
    conn.execute("UPDATE versions SET grade = 'A' WHERE dataset_id = 'quillfen_glint_01'")
    conn.close()
    report = filled.verify()
    assert report.problems == [
        "dataset quillfen_glint_01 version 1: the searchable columns "
        "disagree with its record (edited in the file)"
    ]


def test_verify_detects_deleted_event(filled):
    conn = _raw(filled)
    conn.execute("DELETE FROM events WHERE seq = 2")
    conn.close()
    report = filled.verify()
    assert "event log: event 3 stands where event 2 belongs" in report.problems[0]


def test_verify_detects_reordered_events(filled):
    conn = _raw(filled)
    conn.execute("UPDATE events SET seq = -1 WHERE seq = 1")
    conn.execute("UPDATE events SET seq = 1 WHERE seq = 2")
    conn.execute("UPDATE events SET seq = 2 WHERE seq = -1")
    conn.close()
    report = filled.verify()
    assert report.problems[0].startswith("event log: event 1 does not follow event 0")


def test_verify_detects_edited_event_payload(filled):
    conn = _raw(filled)
    conn.execute("UPDATE events SET actor = 'mallory' WHERE seq = 3")
    conn.close()
    assert filled.verify().problems == ["event log: event 3 was altered after it was written"]


def test_verify_detects_deleted_version(filled):
    conn = _raw(filled)
    conn.execute("DELETE FROM versions WHERE dataset_id = 'quillfen_glint_01'")
    conn.close()
    assert filled.verify().problems == [
        "dataset quillfen_glint_01 version 1: logged as written "
        "but missing from the file (deleted?)"
    ]


def test_verify_exit_code_on_cli(cli, tmp_path):
    data = write(tmp_path / "v.csv", LONG_CSV)
    assert (
        cli("add", data, "--observable", "x", "--unit", "nM", "--time-unit", "s", "--lab", "L").code
        == 0
    )
    assert cli("verify").code == 0
    conn = sqlite3.connect(cli.catalog, isolation_level=None)
    conn.execute("UPDATE events SET kind = 'forged'")
    conn.close()
    run = cli("verify")
    assert run.code == 1
    assert "NOT intact" in run.out and "event 1 was altered" in run.out


# -- policies are sealed by the chain -------------------------------------------------------

WITH_SD = Selection(ids=("harrow_velarin_conc_01",))  # the one dataset with reported sd


def _export(catalog, folder, **options):
    return catalog.export("table", folder, selection=WITH_SD, **options)


def test_verify_detects_edited_policy_text(filled, tmp_path):
    _export(filled, tmp_path / "t")
    assert filled.verify().ok and filled.verify().policies == 1
    conn = _raw(filled)
    (sha, text) = conn.execute("SELECT sha256, text FROM policies").fetchone()
    assert "A = 1.0" in text
    conn.execute("UPDATE policies SET text = ?", [text.replace("A = 1.0", "A = 0.1")])
    conn.close()
    assert filled.verify().problems == [
        f"policy 'curate default' ({sha[:12]}): its stored text no longer matches the hash "
        "sealed in event 4 (edited in the file)"
    ]


def test_verify_detects_a_policy_missing_from_the_file(filled, tmp_path):
    _export(filled, tmp_path / "t")
    sha = filled.store.db.execute("SELECT sha256 FROM policies").fetchone()[0]
    conn = _raw(filled)
    conn.execute("DELETE FROM policies")
    conn.close()
    assert filled.verify().problems == [
        f"event 4 (export) names policy {sha[:12]}, which the catalog no longer holds "
        "(deleted from the file?)"
    ]


def test_verify_detects_a_policy_whose_key_was_changed(filled, tmp_path):
    _export(filled, tmp_path / "t")
    sha = filled.store.db.execute("SELECT sha256 FROM policies").fetchone()[0]
    conn = _raw(filled)
    conn.execute("UPDATE policies SET sha256 = ?", ["f" * 64])
    conn.close()
    assert filled.verify().problems == [
        f"event 4 (export) names policy {sha[:12]}, which the catalog no longer holds "
        "(deleted from the file?)",
        "policy 'curate default' (ffffffffffff): stored, but no event names it (inserted in the file?)",
    ]


def test_a_second_run_seals_the_text_stored_by_the_first(filled, tmp_path):
    # same settings, other comments: the catalog keeps the first text, and both events seal it
    first = _export(filled, tmp_path / "t").manifest["policy"]["sha256"]
    other = tmp_path / "same.toml"
    default = filled.store.policy_text(first)
    other.write_text("# my copy\n" + default, encoding="utf-8")
    assert _export(filled, tmp_path / "u", policy=other).manifest["policy"]["sha256"] == first
    sealed = [e["payload"]["policy_text_sha256"] for e in filled.events() if e["kind"] == "export"]
    assert len(set(sealed)) == 1 and filled.verify().ok


def test_a_policy_named_only_by_events_from_before_text_sealing_is_listed_not_failed(filled):
    # an event written by an older curate names the policy's settings hash only
    with filled.transaction():
        filled.store.put_policy("e" * 64, "old lab policy", "lab.toml", "[inflation]\nA = 1.0\n")
        filled.record_event("export", {"format": "table", "policy_sha256": "e" * 64})
    report = filled.verify()
    assert report.ok and report.unsealed_policies == ["old lab policy"]
    assert (
        "text not sealed (stored by an older curate), not checked: policy 'old lab policy'"
        in str(verify_text(report))
    )


# -- the chain head: a cut tail is seen only against a head kept elsewhere ------------------


def _cut_tail(catalog, after_seq):
    cut_event_tail(catalog.path, after_seq)


def test_verify_reports_the_chain_head(filled):
    report = filled.verify()
    seq, digest = filled.head()
    assert (report.head_seq, report.head_hash) == (3, digest) and seq == 3
    assert report.to_dict()["head"] == {"seq": 3, "hash": digest}
    assert filled.verify(head=(3, digest)).ok
    assert filled.verify(head=(1, filled.events()[0]["hash"])).ok  # an older head: extended


def test_verify_detects_a_cut_tail_against_a_kept_head(filled):
    filled.retire("quillfen_glint_01", reason="saturated detector")
    anchor = filled.head()
    assert anchor[0] == 4
    _cut_tail(filled, 3)  # the retirement is silently undone: version 2 and event 4 are gone
    assert not filled.show("quillfen_glint_01").record.retired
    assert filled.verify().ok  # a hash chain alone cannot see a cut tail
    report = filled.verify(head=anchor)
    assert not report.ok
    assert report.problems == [
        f"the catalog no longer extends head 4:{anchor[1][:12]}: it ends at event 3 "
        "(events were cut off, or an older copy was put back)"
    ]


def test_verify_detects_a_rewritten_tail_against_a_kept_head(filled):
    filled.retire("quillfen_glint_01", reason="saturated detector")
    anchor = filled.head()
    _cut_tail(filled, 3)
    filled.record_event("note", {"text": "something else"})
    now = filled.head()
    assert now[0] == 4 and now[1] != anchor[1] and filled.verify().ok
    assert filled.verify(head=anchor).problems == [
        f"the catalog no longer extends head 4:{anchor[1][:12]}: its event 4 has hash "
        f"{now[1][:12]} (the log was rewritten from there)"
    ]


def test_parse_head_refuses_what_is_not_seq_colon_hash():
    from curate.ledger.provenance import parse_head

    digest = "ab" * 32
    parsed = parse_head(f" 12:{digest.upper()} ")
    assert (parsed.seq, parsed.hash) == (12, digest)
    for bad in ("12", f"x:{digest}", f"-1:{digest}", "12:abc", f"12:{'g' * 64}", ""):
        with pytest.raises(InputError, match="expected SEQ:HASH"):
            parse_head(bad)


def test_an_observable_keeps_one_dimension(filled, tmp_path):
    # velarin_conc holds nM data: a length is refused, naming both units and a dataset
    before = len(filled.events())
    with pytest.raises(InputError) as err:
        add(filled, tmp_path, "d", observable={"id": "velarin_conc", "unit": "furlongs"})
    message = str(err.value)
    assert "unit 'furlongs' ([length]) does not fit observable 'velarin_conc'" in message
    assert (
        "whose datasets are in nM ([substance] / [length] ** 3), e.g. harrow_velarin_conc_01"
        in message
    )
    assert len(filled.events()) == before
    # another concentration unit joins (it converts), and so do relative data
    assert add(filled, tmp_path, "e", observable={"id": "velarin_conc", "unit": "uM"}).added
    assert add(filled, tmp_path, "f", observable={"id": "velarin_conc", "unit": "a.u."}).added
    pct = {"id": "velarin_conc", "unit": "%"}
    peak = {"normalisation": {"kind": "peak"}}
    assert add(filled, tmp_path, "g", observable=pct, protocol=peak).added
    with pytest.raises(InputError, match=r"unit '%' \(dimensionless\) does not fit"):
        # percent of nothing (no reference): absolute, refused
        add(filled, tmp_path, "h", observable=pct, values="time,value\n0,10\n1,20\n")


def test_one_batch_never_mixes_dimensions(memory_catalog):
    # within one action too (add_drafts, import-petab): the second draft sees the first
    first = memory_catalog.draft([0, 1], [1, 2], observable="v", unit="nM", time_unit="s", lab="L")
    second = memory_catalog.draft([0, 1], [1, 3], observable="v", unit="s", time_unit="s", lab="L")
    with pytest.raises(InputError, match=r"unit 's' \(\[time\]\) does not fit observable 'v'"):
        memory_catalog.add_drafts([first, second])
    assert memory_catalog.list() == [] and memory_catalog.events() == []


def test_a_condition_key_keeps_one_kind(filled, tmp_path):
    before = len(filled.events())
    with pytest.raises(InputError) as err:
        add(filled, tmp_path, "d", conditions={"dose": "abc"})
    message = str(err.value)
    assert (
        "condition 'dose': 'abc' is text, but other datasets hold 'dose' as a quantity in nM"
        in message
    )
    assert "e.g. harrow_velarin_conc_01" in message
    with pytest.raises(InputError, match="'5 s' is a quantity in s .*as a quantity in nM"):
        add(filled, tmp_path, "e", conditions={"dose": "5 s"})
    assert len(filled.events()) == before
    # the same kind in another unit of its dimension joins
    assert add(filled, tmp_path, "f", conditions={"dose": "0.5 mM"}).added
    # and revise keeps the rule (the dataset's own old value does not count)
    with pytest.raises(InputError, match="condition 'dose': 'high' is text"):
        filled.revise("harrow_velarin_conc_01", reason="typo", conditions={"dose": "high"})
    only = add(filled, tmp_path, "g", conditions={"genotype": "wt"})
    assert filled.revise(only.id, reason="relabel", conditions={"genotype": "KO"}).version == 2


def test_one_batch_never_mixes_condition_kinds(memory_catalog):
    drafts = [
        memory_catalog.draft([0, 1], [1, 2], observable="v", unit="nM", time_unit="s", lab="L",
                             conditions={"dose": dose})
        for dose in ("10 uM", "abc")
    ]  # fmt: skip
    with pytest.raises(InputError, match="condition 'dose': 'abc' is text"):
        memory_catalog.add_drafts(drafts)
    assert memory_catalog.list() == []


def test_lowercase_grades_are_the_grades(filled):
    version = filled.grade("harrow_velarin_conc_01", "b", reason="one replicate")
    assert version.grade == "B"
    assert [v.id for v in filled.list(grade="b")] == ["harrow_velarin_conc_01"]
    assert [v.id for v in filled.list(grade="NONE")] == ["quillfen_glint_01"]
