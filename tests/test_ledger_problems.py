"""Stored PEtab problems: every file kept byte for byte, versioned, sealed, checked by verify.

Problems: Boehm et al., J. Proteome Res. 2014 (doi 10.1021/pr5006923) and Fujita et al.,
Sci. Signal. 2010 (doi 10.1126/scisignal.2000810), as kept in the public PEtab benchmark
collection (tests/data/petab/). The outside checks: each stored file's sha256 against
hashlib's digest of the file on disk, and the tables against petab's own readers.
"""

from __future__ import annotations

import hashlib
import logging
import shutil
import sqlite3

import pandas as pd
import pytest
import yaml
from conftest import DATA, LONG_CSV, write

from curate.errors import InputError, NotFoundError
from curate.ledger.problems import problem_record_hash

BENCHMARKS = ("Boehm_JProteomeRes2014", "Fujita_SciSignal2010")
OPTIONS = {"observable": {"id": "x", "unit": "nM"}, "time": {"unit": "s"}, "source": {"lab": "L"}}


def problem_path(name):
    return DATA / "petab" / name / f"{name}.yaml"


def named_files(name):
    """Give the file names the benchmark's YAML names (read with PyYAML, not curate)."""
    content = yaml.safe_load(problem_path(name).read_text())
    names = {f"{name}.yaml", content["parameter_file"]}
    for part in content["problems"]:
        for field in ("sbml_files", "condition_files", "observable_files", "measurement_files",
                      "visualization_files"):  # fmt: skip
            names.update(part.get(field, []))
    return names


def _raw(catalog):
    return sqlite3.connect(catalog.path, isolation_level=None)


def dump(catalog):
    conn = _raw(catalog)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()


@pytest.fixture
def boehm(catalog):
    """A catalog holding the Boehm problem; give (catalog, stored problem id)."""
    results = catalog.import_petab(problem_path("Boehm_JProteomeRes2014"))
    return catalog, results[0].problem.id


@pytest.mark.parametrize("name", BENCHMARKS)
def test_every_file_of_a_benchmark_problem_is_stored_byte_for_byte(catalog, name):
    results = catalog.import_petab(problem_path(name))
    stored = catalog.problem(results[0].problem.id)
    assert stored.version == 1 and stored.source == f"{name}.yaml"
    assert set(stored.files) == named_files(name)  # the YAML, model, every table; test_data/ not
    folder = problem_path(name).parent
    for file_name, content in stored.files.items():
        on_disk = (folder / file_name).read_bytes()
        assert content == on_disk, file_name
        assert stored.manifest[file_name] == hashlib.sha256(on_disk).hexdigest()
    model = next(n for n in named_files(name) if n.endswith(".xml"))
    assert stored.sbml_sha256 == hashlib.sha256((folder / model).read_bytes()).hexdigest()
    assert stored.sbml_text == (folder / model).read_text(encoding="utf-8")
    assert stored.yaml_text == problem_path(name).read_text(encoding="utf-8")


@pytest.mark.parametrize("name", BENCHMARKS)
def test_tables_read_as_petab_reads_them(catalog, name):
    petab_v1 = pytest.importorskip("petab.v1")
    logging.getLogger("petab").setLevel(logging.ERROR)
    stored = catalog.problem(catalog.import_petab(problem_path(name))[0].problem.id)
    reference = petab_v1.Problem.from_yaml(str(problem_path(name)))
    pd.testing.assert_frame_equal(stored.condition_df, reference.condition_df)
    pd.testing.assert_frame_equal(stored.observable_df, reference.observable_df)
    pd.testing.assert_frame_equal(stored.parameter_df, reference.parameter_df)
    pd.testing.assert_frame_equal(stored.measurement_df, reference.measurement_df)
    pd.testing.assert_frame_equal(stored.visualization_df, reference.visualization_df)


