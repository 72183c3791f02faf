"""From the command line: predictions with every good fit (the band at new conditions, the group
it rests on) and sensitivity --ensemble (which families fit without each group)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import saturating_model

import curate
from curate.fit.new_points import new_points, parse_times


def truth(minutes):
    """The saturating model's curve at top 20, tau 15 min (the model reads time in seconds)."""
    return 20.0 * (1.0 - np.exp(-np.asarray(minutes, dtype=float) / 15.0))


@pytest.fixture
def two_labs(cli, tmp_path):
    """Two labs measure the same curve at doses of 10 and 20 uM; give (model, params) paths."""
    rng = np.random.default_rng(3)
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        drafts = []
        for lab, dose, minutes in (("Harrow Point Lab", "10 uM", np.arange(0.0, 60.0, 3.0)),
                                   ("Quillfen Institute", "20 uM", np.arange(1.0, 90.0, 8.0))):  # fmt: skip
            drafts.append(catalog.draft(
                minutes, truth(minutes) + rng.normal(0, 0.3, minutes.size),
                observable="velarin_conc", unit="nM", time_unit="min", lab=lab,
                sd=np.full(minutes.size, 0.3), conditions={"dose": dose, "temperature": "37 degC"},
                uncertainty={"type": "sd"}, trust={"grade": "A", "rationale": "calibrated"},
            ))  # fmt: skip
        catalog.add_drafts(drafts)
    return saturating_model(tmp_path)


def test_predict_gives_the_band_in_the_data_units_and_records_a_run(cli, two_labs):
    model, params = two_labs
    run = cli("predict", "--model", f"{model}:predict", "--params", params,
              "--conditions", "dose=0.015mM", "--times", "0,30", "--times", "600",
              "--time-unit", "min", "--starts", "6", "--by", "lab", "--json")  # fmt: skip
    assert run.code == 0, run.err
    found = json.loads(run.out)
    assert set(found) == {"points", "fits", "band", "by", "groups", "rests_on", "conclusions",
                          "notes", "time_unit", "units"}  # fmt: skip
    assert found["units"] == {"dose": "nM", "temperature": "°C"}
    assert found["points"] == 3 and found["time_unit"] == "s" and found["by"] == "lab"
    band = found["band"]
    assert [row["time"] for row in band] == [0.0, 1800.0, 36000.0]  # minutes given, seconds kept
    assert band[0]["dose"] == pytest.approx(15000.0)  # 0.015 mM in nM, as the weighted table holds doses
    assert band[0]["temperature"] == pytest.approx(37.0)
    assert any("condition temperature is 37" in note for note in found["notes"])
    for row in band:
        assert row["lower"] <= row["median"] <= row["upper"]
    # the fitted curve, far from a reference: the saturating level and the value at 30 min
    assert band[2]["median"] == pytest.approx(20.0, rel=0.02)
    assert band[1]["median"] == pytest.approx(float(truth(30.0)), rel=0.03)
    assert {g["group"] for g in found["groups"]} == {"Harrow Point Lab", "Quillfen Institute"}
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        kinds = [e["kind"] for e in catalog.events()]
    assert kinds.count("prediction") == 1
    text = cli("predict", "--model", f"{model}:predict", "--params", params, "--conditions",
               "dose=15uM", "--times", "0,30,600", "--time-unit", "min", "--starts", "4", "--by", "none")  # fmt: skip
    assert text.code == 0, text.err
    assert "600" in text.out and "fits" in text.out


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (("--times", "0,30"), "the data vary in 'dose'"),
        (("--conditions", "dose=15", "--times", "0"), "give a unit; the data hold dose in"),
        (("--conditions", "dose=15degC", "--times", "0"), "is not a unit of dose"),
        (("--conditions", "genotype=wt", "--times", "0"), "no dataset of the selection has condition 'genotype'"),
        (("--conditions", "dose=15uM", "--times", "-1"), "--times -1: expected a finite time >= 0"),
        (("--conditions", "dose=15uM", "--times", "ten"), "--times 'ten': expected a number"),
        (("--conditions", "dose=15uM"), "--times: give at least one time"),
        (("--conditions", "dose=15uM", "--times", "0", "--time-unit", "nM"), "--time-unit"),
        (("--conditions", "dose=15uM", "--times", "0", "--time-unit", "foo"),
         "unknown --time-unit unit 'foo': expected a unit of time such as 's', 'min', 'h' or 'day'"),
        (("--conditions", "dose=15uM", "--times", "0", "--workers", "999"), "--workers 999"),
        (("--conditions", "dose=15uM", "--times", "0", "--starts", "1"), "at least 2 starts"),
        (("--conditions", "dose=15uM", "--times", "0", "--threshold", "0"), "--threshold 0"),
        (("--conditions", "dose=15uM", "--times", "0", "--by", "colour"), "--by colour"),
    ],
)
def test_predict_refuses_bad_input_in_one_line(cli, two_labs, args, message):
    model, params = two_labs
    bad = cli("predict", "--model", f"{model}:predict", "--params", params, *args)
    assert bad.code == 2, bad.out
    assert message in bad.err and bad.err.count("\n") == 1, bad.err
    with curate.open_catalog(cli.catalog, actor="tester") as catalog:
        assert "prediction" not in [e["kind"] for e in catalog.events()]


