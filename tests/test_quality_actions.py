"""Noise, grades and consistency through the catalog API and the CLI, on the example data."""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
from conftest import EXAMPLES, ROOT, write

from curate.errors import InputError

CHECKLISTS = ROOT / "example_datasets" / "checklists"


@pytest.fixture
def logged(catalog, examples):
    catalog.intake(examples)
    return catalog


def by_file(catalog, stem):
    for version in catalog.list(include_retired=True):
        if version.record.source.raw_file_name.startswith(stem + "."):
            return version.id
    raise KeyError(stem)


def test_noise_auto_choices_are_recorded(logged):
    written = {v.id: (v, r) for v, r in logged.estimate_noise()}
    assert len(written) == 13
    harrow = by_file(logged, "harrow_velarin_37C_10uM")
    quillfen_glint = by_file(logged, "quillfen_glint_37C_1uM")
    quillfen = by_file(logged, "quillfen_velarin_37C_10uM")
    assert written[harrow][1].method == "replicates"
    assert written[quillfen_glint][1].method == "gsj"
    assert written[quillfen][1].method == "reported"
    stored = logged.show(harrow).record.noise
    assert stored.method == "replicates" and stored.made_by == "tester" and stored.dof == 20
    assert "replicates" in stored.parameters["choice"]
    # the Quillfen SEMs (n = 4) become SDs twice their size: the generator's SD model at ~0.5-1.5 nM
    assert 0.6 < logged.show(quillfen).record.noise.sd < 1.6
    assert logged.show(harrow).version == 2
    assert logged.verify().ok


def test_noise_rerun_with_the_same_result_writes_nothing(logged, cli):
    harrow = by_file(logged, "harrow_velarin_37C_10uM")
    first = logged.estimate_noise([harrow])[0]
    assert first.changed and first.version.version == 2
    events = len(logged.events())
    again = logged.estimate_noise([harrow])[0]
    # same method, sd, dof, parameters and scale: no new version, no event
    assert not again.changed and again.version.version == 2 and len(logged.events()) == events
    assert again.version.record.noise.made_at == first.version.record.noise.made_at
    other = logged.estimate_noise([harrow], method="mad")[0]
    assert other.changed and other.version.version == 3
    # an error model whose b sits on its bound has a NaN standard error (stored as null): a
    # rerun is still recognised as the same estimate
    time = np.repeat(np.arange(6.0), 3)
    draft = logged.draft(time, 10 * (time + 1) + np.tile([-1.0, 0.0, 1.0], 6), observable="additive",
                         unit="nM", time_unit="min", lab="Lab P", replicate=np.tile([1, 2, 3], 6))  # fmt: skip
    additive = logged.add_drafts([draft])[0].id
    assert logged.estimate_noise([additive], method="error-model")[0].changed
    assert not logged.estimate_noise([additive], method="error-model")[0].changed
    run = cli("noise", additive, "--method", "error-model", catalog_path=logged.path)
    assert run.code == 0 and "unchanged" in run.out and logged.show(additive).version == 2
    run = cli("noise", additive, "--method", "error-model", "--json", catalog_path=logged.path)
    assert json.loads(run.out)[0]["changed"] is False


def test_noise_with_too_few_points_changes_nothing(catalog, tmp_path):
    data = write(tmp_path / "short.csv", "time,value\n0,1\n1,2\n2,2.5\n")
    result = catalog.add(
        data,
        options={
            "observable": {"id": "v", "unit": "nM"},
            "time": {"unit": "s"},
            "source": {"lab": "L"},
        },
    )
    before = len(catalog.events())
    with pytest.raises(InputError, match="3 points; the gsj estimator needs at least 4"):
        catalog.estimate_noise([result.id])
    assert len(catalog.events()) == before and catalog.show(result.id).version == 1