def test_models_lists_the_ids_of_each_table_and_the_linked_datasets(catalog):
    petab_v1 = pytest.importorskip("petab.v1")
    logging.getLogger("petab").setLevel(logging.ERROR)
    imported = {name: catalog.import_petab(problem_path(name)) for name in BENCHMARKS}
    summaries = {s.source: s.to_dict() for s in catalog.models()}
    assert set(summaries) == {f"{name}.yaml" for name in BENCHMARKS}
    for name, results in imported.items():
        summary = summaries[f"{name}.yaml"]
        reference = petab_v1.Problem.from_yaml(str(problem_path(name)))
        assert list(summary) == [
            "id", "source", "sbml_sha256", "parameters", "observables", "conditions", "datasets"
        ]  # fmt: skip
        assert summary["id"] == results[0].problem.id
        assert summary["parameters"] == list(reference.parameter_df.index)
        assert summary["observables"] == list(reference.observable_df.index)
        assert summary["conditions"] == list(reference.condition_df.index)
        assert summary["datasets"] == sorted(r.id for r in results)
    assert summaries["Boehm_JProteomeRes2014.yaml"]["id"] == "boehm_jproteomeres2014_01"


def test_datasets_keep_a_link_to_their_problem_and_their_rows(boehm):
    catalog, problem_id = boehm
    for version in catalog.list():
        annotations = version.record.annotations
        assert annotations["petab_problem"] == {"id": problem_id, "version": 1}
        assert set(annotations["petab_rows"]["observableId"]) == {version.record.observable.id}


def test_reimport_recognises_the_problem_and_stores_nothing(boehm):
    catalog, problem_id = boehm
    before, head = dump(catalog), catalog.head()
    again = catalog.import_petab(problem_path("Boehm_JProteomeRes2014"))
    assert {(r.problem.id, r.problem.version, r.problem.stored) for r in again} == {
        (problem_id, 1, False)
    }
    assert not any(r.added for r in again)
    assert dump(catalog) == before and catalog.head() == head


def edited_copy(tmp_path, name="Boehm_JProteomeRes2014", *, old="", new=""):
    """Copy a benchmark problem and replace ``old`` by ``new`` in its parameter table."""
    folder = tmp_path / name
    shutil.copytree(DATA / "petab" / name, folder)
    table = next(folder.glob("parameters_*.tsv"))
    text = table.read_text()
    assert old in text
    table.write_text(text.replace(old, new, 1))
    return folder / f"{name}.yaml"


def test_an_edited_problem_becomes_its_next_version(boehm, tmp_path):
    catalog, problem_id = boehm
    # Boehm's parameter table: Epo_degradation_BaF3 ... lowerBound 1e-05
    edited = edited_copy(tmp_path, old="1E-05", new="1E-06")
    results = catalog.import_petab(edited)
    assert {(r.problem.id, r.problem.version, r.problem.stored) for r in results} == {
        (problem_id, 2, True)
    }
    assert not any(r.added for r in results)  # the same measurements: the datasets are known
    newest, first = catalog.problem(problem_id), catalog.problem(problem_id, 1)
    assert newest.version == 2 and b"1E-06" in newest.files[newest.file_names("parameter")[0]]
    assert first.files == catalog.problem(problem_id, 1).files
    assert first.parameter_df.loc["Epo_degradation_BaF3", "lowerBound"] == 1e-05
    # the unchanged files are stored once
    count = _raw(catalog).execute("SELECT COUNT(*) FROM problem_files").fetchone()[0]
    assert count == len(first.files) + 1
    assert [p.version for p in catalog.problems()] == [2]
    assert catalog.verify().ok
    with pytest.raises(NotFoundError, match="has versions 1 to 2, not 3"):
        catalog.problem(problem_id, 3)


