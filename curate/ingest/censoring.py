"""Censored cells at intake: ``<0.5``, ``<= 0.5``, ``>1e4`` and a lab's own tokens.

A censored point is a value known only to lie below (left-censored) or above (right-censored)
a limit: below a detection or quantification limit, above a saturation. It is stored as a
censoring code and its limit (:data:`curate.records.BELOW` / :data:`~curate.records.ABOVE`,
the limit in ``value``), never as a number or NaN.

How a lab writes one:

- a comparison before the number in a value (or replicate) cell: ``<0.5``, ``< 0.5``,
  ``<=0.5``, ``≤0.5`` (below), ``>1e4``, ``>=1e4``, ``≥1e4`` (above). For a continuous
  quantity "below" and "at or below" are the same event, so ``<`` and ``<=`` both mean below;
- a token the sidecar names (``[censoring] tokens = ["n.d.", "LOD", "BLQ"]`` or
  ``--censored-token``), meaning below the stated ``limit`` (in the value unit, or in the
  censoring section's own ``unit``; ``limits`` gives one limit per column). A token with no
  stated limit is refused: the limit is the lab's judgement, never ours to guess.

An uncertainty column never holds a censored cell (an uncertainty is not measured against a
limit): such a cell is refused.
"""

from __future__ import annotations

import dataclasses
from collections import Counter
from typing import Any

import numpy as np
import pandas as pd

from curate import units
from curate.errors import InputError
from curate.ingest.tables import Table
from curate.records import ABOVE, BELOW, OBSERVED

__all__ = [
    "CensoredColumn",
    "CensoringRules",
    "censoring_codes",
    "censoring_note",
    "refuse_censored_cells",
    "value_column",
]

# the comparison marks a cell may start with, longest first, and what they mean
_MARKS = (("<=", BELOW), (">=", ABOVE), ("≤", BELOW), ("≥", ABOVE), ("<", BELOW), (">", ABOVE))
_STARTS = tuple(mark for mark, _ in _MARKS)


@dataclasses.dataclass(frozen=True)
class CensoringRules:
    """The tokens a lab writes for "below the limit" and the limits they stand for.

    ``limit`` and ``limits`` (one per column header) are in the values' unit as given, already
    converted from the censoring section's own ``unit`` where it names one.
    """

    tokens: tuple[str, ...] = ()
    limit: float | None = None
    limits: dict[str, float] = dataclasses.field(default_factory=dict)
    origin: str = ""  # where the rules were written, for messages

    @classmethod
    def from_section(cls, section: Any, *, value_unit: str, origin: str) -> CensoringRules:
        """Give the rules of a validated sidecar ``[censoring]`` section (or None: no tokens)."""
        if section is None:
            return cls(origin=origin)
        own_unit = section.unit

        def in_value_unit(number: float, field: str) -> float:
            if own_unit is None:
                return float(number)
            try:
                converted = units.to_unit(float(number), own_unit, value_unit)
                return float(units.round_significant(np.array([converted]))[0])
            except Exception:
                raise InputError(
                    f"{origin}, field '{field}': the limit's unit '{own_unit}' cannot be "
                    f"expressed in the values' unit '{value_unit}'; give the limit in "
                    "a unit of the same kind"
                ) from None

        return cls(
            tokens=tuple(str(t).strip() for t in section.tokens if str(t).strip()),
            limit=None
            if section.limit is None
            else in_value_unit(section.limit, "censoring.limit"),
            limits={
                column: in_value_unit(number, f"censoring.limits.{column}")
                for column, number in section.limits.items()
            },
            origin=origin,
        )

    def limit_of(self, column: str) -> float | None:
        """Give the limit a token stands for in ``column`` (its own, else the common one)."""
        return self.limits.get(column, self.limit)


@dataclasses.dataclass(frozen=True)
class CensoredColumn:
    """A value column read: the numbers (limits where censored), the codes, how they were written."""

    values: np.ndarray
    codes: np.ndarray | None  # None: no cell is censored
    written: Counter[str]  # '<', '<=', '>', ... or the token -> how many cells


def _text(table: Table, column: str) -> pd.Series:
    return pd.Series(table.cells[column], dtype=object).astype(str).str.strip()


