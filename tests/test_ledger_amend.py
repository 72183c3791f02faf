"""Corrections as versions (how the numbers read), point masks, and one dataset replacing another.

The reference for a correction is intake itself: a dataset corrected from unit A to unit B must
hold exactly (content hash, every bit) what logging the file with unit B from the start gives,
however many corrections came before. Unit factors come from pint (checked against UCUM and
handbook factors in tests/test_units.py).
"""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pandas as pd
import pytest
from conftest import DATA, NEUTRAL, write
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import curate
from curate import Correction
from curate.errors import InputError
from curate.weighting import Selection

SERIES = """\
time,value,sd
0,1.25,0.11
5,2.5,0.13
10,3.75,0.17
15,4.125,0.19
20,4.5,0.23
"""


def log(catalog, folder, unit="nM", time_unit="min", name="a.csv", text=SERIES, **extra):
    path = write(folder / name, text)
    options = {"observable": {"id": "perk", "unit": unit}, "time": {"unit": time_unit},
               "source": {"lab": "lab one"}, "uncertainty": {"type": "sd"}, **extra}  # fmt: skip
    return catalog.add(path, options=options)


def fresh_hash(tmp_path, unit, time_unit="min", **extra):
    """Give the content hash intake gives the same file read with ``unit`` from the start."""
    with curate.open_catalog(":memory:", actor="tester") as other:
        result = log(other, tmp_path / "fresh", unit=unit, time_unit=time_unit, **extra)
        return other.show(result.id).record.content_hash


# -- corrections of the reading ---------------------------------------------------------------


def test_unit_correction_equals_logging_the_file_right(catalog, tmp_path):
    added = log(catalog, tmp_path)
    fixed = catalog.revise(added.id, reason="the export was in micromolar",
                           correction=Correction(unit="uM"))  # fmt: skip
    assert fixed.version == 2
    assert fixed.record.observable.unit_original == "uM"
    assert fixed.record.content_hash == fresh_hash(tmp_path, "uM")
    points = catalog.points(added.id)
    np.testing.assert_array_equal(points["value"], [1250.0, 2500.0, 3750.0, 4125.0, 4500.0])
    np.testing.assert_array_equal(points["sd"], [110.0, 130.0, 170.0, 190.0, 230.0])
    # the old version keeps its numbers: nothing was overwritten
    np.testing.assert_array_equal(catalog.points(added.id, 1)["value"], [1.25, 2.5, 3.75, 4.125, 4.5])
    assert catalog.verify().ok


def test_corrections_start_from_the_numbers_as_given_not_from_converted_ones(catalog, tmp_path):
    added = log(catalog, tmp_path, unit="pM")
    for unit in ("uM", "mM", "nM", "uM"):
        catalog.revise(added.id, reason=f"try {unit}", correction=Correction(unit=unit))
    assert catalog.show(added.id).record.content_hash == fresh_hash(tmp_path, "uM")
    # uM -> nM multiplies by exactly 1000 from the given 1.25, 2.5, ... (no drift through mM)
    np.testing.assert_array_equal(
        catalog.points(added.id)["value"], [1250.0, 2500.0, 3750.0, 4125.0, 4500.0]
    )


def test_time_unit_correction_reconverts_the_times(catalog, tmp_path):
    added = log(catalog, tmp_path, time_unit="min")
    fixed = catalog.revise(added.id, reason="times were hours",
                           correction=Correction(time_unit="h"))  # fmt: skip
    np.testing.assert_array_equal(
        catalog.points(added.id)["time"], [0.0, 18000.0, 36000.0, 54000.0, 72000.0]
    )
    assert fixed.record.time_unit_original == "h"
    assert fixed.record.content_hash == fresh_hash(tmp_path, "nM", time_unit="h")