def test_grade_with_reason_and_history(logged):
    target = by_file(logged, "corvane_velarin_25C_10uM")
    graded = logged.grade(target, "B", reason="single run, calibrated")
    assert graded.grade == "B" and graded.record.trust.rationale == "single run, calibrated"
    regraded = logged.grade(target, "C", reason="calibration curve turned out old")
    assert [h.kind for h in logged.history(target)] == ["add", "grade", "grade"]
    assert logged.show(target, version=2).grade == "B" and regraded.grade == "C"
    with pytest.raises(InputError, match="'Q' is not a grade"):
        logged.grade(target, "Q", reason="r")
    with pytest.raises(InputError, match="a grade needs its reason"):
        logged.grade(target, "A", reason="  ")


def test_checklist_suggestion_and_accept(logged):
    target = by_file(logged, "marrowby_velarin_37C_10uM")
    answers = CHECKLISTS / "marrowby_velarin_37C_10uM.toml"
    suggestion, graded = logged.grade_from_checklist(target, answers_file=answers)
    assert suggestion.grade == "C" and graded is None
    assert logged.show(target).grade is None  # nothing graded without --accept
    assert logged.latest_event(target, "checklist")["payload"]["suggested"] == "C"
    suggestion, graded = logged.grade_from_checklist(target, answers_file=answers, accept=True)
    assert graded.grade == "C"
    assert graded.record.trust.rationale.startswith("checklist: replicates_3: no (-2)")


def test_checklist_with_unknown_question_changes_nothing(logged, tmp_path):
    target = by_file(logged, "harrow_velarin_37C_1uM")
    bad = write(tmp_path / "a.toml", "[answers]\nlooks_fine = true\n")
    before = len(logged.events())
    with pytest.raises(InputError, match="unknown question"):
        logged.grade_from_checklist(target, answers_file=bad)
    assert len(logged.events()) == before


def test_consistency_catches_the_saturated_dataset(logged):
    logged.estimate_noise()
    for path in sorted(CHECKLISTS.glob("*.toml")):
        logged.grade_from_checklist(by_file(logged, path.stem), answers_file=path, accept=True)
    report = logged.consistency()
    saturated = by_file(logged, "marrowby_velarin_37C_10uM")
    flagged = {s.dataset_id: s for s in report.suggestions}
    # the planted bad dataset, and only it, is suggested for a lower grade
    assert set(flagged) == {saturated}
    assert (flagged[saturated].current, flagged[saturated].suggested) == ("C", "D")
    rows = {r.id: r for g in report.groups for r in g.datasets}
    assert rows[saturated].p_value < 1e-6 and not rows[saturated].in_consensus
    good = [r for r in rows.values() if r.id != saturated and r.p_value is not None]
    assert all(r.p_value > 0.001 for r in good)
    marrowby = next(lab for lab in report.labs if lab.lab == "Marrowby Group")
    assert marrowby.birge_ratio > 3
    # recorded as events; grades unchanged until a person accepts
    assert logged.latest_event(saturated, "grade_suggestion")["payload"]["suggested"] == "D"
    assert logged.show(saturated).grade == "C"
    accepted = logged.accept_suggestion(saturated, reason="the detector ceiling is in the raw file")
    assert accepted.grade == "D" and "accepted suggestion" in accepted.record.trust.rationale
    # the person's own reason comes first, then what the suggestion rested on
    assert accepted.record.trust.rationale.startswith("the detector ceiling is in the raw file; ")


def test_the_same_evidence_does_not_ratchet_a_grade_down_run_after_run(logged):
    # strong disagreement caps a grade at D; once that is accepted, asking again suggests nothing
    logged.estimate_noise()
    saturated = by_file(logged, "marrowby_velarin_37C_10uM")
    logged.grade(saturated, "A", reason="before anyone looked")
    first = {s.dataset_id: s.suggested for s in logged.consistency().suggestions}
    assert first == {saturated: "D"}  # a cap, not "two steps down" (A -> C)
    logged.accept_suggestion(saturated)
    assert logged.consistency().suggestions == []


