"""The streamed weighted table equals the whole one: frame, summary, CSV bytes, Parquet values."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import add_mixed_observable

from curate.export.table import table_bytes, unit_symbols
from curate.jsontext import finite
from curate.weighting import Selection, load_policy, resolve_policy, weighted_table
from curate.weighting.stream import weighted_stream

BALANCED = """
name = "balanced"
exclude = ["X"]
ungraded = "C"
[inflation]
A = 1.0
B = 2.0
C = 4.0
D = 16.0
[floors]
absolute = 0.05
relative = 0.01
[balance]
mode = "sqrt"
lab_cap = 0.6
"""


def varied_catalog(catalog):
    """Log datasets of every kind the table meets: several units and observables, censored
    points, relative units beside absolute ones, replicates, a dataset without sds (its noise
    estimated), masked points, a retired dataset, an excluded grade, conditions numeric and text
    (present in some datasets only), and the weighted table's own column names as condition keys."""
    rng = np.random.default_rng(11)
    add_mixed_observable(catalog)
    minutes = np.arange(0.0, 40.0, 2.0)
    drafts = []
    for k, (unit, lab) in enumerate([("nM", "Lab North"), ("uM", "Lab South"), ("pM", "Lab East")]):
        value = (20 * (1 - np.exp(-minutes / 9.0)) + rng.normal(0, 0.3, 20)) * {"nM": 1, "uM": 1e-3, "pM": 1e3}[unit]
        drafts.append(catalog.draft(minutes, value, sd=np.abs(value) * 0.05 + 1e-3, observable="velarin_conc",
                                    unit=unit, time_unit="min", lab=lab, uncertainty={"type": "sd"},
                                    conditions={"dose": "10 uM", "temperature": 30.0 + k, "cell_line": "HK-2"},
                                    trust={"grade": "ABC"[k], "rationale": "checked"}))  # fmt: skip
    censored = np.zeros(20, dtype=np.int8)
    censored[:3], censored[-2:] = 1, 2
    drafts.append(catalog.draft(minutes, np.linspace(0.5, 30.0, 20), sd=np.full(20, 0.4), observable="velarin_conc",
                                unit="nM", time_unit="min", lab="Lab West", censored=censored,
                                uncertainty={"type": "sd"}, conditions={"dose": "3 uM", "sd": "x"}))  # fmt: skip
    replicate = np.repeat([1, 2], 10)
    drafts.append(catalog.draft(np.tile(minutes[:10], 2), np.tile(np.linspace(1, 2, 10), 2) + rng.normal(0, 0.05, 20),
                                replicate=replicate, observable="front_speed", unit="um/min", time_unit="min",
                                lab="Lab North", conditions={"substrate": "glass"}))  # no sd  # fmt: skip
    drafts.append(catalog.draft(minutes, np.linspace(2, 9, 20), sd=np.full(20, 0.2), observable="front_speed",
                                unit="um/s", time_unit="min", lab="Lab South", uncertainty={"type": "sd"},
                                trust={"grade": "X", "rationale": "broken probe"}))  # fmt: skip
    drafts.append(catalog.draft(minutes, np.linspace(2, 9, 20), sd=np.full(20, 0.2), observable="front_speed",
                                unit="um/s", time_unit="min", lab="Lab East", uncertainty={"type": "sd"},
                                conditions={"passage": 2.0}))  # fmt: skip
    gaps = np.full(20, 0.3)
    gaps[[3, 9]] = np.nan  # sds the lab left out: the noise estimate stands in there
    drafts.append(catalog.draft(minutes, np.linspace(5, 1, 20) + rng.normal(0, 0.2, 20), sd=gaps,
                                observable="velarin_conc", unit="nM", time_unit="min", lab="Lab East",
                                uncertainty={"type": "sd"}, conditions={"cell_line": "HK-2"}))  # fmt: skip
    added = catalog.add_drafts(drafts)
    catalog.estimate_noise([added[4].id, added[7].id])
    catalog.mask(added[0].id, ["4", "10"], reason="bubble in the well")
    catalog.retire(added[2].id, reason="superseded by a re-run")
    return catalog


def old_and_new(catalog, policy, selection, rows_per_batch):
    whole = weighted_table(catalog, policy, selection)
    stream = weighted_stream(catalog, policy, selection, rows_per_batch=rows_per_batch)
    return whole, stream


def csv_and_parquet_of_batches(stream, folder):
    from curate.export.table import write_table_batches

    digests = write_table_batches(stream.schema, stream.batches(), folder)
    return digests, (folder / "points.csv").read_bytes(), pq.read_table(folder / "points.parquet")