def test_a_problem_with_another_model_is_another_problem(boehm, tmp_path):
    catalog, problem_id = boehm
    folder = tmp_path / "Boehm_JProteomeRes2014"
    shutil.copytree(DATA / "petab" / "Boehm_JProteomeRes2014", folder)
    model = folder / "model_Boehm_JProteomeRes2014.xml"
    model.write_text(
        model.read_text().replace('model id="Boehm_JProteomeRes2014"', 'model id="other"')
    )
    data = folder / "measurementData_Boehm_JProteomeRes2014.tsv"  # datasetIds become dataset ids
    data.write_bytes(data.read_bytes().replace(b"\tmodel1_data1_", b"\tother_data1_"))
    results = catalog.import_petab(folder / "Boehm_JProteomeRes2014.yaml", lab="Other Lab")
    assert results[0].problem.id == "boehm_jproteomeres2014_02" != problem_id
    assert results[0].problem.version == 1
    assert len(catalog.problems()) == 2


def test_a_catalog_from_before_stored_problems_gains_them_on_open(tmp_path, monkeypatch):
    import curate
    from curate.ledger import store

    path = tmp_path / "old.db"
    with monkeypatch.context() as patch:  # a catalog made before the 0003 step existed
        patch.setattr(store, "MIGRATIONS", store.MIGRATIONS[:2])
        with curate.open_catalog(path, actor="tester") as old:
            old.add(write(tmp_path / "a.csv", LONG_CSV), options=OPTIONS)
            assert "problems" not in old.store.db.table_names()
    with curate.open_catalog(path, actor="tester") as reopened:
        assert reopened.store.applied_migrations()[2:] == ["0003_problems", "0004_censored"]
        assert reopened.problems() == [] and reopened.models() == []
        reopened.import_petab(problem_path("Boehm_JProteomeRes2014"))
        report = reopened.verify()
        assert report.ok and (report.datasets, report.stored_problems) == (4, 1)


def test_an_unknown_problem_id_is_named(catalog):
    with pytest.raises(NotFoundError, match="no stored problem 'nope'.*`curate models`"):
        catalog.problem("nope")


def test_a_bad_problem_stores_nothing(boehm, tmp_path):
    catalog, _ = boehm
    before = dump(catalog)
    folder = tmp_path / "broken"
    shutil.copytree(DATA / "petab" / "Fujita_SciSignal2010", folder)
    (folder / "model_Fujita_SciSignal2010.xml").write_text("<sbml><model id='x'>")
    with pytest.raises(InputError, match="model_Fujita_SciSignal2010.xml: not a readable SBML"):
        catalog.import_petab(folder / "Fujita_SciSignal2010.yaml")
    (folder / "model_Fujita_SciSignal2010.xml").unlink()
    with pytest.raises(InputError, match="field 'sbml_files': file 'model_Fujita_SciSignal2010"):
        catalog.import_petab(folder / "Fujita_SciSignal2010.yaml")
    assert dump(catalog) == before


def test_a_problem_whose_datasets_are_refused_is_not_stored_either(catalog, tmp_path):
    # one transaction: the problem's files, its manifest and its event go with the datasets
    catalog.import_petab(problem_path("Boehm_JProteomeRes2014"), unit="nM")
    before = dump(catalog)
    edited = edited_copy(tmp_path, old="1E-05", new="1E-06")
    with pytest.raises(InputError, match=r"unit 's' \(\[time\]\) does not fit"):
        catalog.import_petab(edited, unit="s")
    assert dump(catalog) == before
    assert [p.version for p in catalog.problems()] == [1]


# -- tamper evidence: each edit made directly in the SQLite file is named by verify ------------


def test_verify_counts_stored_problems(boehm):
    catalog, _ = boehm
    report = catalog.verify()
    assert report.ok, report.problems
    assert (report.stored_problems, report.problem_files) == (1, 7)
    assert report.to_dict()["stored_problems"] == 1


def test_verify_detects_an_edited_byte_of_a_stored_sbml_file(boehm):
    catalog, problem_id = boehm
    stored = catalog.problem(problem_id)
    name = stored.sbml_name
    sha = stored.manifest[name]
    content = bytearray(stored.files[name])
    content[content.index(b"k_phos")] = ord("K")  # one byte of the model
    conn = _raw(catalog)
    conn.execute("UPDATE problem_files SET content = ? WHERE sha256 = ?", [bytes(content), sha])
    conn.close()
    assert catalog.verify().problems == [
        f"problem {problem_id} version 1: file '{name}' no longer matches its sha256 "
        f"{sha[:12]} (edited in the file)"
    ]