def test_a_dataset_logged_before_the_numbers_were_kept_is_recovered(catalog, tmp_path):
    """Versions written before ``as_given`` existed: the numbers are recovered from the stored
    values by converting back and rounding to 15 digits, and the event says so."""
    draft = catalog.read_file(write(tmp_path / "old.csv", SERIES), options={
        "observable": {"id": "perk", "unit": "uM"}, "time": {"unit": "min"},
        "source": {"lab": "lab one"}, "uncertainty": {"type": "sd"}})  # fmt: skip
    assert draft.as_given is not None  # uM -> nM changed the numbers: kept apart
    old_style = type(draft)(
        record=draft.record.model_copy(update={"as_given": None}), arrays=draft.arrays,
        requested_id=None, origin=draft.origin,
    )  # fmt: skip
    (added,) = catalog.add_drafts([old_style])
    catalog.revise(added.id, reason="was nM after all", correction=Correction(unit="nM"))
    assert catalog.show(added.id).record.content_hash == fresh_hash(tmp_path, "nM")
    event = catalog.events()[-1]
    assert "recovered from the stored values" in event["payload"]["numbers_as_given"]


def test_uncertainty_type_correction_changes_the_single_measurement_noise(catalog, tmp_path):
    """An SEM of n wells is a single measurement's SD / sqrt(n): the noise the lab's numbers
    speak of doubles for n = 4, while the uncertainty of each mean (what weights use) stays."""
    from curate.quality.measured import measured_sd, reported_sd

    added = log(catalog, tmp_path)
    arrays = catalog.arrays(added.id)
    before = reported_sd(catalog.show(added.id), arrays)
    fixed = catalog.revise(added.id, reason="the column holds SEMs of 4 wells",
                           correction=Correction(uncertainty_type="sem", sem_n=4))  # fmt: skip
    assert fixed.record.uncertainty.type == "sem" and fixed.record.uncertainty.n == 4
    assert fixed.record.content_hash == catalog.show(added.id, 1).record.content_hash
    np.testing.assert_allclose(reported_sd(fixed, arrays), before * 2.0, rtol=1e-12)
    np.testing.assert_allclose(measured_sd(fixed, arrays), before, rtol=1e-12)


def test_normalisation_and_relative_corrections(catalog, tmp_path):
    added = log(catalog, tmp_path, unit="%")
    assert catalog.show(added.id).record.observable.relative is False
    peaked = catalog.revise(added.id, reason="percent of each series' peak",
                            correction=Correction(normalisation="peak"))  # fmt: skip
    assert peaked.record.protocol.normalisation.kind == "peak"
    assert peaked.record.observable.relative is True
    absolute = catalog.revise(added.id, reason="calibrated after all",
                              correction=Correction(relative=False))  # fmt: skip
    assert absolute.record.observable.relative is False


@pytest.mark.parametrize(
    ("correction", "message"),
    [
        (Correction(unit="parsec"), "does not fit observable"),
        (Correction(unit="furlongs per fortnight"), "unit"),
        (Correction(time_unit="nM"), "time"),
        (Correction(uncertainty_type="spread"), "is not one of"),
        (Correction(uncertainty_type="sem"), "--sem-n"),
        (Correction(uncertainty_type="ci"), "--ci-level"),
        (Correction(normalisation="to_max"), "--normalisation 'to_max'"),
    ],
)
def test_bad_corrections_are_one_line_and_write_nothing(catalog, tmp_path, correction, message):
    added = log(catalog, tmp_path)
    log(catalog, tmp_path, name="b.csv", text=SERIES.replace("4.5", "4.75"))  # a second in nM
    before = len(catalog.events())
    with pytest.raises(InputError, match="dataset .*") as err:
        catalog.revise(added.id, reason="x", correction=correction)
    assert message in str(err.value) and "\n" not in str(err.value)
    assert len(catalog.events()) == before and catalog.show(added.id).version == 1


def test_a_correction_that_changes_nothing_is_refused(catalog, tmp_path):
    added = log(catalog, tmp_path)
    with pytest.raises(InputError, match="nothing would change"):
        catalog.revise(added.id, reason="same", correction=Correction(unit="nM"))