def value_column(
    table: Table,
    column: str,
    rules: CensoringRules,
    *,
    allow_empty: bool = False,
    what: str = "a measured value",
) -> CensoredColumn:
    """Give a value column read with its censored cells; other cells as ``Table.numbers`` reads them.

    Raises InputError naming the file, row and column of a token with no limit, a comparison
    with no number after it, or any cell that is neither a number nor censored.
    """
    text = _text(table, column)
    marked = text.str.startswith(_STARTS).to_numpy(dtype=bool)
    folded = {t.casefold(): t for t in rules.tokens}
    tokened = (
        text.str.casefold().isin(list(folded)).to_numpy(dtype=bool)
        if folded
        else np.zeros(len(text), dtype=bool)
    )
    if not marked.any() and not tokened.any():
        return CensoredColumn(_numbers(table, column, allow_empty, what), None, Counter())
    codes = np.zeros(len(text), dtype=np.int8)
    written: Counter[str] = Counter()
    cells = text.to_numpy(dtype=object).copy()
    for index in np.flatnonzero(marked):
        cell = str(cells[index])
        mark, code = next((m, c) for m, c in _MARKS if cell.startswith(m))
        rest = cell[len(mark) :].strip()
        if rest == "":
            raise InputError(
                table.locate(int(index), column)
                + f"'{cell}' names no limit; expected a comparison with its limit, e.g. "
                f"'{mark}0.5'"
            )
        if rest.startswith(_STARTS):
            raise InputError(
                table.locate(int(index), column)
                + f"'{cell}' has two comparison marks; expected one, e.g. '<0.5'"
            )
        cells[index] = rest
        codes[index] = code
        written[mark] += 1
    token_limit: dict[int, float] = {}
    if tokened.any():
        limit = rules.limit_of(column)
        first = int(np.argmax(tokened))
        if limit is None:
            token = str(cells[first])
            raise InputError(
                table.locate(first, column)
                + f"'{token}' marks a value below a limit, but no limit is stated; give it "
                "with --detection-limit X or 'limit = X' in the sidecar's [censoring] section"
                + (
                    f" ('limits.{column}' for this column alone)"
                    if column in rules.limits or rules.limits
                    else ""
                )
            )
        for index in np.flatnonzero(tokened):
            written[folded[str(cells[index]).casefold()]] += 1
            cells[index] = "0"  # a number in every dialect; the limit is set below
            codes[index] = BELOW
            token_limit[int(index)] = limit
    stand_in = dataclasses.replace(table, cells={**table.cells, column: cells})
    values = _numbers(stand_in, column, allow_empty, what)
    for position, stated in token_limit.items():
        values[position] = stated
    return CensoredColumn(values, codes if (codes != OBSERVED).any() else None, written)


def _numbers(table: Table, column: str, allow_empty: bool, what: str) -> np.ndarray:
    """Give ``Table.numbers``, its refusal of a word saying how a censored value is written."""
    try:
        return table.numbers(column, allow_empty=allow_empty, what=what)
    except InputError as err:
        message = str(err)
        if "is not a number" in message:
            message += (
                "; if it marks a value below a limit, write it '<0.5', or name the word with "
                "--censored-token and its limit with --detection-limit"
            )
        raise InputError(message) from None


def refuse_censored_cells(table: Table, column: str, rules: CensoringRules, *, role: str) -> None:
    """Raise InputError at the first censored cell of a column that cannot hold one (the sd)."""
    text = _text(table, column)
    marked = text.str.startswith(_STARTS).to_numpy(dtype=bool)
    if rules.tokens:
        folded = [t.casefold() for t in rules.tokens]
        marked = marked | text.str.casefold().isin(folded).to_numpy(dtype=bool)
    if marked.any():
        index = int(np.argmax(marked))
        raise InputError(
            table.locate(index, column)
            + f"'{text.iloc[index]}' is a censored cell in the {role} column; an {role} is not "
            "censored: give the sd of the observed points and leave a censored point's sd empty"
        )


def censoring_note(codes: np.ndarray, written: Counter[str]) -> dict[str, Any]:
    """Give the provenance note of a series' censored points: how many, and how written."""
    return {
        "below": int(np.sum(codes == BELOW)),
        "above": int(np.sum(codes == ABOVE)),
        "written_as": dict(sorted(written.items())),
    }


_CODE_OF_WORD = {"": OBSERVED, "observed": OBSERVED, "below": BELOW, "above": ABOVE}


def censoring_codes(given: Any, *, length: int, origin: str) -> np.ndarray:
    """Give int8 censoring codes from words ('', 'below', 'above') or codes (0, 1, 2).

    Raises InputError naming the first entry that is neither, or a length that differs.
    """
    items = list(np.asarray(given, dtype=object).reshape(-1))
    if len(items) != length:
        raise InputError(
            f"{origin}: censored has {len(items)} points but time has {length}; the arrays "
            "must have equal lengths"
        )
    codes = np.zeros(length, dtype=np.int8)
    for position, item in enumerate(items):
        if isinstance(item, str) and item.strip().lower() in _CODE_OF_WORD:
            codes[position] = _CODE_OF_WORD[item.strip().lower()]
        elif item is None or (isinstance(item, float) and np.isnan(item)):
            codes[position] = OBSERVED
        elif not isinstance(item, bool | str) and item in (OBSERVED, BELOW, ABOVE):
            codes[position] = int(item)
        else:
            raise InputError(
                f"{origin}, field 'censored': point {position + 1} is {item!r}; expected "
                "'' (observed), 'below' or 'above' (or 0, 1, 2)"
            )
    return codes