def test_predict_refuses_a_stored_problem(cli, two_labs):
    bad = cli("predict", "--problem", "anything", "--conditions", "dose=15uM", "--times", "0")
    assert bad.code == 2 and "predictions at new conditions need --model" in bad.err


def test_new_points_convert_units_and_parse_times():
    # from memory: 1 h = 3600 s, 1 mM = 1000 uM (SI definitions)
    assert parse_times(["0, 1.5", "2"]) == [0.0, 1.5, 2.0]
    with curate.open_catalog(":memory:", actor="tester") as catalog:
        draft = catalog.draft(np.arange(3.0), np.ones(3), observable="x", unit="nM",
                              time_unit="h", lab="L", conditions={"dose": "5 uM"})  # fmt: skip
        versions = [catalog.show(added.id) for added in catalog.add_drafts([draft])]
        points, notes = new_points(versions, {"dose": "0.002 mM"}, [1.0, 2.0], time_unit="h",
                                   observable="x")  # fmt: skip
    assert points["time"].tolist() == [3600.0, 7200.0]
    assert points["dose"].tolist() == pytest.approx([2000.0, 2000.0])  # nM
    assert points["observable"].tolist() == ["x", "x"] and points.attrs["units"] == {"dose": "nM"}
    assert len(notes) == 1 and notes[0].startswith("dose 2000 nM lies outside the measured 5000 to 5000 nM")


def test_sensitivity_with_ensembles_gives_the_group_by_family_table(cli, two_labs):
    model, params = two_labs
    run = cli("sensitivity", "--model", f"{model}:predict", "--params", params, "--by", "lab",
              "--ensemble", "--ensemble-starts", "5", "--seed", "2", "--json")  # fmt: skip
    assert run.code == 0, run.err
    families = json.loads(run.out)["families"]
    assert {"by", "threshold", "families", "groups", "conclusions", "starts", "seed", "cut",
            "objectives"} <= set(families)  # fmt: skip
    assert families["starts"] == 5 and families["seed"] == 2 and families["by"] == "lab"
    # one curve, well measured by both labs: a single kept family that fits without either
    kept = [f for f in families["families"] if f["kept"]]
    assert len(kept) == 1 and kept[0]["parameters"]["top"]["median"] == pytest.approx(20.0, rel=0.02)
    assert len(families["groups"]) == 2
    for group in families["groups"]:
        assert group["error"] is None and group["families"][str(kept[0]["id"])]["fits"] is True
    assert families["conclusions"] == []  # one kept family: nothing to decide between
    text = cli("sensitivity", "--model", f"{model}:predict", "--params", params, "--by", "lab",
               "--ensemble", "--ensemble-starts", "3")  # fmt: skip
    assert text.code == 0 and "families of good fits without each lab" in text.out
    report = two_labs[0].parent / "report.html"
    assert cli("report", report).code == 0
    page = report.read_text()
    assert '<section id="deciding"><h2>Which data decide</h2>' in page
    assert 'alt="group x family: which families fit without each lab"' in page
    assert "group x parameter" not in page  # no --profiles in this run
    for args, message in ((("--method", "one-step"), "--method exact"),
                          (("--ensemble-starts", "1"), "--ensemble-starts 1")):  # fmt: skip
        bad = cli("sensitivity", "--model", f"{model}:predict", "--params", params, "--by", "lab",
                  "--ensemble", *args)  # fmt: skip
        assert bad.code == 2 and message in bad.err and bad.err.count("\n") == 1, bad.err