def test_the_file_logged_again_after_a_correction_is_the_corrected_dataset(catalog, tmp_path):
    added = log(catalog, tmp_path)
    catalog.revise(added.id, reason="uM", correction=Correction(unit="uM"))
    again = log(catalog, tmp_path)
    assert not again.added and again.id == added.id


def test_verify_names_a_changed_number_as_given(tmp_path):
    path = tmp_path / "c.db"
    with curate.open_catalog(path, actor="tester") as catalog:
        added = log(catalog, tmp_path)
        given = catalog.show(added.id).record.as_given
        assert given != catalog.show(added.id).record.content_hash  # minutes: kept apart
    with sqlite3.connect(path) as db:
        blob = np.frombuffer(db.execute("SELECT value FROM series WHERE content_hash = ?",
                                        [given]).fetchone()[0], dtype="<f8").copy()  # fmt: skip
        blob[2] = 9.0
        db.execute("UPDATE series SET value = ? WHERE content_hash = ?", [blob.tobytes(), given])
    with curate.open_catalog(path, actor="tester") as catalog:
        report = catalog.verify()
    assert not report.ok
    assert any("numbers as the file gave them" in p and added.id in p for p in report.problems)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    values=st.lists(st.floats(1e-3, 1e6, allow_nan=False).map(lambda x: float(f"{x:.6g}")),
                    min_size=3, max_size=12),
    first=st.sampled_from(["pM", "nM", "uM", "mM", "M"]),
    second=st.sampled_from(["pM", "nM", "uM", "mM", "M"]),
    third=st.sampled_from(["pM", "nM", "uM", "mM", "M"]),
)
def test_any_chain_of_unit_corrections_equals_a_fresh_intake(tmp_path, values, first, second, third):
    text = "time,value\n" + "".join(f"{i},{v!r}\n" for i, v in enumerate(values))
    folder = tmp_path / f"case_{abs(hash((tuple(values), first, second, third)))}"
    with curate.open_catalog(":memory:", actor="tester") as catalog:
        added = log(catalog, folder, unit=first, text=text, uncertainty=None)
        for unit in (second, third):
            try:
                catalog.revise(added.id, reason="r", correction=Correction(unit=unit))
            except InputError as err:
                assert "nothing would change" in str(err)
        got = catalog.show(added.id).record.content_hash
    assert got == fresh_hash(folder, third, text=text, uncertainty=None)


# -- masks --------------------------------------------------------------------------------------


def test_masked_points_leave_weights_noise_and_exports(catalog, tmp_path):
    added = log(catalog, tmp_path)
    policy = write(tmp_path / "n.toml", NEUTRAL)
    masked = catalog.mask(added.id, ["10", "20 min"], reason="bubble in the well")
    assert masked.version == 2 and [m.time for m in masked.record.masks] == [600.0, 1200.0]
    assert masked.record.content_hash == catalog.show(added.id, 1).record.content_hash
    table = catalog.weighted_table(policy=policy)
    np.testing.assert_array_equal(table["time"], [0.0, 300.0, 900.0])
    assert catalog.weights(policy=policy).datasets[0].n_points == 3
    # the raw points stay
    assert len(catalog.points(added.id)) == 5
    result = catalog.export("table", tmp_path / "out", policy=policy)
    aside = pd.read_csv(tmp_path / "out" / "masked_points.csv")
    assert aside["time"].tolist() == [600.0, 1200.0] and aside["masked"].all()
    assert set(aside["mask_reason"]) == {"bubble in the well"}
    assert "masked_points.csv" in result.manifest["files"]
    assert len(pd.read_csv(tmp_path / "out" / "points.csv")) == 3
    assert "Masked points: 2 point(s)" in (tmp_path / "out" / "README.txt").read_text()
    catalog.mask(added.id, ["10"], reason="checked: fine", unmask=True)
    np.testing.assert_array_equal(
        catalog.weighted_table(policy=policy)["time"], [0.0, 300.0, 600.0, 900.0]
    )


