"""Trust grades: our scale, the lab-editable checklist, and suggestions from answers.

The scale runs A (best) to D; X means "kept in the catalog, never fitted". A grade is always a
person's judgement with a written reason; this module only turns checklist answers and
consistency findings into *suggestions*.
"""

from __future__ import annotations

import hashlib
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.records import EXCLUSION_GRADE, GRADES, normalise_grade

__all__ = [
    "GRADE_MEANING",
    "Checklist",
    "GradeSuggestion",
    "Question",
    "cap_grade",
    "check_grade",
    "load_answers",
    "load_checklist",
    "lower_grade",
    "suggest_from_answers",
]

GRADE_MEANING = {
    "A": "trusted: documented, calibrated, replicated",
    "B": "sound, with a minor gap",
    "C": "usable, with known gaps",
    "D": "doubtful: fit with care",
    "X": "excluded: kept in the catalog, never fitted",
}

_FITTED_GRADES = ("A", "B", "C", "D")


def check_grade(grade: str, *, origin: str = "grade") -> str:
    """Give the grade (any case: 'b' is B) if it is on our scale; InputError otherwise."""
    grade = normalise_grade(grade)
    if grade not in GRADES:
        raise InputError(
            f"{origin}: '{grade}' is not a grade; expected one of "
            + ", ".join(f"{g} ({GRADE_MEANING[g].split(':')[0]})" for g in GRADES)
        )
    return grade


def cap_grade(grade: str | None, ceiling: str) -> str:
    """Give the grade no better than ``ceiling`` (an ungraded dataset gets the ceiling)."""
    if grade in _FITTED_GRADES and _FITTED_GRADES.index(grade) >= _FITTED_GRADES.index(ceiling):
        return grade
    return ceiling


def lower_grade(grade: str | None, steps: int) -> str:
    """Give the grade ``steps`` worse (never past D; an ungraded dataset counts as B)."""
    start = _FITTED_GRADES.index(grade) if grade in _FITTED_GRADES else 1
    return _FITTED_GRADES[min(start + steps, len(_FITTED_GRADES) - 1)]


@dataclass(frozen=True)
class Question:
    """One checklist question; a 'no' costs ``penalty`` points or excludes the dataset."""

    id: str
    text: str
    penalty: int
    exclude_if_no: bool = False


@dataclass(frozen=True)
class Checklist:
    """The grading checklist in force (shipped default or the lab's own file)."""

    questions: tuple[Question, ...]
    limits: dict[str, int]  # grade -> the largest penalty total that still earns it
    origin: str
    sha256: str

    def question(self, question_id: str) -> Question | None:
        """Give a question by id."""
        for question in self.questions:
            if question.id == question_id:
                return question
        return None


@dataclass(frozen=True)
class GradeSuggestion:
    """A suggested grade with every reason behind it."""

    grade: str
    penalty: int
    reasons: tuple[str, ...]
    answers: dict[str, bool | None] = field(default_factory=dict)

    def rationale(self) -> str:
        """Give the reasons as one rationale line."""
        return "; ".join(self.reasons) if self.reasons else "every checklist question answered yes"

    def to_dict(self) -> dict[str, Any]:
        """Give the suggestion as plain data."""
        return {
            "grade": self.grade,
            "penalty": self.penalty,
            "reasons": list(self.reasons),
            "answers": self.answers,
        }


def _read_toml(path: Path, what: str) -> dict[str, Any]:
    if not path.is_file():
        raise InputError(f"{path}: no such {what} file")
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not valid TOML ({err})") from None


