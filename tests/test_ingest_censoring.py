"""Censored values at intake, in the catalog, in the weighted table and in every export."""

from __future__ import annotations

import hashlib
import json
import sqlite3

import numpy as np
import pandas as pd
import pytest
from conftest import write

from curate import Catalog
from curate.ledger.store import Store
from curate.records import ABOVE, BELOW, SeriesArrays, array_bytes, content_hash

BASE = ["--observable", "x", "--unit", "nM", "--time-unit", "min", "--lab", "L"]
LONG = "time,value,sd\n0,<0.5,\n1,1.2,0.1\n2,n.d.,\n3,>10,\n4,2.5,0.1\n5,<= 0.4,\n6,\u22653e1,\n"


def _old_content_hash(arrays: SeriesArrays, value_unit: str) -> str:
    # the hash as written before censoring existed (format 'curate-series-1'), spelled out here
    digest = hashlib.sha256()
    digest.update(f"curate-series-1|{value_unit}|second|{len(arrays)}".encode())
    for name in ("time", "value", "sd", "replicate", "n"):
        array = getattr(arrays, name)
        if array is None:
            digest.update(f"|{name}:none".encode())
        else:
            digest.update(f"|{name}:".encode())
            digest.update(array_bytes(name, array))
    return digest.hexdigest()


def test_series_without_censoring_keep_their_old_hash():
    arrays = SeriesArrays(time=np.arange(3.0), value=np.array([1.0, 2.0, 3.0]))
    zeros = SeriesArrays(time=np.arange(3.0), value=np.array([1.0, 2.0, 3.0]),
                         censored=np.zeros(3, np.int8))  # fmt: skip
    censored = SeriesArrays(time=np.arange(3.0), value=np.array([1.0, 2.0, 3.0]),
                            censored=np.array([1, 0, 0], np.int8))  # fmt: skip
    old = _old_content_hash(arrays, "nanomolar")
    assert content_hash(arrays, value_unit="nanomolar") == old
    assert content_hash(zeros, value_unit="nanomolar") == old
    assert content_hash(censored, value_unit="nanomolar") != old


def test_cli_stores_censored_points_with_kind_and_limit(cli, tmp_path):
    data = write(tmp_path / "a.csv", LONG)
    run = cli("add", data, *BASE, "--censored-token", "n.d.", "--detection-limit", "0.3")
    assert run.code == 0, run.err
    catalog = Catalog(cli.catalog)
    (version,) = catalog.list()
    arrays = catalog.arrays(version.id)
    assert arrays.censored is not None
    assert arrays.censored.tolist() == [BELOW, 0, BELOW, ABOVE, 0, BELOW, ABOVE]
    # limits in value, never NaN; nanomolar is the canonical unit
    assert arrays.value.tolist() == [0.5, 1.2, 0.3, 10.0, 2.5, 0.4, 30.0]
    assert version.record.annotations["censoring"] == {
        "below": 3, "above": 2, "written_as": {"<": 1, "<=": 1, ">": 1, "n.d.": 1, "\u2265": 1}
    }  # fmt: skip
    assert cli("verify").code == 0
    points = catalog.points(version.id)
    assert points["censored"].tolist() == ["below", "", "below", "above", "", "below", "above"]
    shown = cli("show", version.id).out
    assert "censored: the point lies below (above) its limit" in shown
    # the plausibility checks and the typical magnitude read the observed points only
    assert version.record.annotations["typical_magnitude"] == pytest.approx(1.85)


def test_sidecar_tokens_with_a_limit_in_their_own_unit_and_per_column(cli, tmp_path):
    data = write(tmp_path / "w.csv", "time,r1,r2\n0,BLQ,blq\n1,2.0,2.2\n2,3.0,<0.1\n")
    write(tmp_path / "w.toml", 'layout = "wide"\nobservable = {id = "x", unit = "uM"}\n'
          'time = {unit = "min"}\nsource = {lab = "L"}\n[censoring]\ntokens = ["BLQ"]\n'
          'limit = 600\nunit = "nM"\nlimits = {r2 = 800}\n')  # fmt: skip
    assert cli("add", data).code == 0
    catalog = Catalog(cli.catalog)
    arrays = catalog.arrays(catalog.list()[0].id)
    # stored in nanomolar: r1's token at 600 nM, r2's at its own 800 nM, '<0.1' uM = 100 nM
    frame = pd.DataFrame({"t": arrays.time, "v": arrays.value, "c": arrays.censored,
                          "r": arrays.replicate})  # fmt: skip
    frame = frame.sort_values(["t", "r"]).reset_index(drop=True)
    assert frame["v"].tolist() == [600.0, 800.0, 2000.0, 2200.0, 3000.0, 100.0]
    assert frame["c"].tolist() == [BELOW, BELOW, 0, 0, 0, BELOW]


def test_python_api_takes_censored_words(tmp_path):
    catalog = Catalog(tmp_path / "api.db")
    draft = catalog.draft([0, 1, 2, 3], [0.5, 1.0, 2.0, 9.0], observable="x", unit="nM",
                          time_unit="s", lab="L", censored=["below", "", "", "above"])  # fmt: skip
    (result,) = catalog.add_drafts([draft])
    arrays = catalog.arrays(result.id)
    assert arrays.censored is not None and arrays.censored.tolist() == [BELOW, 0, 0, ABOVE]
    again = catalog.draft([0, 1, 2, 3], [0.5, 1.0, 2.0, 9.0], observable="x", unit="nM",
                          time_unit="s", lab="L")  # fmt: skip
    # the same numbers observed are other data: another content hash
    assert again.record.content_hash != draft.record.content_hash
    with pytest.raises(Exception, match="point 2 is 'maybe'; expected '' \\(observed\\), 'below'"):
        catalog.draft([0, 1], [0.5, 1.0], observable="x", unit="nM", time_unit="s", lab="L",
                      censored=["below", "maybe"])  # fmt: skip