def test_consistency_uses_measured_not_inflated_uncertainty(logged):
    # grading a dataset down must not change its consistency numbers
    logged.estimate_noise()
    first = {r.id: r.chi2 for g in logged.consistency(record=False).groups for r in g.datasets}
    saturated = by_file(logged, "marrowby_velarin_37C_10uM")
    logged.grade(saturated, "D", reason="saturates")
    second = {r.id: r.chi2 for g in logged.consistency(record=False).groups for r in g.datasets}
    assert first == second


def test_consistency_without_noise_is_a_clear_error(logged):
    with pytest.raises(InputError, match="run `curate noise"):
        logged.consistency()


def test_accept_without_suggestion(logged):
    with pytest.raises(InputError, match="no grade suggestion to accept"):
        logged.accept_suggestion(by_file(logged, "harrow_velarin_37C_1uM"))


def test_cli_noise_grade_consistency(cli, tmp_path):
    import shutil

    inbox = tmp_path / "inbox"
    shutil.copytree(EXAMPLES, inbox)
    assert cli("intake", inbox).code == 0
    run = cli("noise", "--all", "--json")
    assert run.code == 0
    payload = json.loads(run.out)
    assert len(payload) == 13 and {"id", "version", "sd", "method", "dof"} <= set(payload[0])
    ids = [d["id"] for d in json.loads(cli("list", "--json").out)]
    run = cli("grade", ids[0], "B", "--reason", "looked at the raw files")
    assert run.code == 0 and "graded B" in run.out
    run = cli("grade", ids[0], "Z", "--reason", "r")
    assert run.code == 2 and "'Z' is not a grade" in run.err
    run = cli("grade", ids[0], "B")
    assert run.code == 2 and "a grade needs its reason" in run.err
    run = cli("grade", ids[1], "--checklist", CHECKLISTS / "harrow_velarin_37C_1uM.toml", "--json")
    assert json.loads(run.out)["suggestion"]["grade"] == "A"
    run = cli("consistency", "--json")
    assert run.code == 0
    report = json.loads(run.out)
    assert (
        len(report["suggestions"]) == 1 and report["suggestions"][0]["suggested"] == "D"
    )  # ungraded counts as B
    text = cli("consistency", "--observable", "velarin_conc")
    assert "left out of the consensus" in text.out and "Birge R" in text.out
    at = cli("consistency", "--at", "30 min", "--observable", "velarin_conc")
    assert at.code == 0 and "levels at 30 min: weighted mean" in at.out
    assert "late levels" not in at.out
    assert json.loads(cli("consistency", "--at", "1.5 h", "--json").out)["summary_of"] == (
        "levels at 90 min"
    )
    assert "late levels: weighted mean" in text.out
    bad = cli("consistency", "--at", "60 um")
    assert bad.code == 2 and "expected a time with its unit" in bad.err
    assert cli("noise").code == 2
    assert cli("verify").code == 0


def test_event_chain_holds_after_judgement(logged):
    logged.estimate_noise()
    logged.consistency()
    conn = sqlite3.connect(logged.path)
    kinds = [row[0] for row in conn.execute("SELECT kind FROM events ORDER BY seq")]
    conn.close()
    assert kinds.count("add") == 13 and kinds.count("noise") == 13 and "grade_suggestion" in kinds
    assert logged.verify().ok
    assert np.isfinite(logged.show(by_file(logged, "harrow_glint_37C_10uM")).record.noise.sd)


def temperature_mixup(catalog):
    """Log a dataset recorded at 37 degC that was measured at 30 degC (it disagrees with the
    37 degC ones, and agrees with the 30 degC one once its condition is corrected)."""
    rng = np.random.default_rng(5)
    minutes = np.linspace(0, 60, 13)

    def logged(lab, temperature, top):
        value = top * (1 - np.exp(-minutes / 15)) + rng.normal(0, 0.3, len(minutes))
        draft = catalog.draft(minutes, value, observable="conc", unit="nM", time_unit="min",
                              lab=lab, sd=np.full(len(minutes), 0.3), uncertainty={"type": "sd"},
                              conditions={"temperature": temperature})  # fmt: skip
        return catalog.add_drafts([draft])[0].id

    ids = {
        "a1": logged("Lab A", "37 degC", 20.0),
        "a2": logged("Lab B", "37 degC", 20.0),
        "mixed_up": logged("Lab C", "37 degC", 21.5),
        "c": logged("Lab D", "30 degC", 21.5),
    }
    catalog.grade(ids["mixed_up"], "B", reason="looked fine")
    report = catalog.consistency()
    assert [s.dataset_id for s in report.suggestions] == [ids["mixed_up"]]
    return ids