def test_noise_estimates_leave_masked_points_out(catalog, tmp_path):
    from curate.quality import noise

    text = "time,value\n" + "".join(f"{t},{v}\n" for t, v in
                                    zip(range(0, 60, 5), [1, 1.2, 0.9, 1.1, 50, 1.0, 1.05, 0.95, 1.1, 0.9, 1.0, 1.2], strict=True))  # fmt: skip
    added = log(catalog, tmp_path, text=text, uncertainty=None)
    catalog.mask(added.id, ["20"], reason="spike: door opened")
    (outcome,) = catalog.estimate_noise([added.id])
    kept = catalog.points(added.id).query("time != 1200")
    expected = noise.choose_and_estimate(kept["time"].to_numpy(), kept["value"].to_numpy(),
                                         origin="reference")  # fmt: skip
    assert outcome.version.record.noise.sd == pytest.approx(expected.sd, rel=1e-12)
    assert outcome.version.record.noise.sd < 1.0  # the spike (50) would have dominated


def test_masks_of_one_replicate(catalog, tmp_path):
    text = "time,rep1,rep2\n0,1.0,1.1\n5,2.0,2.2\n10,3.0,9.9\n15,4.0,4.1\n"
    added = log(catalog, tmp_path, text=text, uncertainty=None, layout="wide")
    labels = catalog.show(added.id).record.replicate_labels
    catalog.mask(added.id, ["10"], replicate=labels[1], reason="pipetting error")
    table = catalog.weighted_table(policy=write(tmp_path / "n.toml", NEUTRAL))
    assert len(table) == 7 and 9.9 not in table["value"].tolist()


@pytest.mark.parametrize(
    ("times", "kwargs", "message"),
    [
        (["11"], {}, "no point at time 11 (660 s); the nearest is 10 min"),
        (["tomorrow"], {}, "is not a time"),
        (["3 nM"], {}, "is not a time"),
        (["10"], {"replicate": "r9"}, "no replicate 'r9'"),
        (["10"], {"reason": " "}, "needs a reason"),
        ([], {}, "at least one point"),
        (["0", "5", "10", "15", "20"], {}, "every point; retire the dataset instead"),
    ],
)
def test_bad_masks_are_one_line_and_write_nothing(catalog, tmp_path, times, kwargs, message):
    added = log(catalog, tmp_path)
    before = len(catalog.events())
    with pytest.raises(InputError) as err:
        catalog.mask(added.id, times, **{"reason": "r", **kwargs})
    assert message in str(err.value) and "\n" not in str(err.value)
    assert len(catalog.events()) == before


def test_masking_twice_and_unmasking_what_is_not_masked_are_refused(catalog, tmp_path):
    added = log(catalog, tmp_path)
    catalog.mask(added.id, ["10"], reason="r")
    with pytest.raises(InputError, match="masked already"):
        catalog.mask(added.id, ["10 min"], reason="again")
    with pytest.raises(InputError, match="not masked"):
        catalog.mask(added.id, ["5"], reason="back", unmask=True)


def test_a_mask_changes_what_consistency_reads(catalog, tmp_path):
    from curate.quality.actions import consistency_inputs

    added = log(catalog, tmp_path)
    before = consistency_inputs(catalog.show(added.id))
    catalog.mask(added.id, ["10"], reason="r")
    assert consistency_inputs(catalog.show(added.id)) != before


def test_masked_points_leave_a_stored_problem_export_in_step(catalog, tmp_path):
    """A PEtab problem's rows are kept per point: a mask must take the same rows out, so the
    exported measurement table is the imported one without exactly the masked rows."""
    name = "Fujita_SciSignal2010"
    catalog.import_petab(DATA / "petab" / name / f"{name}.yaml")
    first = catalog.list()[0]
    times = catalog.points(first.id)["time"].to_numpy()
    catalog.mask(first.id, [f"{times[3]} s"], reason="r")
    policy = write(tmp_path / "n.toml", NEUTRAL)
    catalog.export("petab", tmp_path / "p", policy=policy, selection=Selection(ids=(first.id,)))
    measurements = next((tmp_path / "p").glob("measurement*.tsv"))
    frame = pd.read_csv(measurements, sep="\t")
    values = catalog.points(first.id)["value"].to_numpy()
    np.testing.assert_allclose(
        np.sort(frame["measurement"].to_numpy()), np.sort(np.delete(values, 3)), rtol=1e-12
    )
    aside = pd.read_csv(tmp_path / "p" / "masked_points.tsv", sep="\t")
    assert aside["value"].tolist() == pytest.approx([values[3]])