def load_checklist(path: str | Path | None = None) -> Checklist:
    """Give the checklist from ``path``, or the one that ships with curate."""
    if path is None:
        text = resources.files("curate").joinpath("data/checklist.toml").read_text(encoding="utf-8")
        origin = "curate default checklist"
        content = tomllib.loads(text)
    else:
        origin = str(path)
        content = _read_toml(Path(path), "checklist")
        text = Path(path).read_text(encoding="utf-8")
    raw_questions = content.get("question")
    if not isinstance(raw_questions, list) or not raw_questions:
        raise InputError(f"{origin}: expected [[question]] tables")
    questions = []
    seen: set[str] = set()
    for number, raw in enumerate(raw_questions, start=1):
        if (
            not isinstance(raw, dict)
            or not isinstance(raw.get("id"), str)
            or not isinstance(raw.get("text"), str)
        ):
            raise InputError(f"{origin}, question {number}: needs an id and a text")
        penalty = raw.get("penalty", 1)
        if not isinstance(penalty, int) or penalty < 0:
            raise InputError(
                f"{origin}, question '{raw['id']}', field 'penalty': expected a whole number >= 0"
            )
        if raw["id"] in seen:
            raise InputError(f"{origin}: question '{raw['id']}' appears twice")
        seen.add(raw["id"])
        questions.append(
            Question(raw["id"], raw["text"], penalty, bool(raw.get("exclude_if_no", False)))
        )
    limits = content.get("limits", {"A": 1, "B": 3, "C": 6})
    for grade, limit in limits.items():
        if grade not in ("A", "B", "C") or not isinstance(limit, int):
            raise InputError(
                f"{origin}, field 'limits.{grade}': expected A, B, C with whole-number limits"
            )
    return Checklist(
        questions=tuple(questions),
        limits=dict(limits),
        origin=origin,
        sha256=hashlib.sha256(text.encode()).hexdigest(),
    )


def load_answers(
    path: str | Path, checklist: Checklist
) -> tuple[dict[str, bool | None], dict[str, str]]:
    """Give (answers, notes) from an answers file; unknown questions are an error."""
    path = Path(path)
    content = _read_toml(path, "checklist answers")
    unknown_tables = set(content) - {"answers", "notes", "dataset"}
    if unknown_tables:
        raise InputError(
            f"{path}, field '{sorted(unknown_tables)[0]}': unknown; expected [answers] and [notes]"
        )
    raw = content.get("answers")
    if not isinstance(raw, dict):
        raise InputError(f"{path}: expected an [answers] table of question = true/false")
    answers: dict[str, bool | None] = {q.id: None for q in checklist.questions}
    for key, value in raw.items():
        if checklist.question(key) is None:
            raise InputError(
                f"{path}, field 'answers.{key}': unknown question; the checklist asks: "
                + ", ".join(q.id for q in checklist.questions)
            )
        if not isinstance(value, bool):
            raise InputError(f"{path}, field 'answers.{key}': expected true or false")
        answers[key] = value
    notes = content.get("notes", {})
    if not isinstance(notes, dict):
        raise InputError(f"{path}, field 'notes': expected a table of question = text")
    return answers, {str(k): str(v) for k, v in notes.items()}


def suggest_from_answers(checklist: Checklist, answers: dict[str, bool | None]) -> GradeSuggestion:
    """Give the grade the answers earn: penalties add up; a 'no' on an exclusion question gives X.

    An unanswered question counts as a 'no' (what is not known cannot earn trust).
    """
    penalty = 0
    reasons = []
    excluded = False
    for question in checklist.questions:
        answer = answers.get(question.id)
        if answer is True:
            continue
        said = "not answered" if answer is None else "no"
        if question.exclude_if_no:
            excluded = True
            reasons.append(f"{question.id}: {said} (excludes)")
        else:
            penalty += question.penalty
            reasons.append(f"{question.id}: {said} (-{question.penalty})")
    if excluded:
        grade = EXCLUSION_GRADE
    else:
        grade = "D"
        for candidate in ("A", "B", "C"):
            if penalty <= checklist.limits.get(candidate, -1):
                grade = candidate
                break
    return GradeSuggestion(
        grade=grade, penalty=penalty, reasons=tuple(reasons), answers=dict(answers)
    )