def test_suggestion_records_the_versions_it_was_computed_from(catalog):
    ids = temperature_mixup(catalog)
    payload = catalog.latest_event(ids["mixed_up"], "grade_suggestion")["payload"]
    inputs = {entry["id"]: entry for entry in payload["inputs"]}
    assert set(inputs) == {ids["a1"], ids["a2"], ids["mixed_up"]}
    for ident, entry in inputs.items():
        current = catalog.show(ident)
        assert entry["version"] == current.version
        assert entry["content_hash"] == current.record.content_hash
        assert entry["record_hash"] == current.record_hash


def test_suggestion_withdrawn_by_a_newer_run_is_refused(catalog, cli):
    ids = temperature_mixup(catalog)
    catalog.revise(ids["mixed_up"], reason="incubator log", conditions={"temperature": "30 degC"})
    assert catalog.consistency().suggestions == []  # now consistent with its 30 degC partner
    with pytest.raises(InputError, match="withdrawn by the newer consistency run"):
        catalog.accept_suggestion(ids["mixed_up"])
    run = cli("grade", ids["mixed_up"], "--accept-suggestion", catalog_path=catalog.path)
    assert run.code == 2 and run.err.count("\n") == 1 and "withdrawn" in run.err
    assert catalog.show(ids["mixed_up"]).grade == "B"


def test_suggestion_whose_inputs_changed_is_refused(catalog):
    ids = temperature_mixup(catalog)
    catalog.revise(ids["a2"], reason="incubator log", conditions={"temperature": "36 degC"})
    with pytest.raises(InputError, match=f"{ids['a2']} changed since .version 1 -> 2"):
        catalog.accept_suggestion(ids["mixed_up"])
    assert catalog.show(ids["mixed_up"]).grade == "B"


def test_suggestion_is_refused_when_a_dataset_joined_its_group(catalog):
    ids = temperature_mixup(catalog)
    minutes = np.linspace(0, 60, 13)
    draft = catalog.draft(minutes, 20 * (1 - np.exp(-minutes / 15)), observable="conc", unit="nM",
                          time_unit="min", lab="Lab E", sd=np.full(13, 0.3),
                          uncertainty={"type": "sd"}, conditions={"temperature": "37 degC"})  # fmt: skip
    joined = catalog.add_drafts([draft])[0].id
    with pytest.raises(InputError, match=f"{joined} joined its comparison group"):
        catalog.accept_suggestion(ids["mixed_up"])


def test_suggestion_is_refused_when_its_grade_changed(catalog):
    ids = temperature_mixup(catalog)
    catalog.grade(ids["mixed_up"], "A", reason="second look")
    with pytest.raises(InputError, match="computed from grade B, it is A now"):
        catalog.accept_suggestion(ids["mixed_up"])


def test_suggestion_survives_changes_that_do_not_touch_its_inputs(catalog):
    ids = temperature_mixup(catalog)
    catalog.grade(ids["a1"], "A", reason="calibrated")  # a new version, same data and noise
    accepted = catalog.accept_suggestion(ids["mixed_up"])
    assert accepted.grade == "D" and "accepted suggestion" in accepted.record.trust.rationale


def test_suggestion_recorded_without_its_inputs_is_refused(catalog):
    ids = temperature_mixup(catalog)
    catalog.record_event("grade_suggestion", {"id": ids["mixed_up"], "current": "B",
                         "suggested": "D", "reason": "old style"}, dataset_id=ids["mixed_up"])  # fmt: skip
    with pytest.raises(InputError, match="does not name the dataset versions"):
        catalog.accept_suggestion(ids["mixed_up"])
