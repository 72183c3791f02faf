"""Trust grades: the scale, the checklist and the suggestions it gives."""

from __future__ import annotations

import pytest
from conftest import write

from curate.errors import InputError
from curate.quality import grading


def test_default_checklist():
    checklist = grading.load_checklist()
    assert [q.id for q in checklist.questions][:2] == ["raw_data_available", "replicates_3"]
    assert checklist.limits == {"A": 1, "B": 3, "C": 6}
    assert len(checklist.sha256) == 64


def answers(checklist, **overrides):
    base = {q.id: True for q in checklist.questions}
    base.update(overrides)
    return base


def test_all_yes_is_grade_a():
    checklist = grading.load_checklist()
    assert grading.suggest_from_answers(checklist, answers(checklist)).grade == "A"


def test_penalties_add_up():
    checklist = grading.load_checklist()
    one = grading.suggest_from_answers(checklist, answers(checklist, blinded_analysis=False))
    assert (one.grade, one.penalty) == ("A", 1)
    two = grading.suggest_from_answers(
        checklist, answers(checklist, replicates_3=False, blinded_analysis=False)
    )
    assert (two.grade, two.penalty) == ("B", 3)
    assert two.reasons == ("replicates_3: no (-2)", "blinded_analysis: no (-1)")
    many = grading.suggest_from_answers(
        checklist,
        answers(
            checklist,
            raw_data_available=False,
            replicates_3=False,
            calibration_documented=False,
            same_conditions=False,
        ),
    )
    assert (many.grade, many.penalty) == ("D", 8)


def test_unanswered_counts_as_no():
    checklist = grading.load_checklist()
    partial = answers(checklist)
    partial["instrument_precision"] = None
    suggestion = grading.suggest_from_answers(checklist, partial)
    assert suggestion.reasons == ("instrument_precision: not answered (-1)",)


def test_no_on_an_exclusion_question_gives_x():
    checklist = grading.load_checklist()
    suggestion = grading.suggest_from_answers(checklist, answers(checklist, readout_in_range=False))
    assert suggestion.grade == "X"


def test_answers_file(tmp_path):
    checklist = grading.load_checklist()
    path = write(
        tmp_path / "a.toml", '[answers]\nreplicates_3 = false\n[notes]\nreplicates_3 = "two runs"\n'
    )
    got, notes = grading.load_answers(path, checklist)
    assert got["replicates_3"] is False and got["raw_data_available"] is None
    assert notes == {"replicates_3": "two runs"}


def test_answers_with_unknown_question(tmp_path):
    checklist = grading.load_checklist()
    path = write(tmp_path / "a.toml", "[answers]\nvibes_good = true\n")
    with pytest.raises(InputError, match="field 'answers.vibes_good': unknown question"):
        grading.load_answers(path, checklist)


def test_answers_not_boolean(tmp_path):
    checklist = grading.load_checklist()
    path = write(tmp_path / "a.toml", '[answers]\nreplicates_3 = "yes"\n')
    with pytest.raises(InputError, match="expected true or false"):
        grading.load_answers(path, checklist)


def test_lab_checklist(tmp_path):
    path = write(
        tmp_path / "c.toml",
        """
        [limits]
        A = 0
        B = 1
        C = 2
        [[question]]
        id = "ok"
        text = "ok?"
        penalty = 2
    """,
    )
    checklist = grading.load_checklist(path)
    assert grading.suggest_from_answers(checklist, {"ok": False}).grade == "C"
    bad = write(tmp_path / "bad.toml", '[[question]]\nid = "x"\ntext = "t"\npenalty = -1\n')
    with pytest.raises(InputError, match="field 'penalty'"):
        grading.load_checklist(bad)


def test_grade_scale():
    assert grading.check_grade("B") == "B"
    with pytest.raises(InputError, match="'Q' is not a grade; expected one of A"):
        grading.check_grade("Q")
    assert grading.lower_grade("A", 1) == "B"
    assert grading.lower_grade("C", 5) == "D"
    assert grading.lower_grade(None, 1) == "C"