# -- one dataset replacing another --------------------------------------------------------------


def test_supersedes_retires_the_old_and_keeps_the_link(catalog, tmp_path):
    old = log(catalog, tmp_path)
    catalog.export("table", tmp_path / "out", policy=write(tmp_path / "n.toml", NEUTRAL))
    new = log(catalog, tmp_path, name="b.csv", text=SERIES.replace("4.5", "4.75"),
              supersedes=old.id)  # fmt: skip
    before, after = catalog.show(old.id), catalog.show(new.id)
    assert before.record.retired and before.record.superseded_by == new.id
    assert after.record.supersedes == old.id
    assert [v.id for v in catalog.list()] == [new.id]
    assert any("supersedes " + old.id in c for h in catalog.history(new.id) for c in h.changes)
    assert catalog.history(old.id)[-1].kind == "supersede"
    report = catalog.trace(tmp_path / "out")
    assert report.changed == [f"{old.id} version 1: superseded by {new.id} (supersede since the export)"]
    (entry,) = catalog.impact(new.id)
    assert entry.superseded == old.id and entry.used_version == 1
    assert catalog.verify().ok


@pytest.mark.parametrize(
    ("target", "message"),
    [("nobody_01", "no such dataset"), ("self", "superseded already")],
)
def test_bad_supersedes_are_refused(catalog, tmp_path, target, message):
    old = log(catalog, tmp_path)
    if target == "self":
        log(catalog, tmp_path, name="b.csv", text=SERIES.replace("4.5", "4.75"), supersedes=old.id)
        target = old.id
    before = len(catalog.events())
    with pytest.raises(InputError, match=message):
        log(catalog, tmp_path, name="c.csv", text=SERIES.replace("4.5", "4.9"), supersedes=target)
    assert len(catalog.events()) == before


# -- the command line ---------------------------------------------------------------------------


def test_cli_revise_mask_unmask_and_supersede(cli, tmp_path):
    data = write(tmp_path / "a.csv", SERIES)
    assert cli("add", data, "--observable", "perk", "--unit", "nM", "--time-unit", "min",
               "--lab", "lab one").code == 0  # fmt: skip
    (dataset_id,) = [d["id"] for d in json.loads(cli("list", "--json").out)]
    run = cli("revise", dataset_id, "--unit", "uM", "--reason", "micromolar")
    assert run.code == 0, run.err
    assert "observable.unit_original: 'nM' -> 'uM'" in run.out
    assert "values reconverted from the numbers as the file gave them" in run.out
    run = cli("mask", dataset_id, "--time", "10", "--time", "15", "--reason", "saturated")
    assert run.code == 0 and "points masked at 10 min, 15 min" in run.out
    run = cli("mask", dataset_id, "--time", "12", "--reason", "x")
    assert run.code == 2 and run.err.count("\n") == 1 and "no point at time 12" in run.err
    run = cli("unmask", dataset_id, "--time", "10", "--reason", "fine")
    assert run.code == 0 and "points masked at 15 min" in run.out
    assert "masked the points at 10 min" in cli("history", dataset_id).out
    other = write(tmp_path / "b.csv", SERIES.replace("4.5", "4.75"))
    run = cli("add", other, "--observable", "perk", "--unit", "uM", "--time-unit", "min",
              "--lab", "lab one", "--supersedes", dataset_id)  # fmt: skip
    assert run.code == 0, run.err
    listed = json.loads(cli("list", "--json", "--retired").out)
    assert {d["id"]: d["retired"] for d in listed}[dataset_id] is True