def test_verify_detects_an_edited_byte_of_a_stored_table(boehm):
    catalog, problem_id = boehm
    stored = catalog.problem(problem_id)
    name = stored.file_names("condition")[0]
    sha = stored.manifest[name]
    conn = _raw(catalog)
    conn.execute(
        "UPDATE problem_files SET content = ? WHERE sha256 = ?",
        [stored.files[name].replace(b"condition1", b"condition2"), sha],
    )
    conn.close()
    assert catalog.verify().problems == [
        f"problem {problem_id} version 1: file '{name}' no longer matches its sha256 "
        f"{sha[:12]} (edited in the file)"
    ]


def test_verify_detects_a_deleted_problem_row(boehm):
    catalog, problem_id = boehm
    conn = _raw(catalog)
    conn.execute("DELETE FROM problems")
    conn.close()
    assert catalog.verify().problems == [
        f"problem {problem_id} version 1: logged as written but missing from the file (deleted?)"
    ]


def test_verify_detects_a_deleted_problem_file(boehm):
    catalog, problem_id = boehm
    stored = catalog.problem(problem_id)
    name = stored.file_names("parameter")[0]
    conn = _raw(catalog)
    conn.execute("DELETE FROM problem_files WHERE sha256 = ?", [stored.manifest[name]])
    conn.close()
    assert catalog.verify().problems == [
        f"problem {problem_id} version 1: file '{name}' ({stored.manifest[name][:12]}) is "
        "missing from the catalog (deleted?)"
    ]
    with pytest.raises(NotFoundError, match=f"file '{name}' is missing from the catalog"):
        catalog.problem(problem_id)


def test_verify_detects_an_edited_manifest(boehm):
    catalog, problem_id = boehm
    conn = _raw(catalog)
    (manifest,) = conn.execute("SELECT manifest_json FROM problems").fetchone()
    conn.execute(
        "UPDATE problems SET manifest_json = ?", [manifest.replace('"Boehm_', '"boehm_', 1)]
    )
    conn.close()
    assert catalog.verify().problems == [
        f"problem {problem_id} version 1: its id, source or manifest no longer match its "
        "record hash (edited in the file)"
    ]


def test_verify_detects_a_problem_row_no_event_wrote(boehm):
    catalog, _ = boehm
    conn = _raw(catalog)
    conn.execute(
        "INSERT INTO problems SELECT 'forged_01', version, created_at, source, content_sha256,"
        " manifest_json, record_hash FROM problems"
    )
    assert catalog.verify().problems == [
        "problem forged_01 version 1: its id, source or manifest no longer match its record "
        "hash (edited in the file)"
    ]
    # even with a record hash recomputed to fit, no event wrote it
    (source, manifest) = conn.execute("SELECT source, manifest_json FROM problems").fetchone()
    sealed = problem_record_hash("forged_01", 1, source, manifest)
    conn.execute("UPDATE problems SET record_hash = ? WHERE problem_id = 'forged_01'", [sealed])
    conn.close()
    assert catalog.verify().problems == [
        "problem forged_01 version 1: no event in the log records this version as written"
    ]


def test_verify_detects_an_inserted_problem_file(boehm):
    catalog, _ = boehm
    content = b"parameterId\n"
    sha = hashlib.sha256(content).hexdigest()
    conn = _raw(catalog)
    conn.execute("INSERT INTO problem_files VALUES (?, ?, ?)", [sha, len(content), content])
    conn.close()
    assert catalog.verify().problems == [
        f"problem file {sha[:12]}: stored, but no stored problem names it (inserted in the "
        "file, or its problem deleted?)"
    ]