def test_an_older_catalog_gains_the_column_and_still_verifies(tmp_path):
    path = tmp_path / "old.db"
    catalog = Catalog(path)
    catalog.add_drafts([catalog.draft([0, 1, 2], [1.0, 2.0, 3.0], observable="x", unit="nM",
                                      time_unit="s", lab="L")])  # fmt: skip
    catalog.close()
    conn = sqlite3.connect(path)
    conn.execute("ALTER TABLE series DROP COLUMN censored")
    conn.execute("DELETE FROM migrations WHERE name = '0004_censored'")
    conn.commit()
    conn.close()
    store = Store(path)
    assert "0004_censored" in store.applied_migrations()
    store.close()
    reopened = Catalog(path)
    assert reopened.verify().ok
    assert reopened.arrays(reopened.list()[0].id).censored is None


def _censored_catalog(cli, tmp_path):
    rows = ["time,value,sd"]
    rng = np.random.default_rng(2)
    for t in range(12):
        y = 0.2 + 0.5 * t + rng.normal(0, 0.1)
        rows.append(f"{t},<0.6," if y < 0.6 else f"{t},{y:.3f},0.1")
    data = write(tmp_path / "c.csv", "\n".join(rows) + "\n")
    assert cli("add", data, *BASE).code == 0
    return Catalog(cli.catalog)


def test_weighted_table_keeps_censored_rows_with_their_limit(cli, tmp_path):
    catalog = _censored_catalog(cli, tmp_path)
    table = catalog.weighted_table()
    assert table.columns[-1] == "censored"  # right after calibration_group: no condition columns
    below = table[table["censored"] == "below"]
    assert len(below) == 1 and below["value"].tolist() == [0.6]
    # the censored point had no sd: it takes the noise estimated from the observed points
    assert np.isfinite(below["sigma"]).all() and (below["weight"] > 0).all()
    observed = table[table["censored"] == ""]
    assert observed["sd"].tolist() == pytest.approx([0.1] * 11)


def test_weighted_table_without_censoring_has_no_censored_column(cli, tmp_path):
    data = write(tmp_path / "plain.csv", "time,value,sd\n0,1,0.1\n1,2,0.1\n2,3,0.1\n")
    assert cli("add", data, *BASE).code == 0
    assert "censored" not in Catalog(cli.catalog).weighted_table().columns


def test_exports_carry_censored_points(cli, tmp_path):
    catalog = _censored_catalog(cli, tmp_path)
    assert cli("export", "table", tmp_path / "t").code == 0
    points = pd.read_csv(tmp_path / "t" / "points.csv", keep_default_na=False)
    assert points["censored"].tolist() == ["below"] + [""] * 11
    assert points["value"].iloc[0] == 0.6
    readme = (tmp_path / "t" / "README.txt").read_text()
    assert "Censored points: 1 below and 0 above a limit." in readme

    assert cli("export", "petab", tmp_path / "p").code == 0
    measurements = pd.read_csv(tmp_path / "p" / "measurements.tsv", sep="\t")
    beside = pd.read_csv(tmp_path / "p" / "censored_measurements.tsv", sep="\t")
    assert len(measurements) == 11 and measurements["time"].min() == 60.0
    assert beside["curateLimit"].tolist() == [0.6] and beside["curateCensored"].tolist() == ["below"]
    assert beside["time"].tolist() == [0.0]
    readme = (tmp_path / "p" / "README.txt").read_text()
    assert "PEtab 1 has no censored measurements: measurements.tsv holds the observed" in readme
    import petab.v1 as petab  # the linter reads the problem without the annotation file

    problem = petab.Problem.from_yaml(str(tmp_path / "p" / "problem.yaml"))
    assert len(problem.measurement_df) == 11

    assert cli("export", "datapackage", tmp_path / "d").code == 0
    descriptor = json.loads((tmp_path / "d" / "datapackage.json").read_text())
    fields = {f["name"]: f for r in descriptor["resources"] for f in r["schema"]["fields"]}
    assert fields["censored"]["constraints"]["enum"] == ["", "below", "above"]
    assert catalog.verify().ok


def test_noise_and_consistency_leave_censored_points_out_and_say_so(cli, tmp_path):
    catalog = _censored_catalog(cli, tmp_path)
    dataset = catalog.list()[0].id
    run = cli("noise", dataset)
    assert run.code == 0, run.err
    noise = catalog.show(dataset).record.noise
    assert noise is not None
    assert "1 of 12 points are censored (a limit, not a measured value) and were left out" in noise.warnings
    assert noise.method == "reported" and noise.sd == pytest.approx(0.1)
    other = write(tmp_path / "o.csv", "time,value,sd\n" + "".join(
        f"{t},{0.2 + 0.5 * t:.3f},0.1\n" for t in range(12)))  # fmt: skip
    assert cli("add", other, *BASE[:-1], "M").code == 0
    report = catalog.consistency(record=False)
    assert report.notes == [
        f"dataset {dataset}: 1 of 12 points are censored (a limit, not a measured value) and were left out"
    ]
    (group,) = report.groups
    counts = {row.id: row.n_overlap for row in group.datasets}
    assert counts[dataset] == 11  # its censored point is not compared