@pytest.mark.parametrize("rows_per_batch", [1, 37, 10_000])
@pytest.mark.parametrize("policy_text", [None, BALANCED])
def test_the_stream_gives_the_whole_table_and_its_files(catalog, tmp_path, rows_per_batch, policy_text):
    varied_catalog(catalog)
    policy = resolve_policy(None) if policy_text is None else load_policy_text(tmp_path, policy_text)
    selections = (Selection(), Selection(include_retired=True), Selection(observables=("front_speed",)),
                  Selection(conditions=(("cell_line", "HK-2"),)), Selection(labs=("Lab East", "Lab North"), grades=("C",)))  # fmt: skip
    for selection in selections:
        whole, stream = old_and_new(catalog, policy, selection, rows_per_batch)
        pd.testing.assert_frame_equal(stream.table, whole.table, check_exact=True)
        assert stream.summary.to_dict() == whole.summary.to_dict()
        assert [v.record_hash for v in stream.versions] == [v.record_hash for v in whole.versions]
        pd.testing.assert_frame_equal(stream.aside.points, whole.aside.points)
        folder = tmp_path / f"out_{len(list(tmp_path.iterdir()))}"
        digests, csv, parquet = csv_and_parquet_of_batches(stream, folder)
        frame = unit_symbols(whole.table)
        old_csv = table_bytes(frame, "csv")
        assert csv == old_csv  # byte for byte
        assert digests["points.csv"] == hashlib.sha256(old_csv).hexdigest()
        old_parquet = pq.read_table(pa.BufferReader(table_bytes(frame, "parquet")))
        assert parquet.schema.equals(old_parquet.schema, check_metadata=True)
        assert parquet.equals(old_parquet)
        # a Parquet reader sees the same frame (categories, nulls, NaN) as it sees today's file
        pd.testing.assert_frame_equal(parquet.to_pandas(), old_parquet.to_pandas(), check_exact=True)


def load_policy_text(folder, text):
    path = folder / "policy.toml"
    path.write_text(text, encoding="utf-8")
    return load_policy(path)


def test_the_varied_catalog_holds_what_it_claims(catalog):
    varied_catalog(catalog)
    table = weighted_table(catalog, resolve_policy(None), Selection()).table
    assert set(table["censored"].astype(str)) == {"", "below", "above"}
    assert table["relative"].any() and not table["relative"].all()
    assert {"condition_sd", "dose", "substrate", "passage"} <= set(table.columns)
    assert table["replicate"].notna().any() and table["replicate"].isna().any()
    assert table["sd_source"].astype(str).str.startswith("noise estimate").any()
    assert "X" not in set(table["grade_used"])
    assert table["unit"].nunique() >= 3


def test_the_table_export_streams_and_keeps_files_and_manifest(catalog, tmp_path):
    varied_catalog(catalog)
    result = catalog.export("table", tmp_path / "t")
    whole = weighted_table(catalog, resolve_policy(None), Selection())
    frame = unit_symbols(whole.table)
    assert result.files["points.csv"] == hashlib.sha256(table_bytes(frame, "csv")).hexdigest()
    back = pq.read_table(tmp_path / "t" / "points.parquet")
    assert back.equals(pq.read_table(pa.BufferReader(table_bytes(frame, "parquet"))))
    manifest = json.loads((tmp_path / "t" / "manifest.json").read_text())
    assert manifest["weights"] == finite(whole.summary.to_dict())
    assert [d["record_hash"] for d in manifest["datasets"]] == [v.record_hash for v in whole.versions]
    assert set(manifest["files"]) == {"points.csv", "points.parquet", "units.json", "README.txt",
                                      "masked_points.csv"}  # fmt: skip
    readme = (tmp_path / "t" / "README.txt").read_text()
    assert "Censored points: 3 below and 2 above a limit." in readme
    assert "Masked points: 2 point(s) of 1 dataset(s)" in readme
    assert catalog.verify().problems == []


def test_the_stream_refuses_what_the_table_refuses(catalog, tmp_path):
    catalog.add_drafts([catalog.draft([0.0, 1.0, 2.0], [0.0, 0.0, 0.0], sd=[0.0, 0.0, 0.0], observable="velarin_conc",
                                      unit="nM", time_unit="s", lab="L", uncertainty={"type": "sd"})])  # fmt: skip
    policy = load_policy_text(tmp_path, BALANCED.replace("absolute = 0.05", "absolute = 0.0"))
    with pytest.raises(Exception) as whole:
        weighted_table(catalog, policy, Selection())
    with pytest.raises(type(whole.value)) as streamed:
        weighted_stream(catalog, policy, Selection())
    assert str(streamed.value) == str(whole.value) and "infinite weight" in str(whole.value)


def test_the_stream_of_the_example_data_is_their_table(catalog, examples, tmp_path):
    catalog.intake(examples)
    catalog.estimate_noise()
    policy = resolve_policy(None)
    whole, stream = old_and_new(catalog, policy, Selection(), 50)
    pd.testing.assert_frame_equal(stream.table, whole.table, check_exact=True)
    assert stream.summary.to_dict() == whole.summary.to_dict()
    _, csv, parquet = csv_and_parquet_of_batches(stream, tmp_path / "out")
    frame = unit_symbols(whole.table)
    assert csv == table_bytes(frame, "csv")
    assert parquet.equals(pq.read_table(pa.BufferReader(table_bytes(frame, "parquet"))))


def test_the_catalog_gives_the_weighted_table_as_record_batches(catalog):
    varied_catalog(catalog)
    batches = catalog.weighted_batches(rows_per_batch=25)
    first = next(batches)
    assert first.num_rows >= 25 and first.schema.names == list(catalog.weighted_table().columns)
    frame = pa.Table.from_batches([first, *batches]).to_pandas()
    pd.testing.assert_frame_equal(frame, catalog.weighted_table(), check_exact=True)
    assert catalog.weights().to_dict() == weighted_table(catalog, resolve_policy(None), Selection()).summary.to_dict()