def test_a_sidecar_sets_points_aside_and_names_what_it_replaces(catalog, tmp_path):
    old = log(catalog, tmp_path)
    write(tmp_path / "rerun.csv", SERIES.replace("4.5", "4.75"))
    write(tmp_path / "rerun.toml", f"""
        supersedes = "{old.id}"
        masks = [{{time = 10, reason = "bubble"}}, {{time = "15 min", reason = "saturated"}}]
        [observable]
        id = "perk"
        unit = "nM"
        [time]
        unit = "min"
        [source]
        lab = "lab one"
        """)
    new = catalog.add(tmp_path / "rerun.csv")
    record = catalog.show(new.id).record
    assert [(m.time, m.reason) for m in record.masks] == [(600.0, "bubble"), (900.0, "saturated")]
    assert record.supersedes == old.id and catalog.show(old.id).record.superseded_by == new.id
    table = catalog.weighted_table(policy=write(tmp_path / "n.toml", NEUTRAL))
    np.testing.assert_array_equal(table["time"], [0.0, 300.0, 1200.0])


def test_a_sidecar_mask_at_a_missing_time_names_the_sidecar(catalog, tmp_path):
    write(tmp_path / "a.csv", SERIES)
    write(tmp_path / "a.toml", """
        masks = [{time = 7, reason = "bubble"}]
        [observable]
        id = "perk"
        unit = "nM"
        [time]
        unit = "min"
        [source]
        lab = "lab one"
        """)
    with pytest.raises(InputError) as err:
        catalog.add(tmp_path / "a.csv")
    assert "a.toml, masks: no point at time 7 (420 s); the nearest is 5 min" in str(err.value)
    assert catalog.list() == []


def test_clock_times_cannot_be_given_another_time_unit(catalog, tmp_path):
    """Times read from clock cells carry their own unit: a --time-unit correction would read the
    elapsed hours as minutes (found by a trial user); it is refused."""
    import datetime as dt

    import openpyxl

    book = openpyxl.Workbook()
    sheet = book.active
    sheet.append(["time", "value"])
    for k in range(5):
        sheet.append([dt.datetime(2026, 5, 4, 9, 0) + dt.timedelta(minutes=15 * k), 1.0 + k])
    book.save(tmp_path / "clock.xlsx")
    added = catalog.add(tmp_path / "clock.xlsx", options={
        "observable": {"id": "perk", "unit": "nM"}, "time": {"unit": "h"}, "source": {"lab": "lab one"}})  # fmt: skip
    np.testing.assert_allclose(catalog.points(added.id)["time"], [0.0, 900.0, 1800.0, 2700.0, 3600.0])
    with pytest.raises(InputError, match="clock times or durations"):
        catalog.revise(added.id, reason="min", correction=Correction(time_unit="min"))
    assert catalog.show(added.id).version == 1


def test_censored_points_without_an_sd_take_the_noise_noise_would_report(catalog, tmp_path):
    """The sigma of a censored point without its own sd is the policy's automatic noise choice
    on the observed points, the same that `curate noise` reports (found by a trial user: the
    export estimated it from differences while `noise` took the reported sds)."""
    text = "time,value,sd\n0,<0.5,\n10,1.5,0.3\n20,2.5,0.4\n30,3.1,0.3\n40,<0.5,\n50,3.4,0.2\n"
    added = log(catalog, tmp_path, text=text)
    table = catalog.weighted_table(policy=write(tmp_path / "n.toml", NEUTRAL))
    censored = table[table["censored"] == "below"]
    pooled = np.sqrt(np.mean(np.array([0.3, 0.4, 0.3, 0.2]) ** 2))  # the reported sds, pooled
    np.testing.assert_allclose(censored["sd"], pooled, rtol=1e-12)
    (outcome,) = catalog.estimate_noise([added.id])
    assert outcome.version.record.noise.sd == pytest.approx(pooled, rel=1e-12)
