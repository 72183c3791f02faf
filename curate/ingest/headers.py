"""Column headers as labs write them: ``Time (min)``, ``pERK [nM]``, ``SD (nM)``.

A header whose last part in round or square brackets parses as a unit gives its bare name
(what a column mapping or the default names match) and that unit (what intake takes for the
time or value unit when none is given, and checks against one that is).
"""

from __future__ import annotations

import re

from curate import units
from curate.errors import UnitError

__all__ = ["header_unit", "match_column"]

_UNIT_IN_HEADER = re.compile(r"^(?P<name>.*?)\s*[\(\[](?P<unit>[^()\[\]]+)[\)\]]\s*$")


def header_unit(header: str) -> tuple[str, str | None]:
    """Give a header's bare name and the unit it states (None where it states none)."""
    found = _UNIT_IN_HEADER.match(header.strip())
    if found is None or not found.group("name").strip():
        return header.strip(), None
    unit = found.group("unit").strip()
    try:
        units.canonical_unit(units.time_unit_spelling(unit))  # 'MIN' too, as a time column says
    except UnitError:
        return header.strip(), None  # "Value (replicate 1)": brackets, but not a unit
    return found.group("name").strip(), unit


def match_column(wanted: str, headers: tuple[str, ...]) -> str | None:
    """Give the header ``wanted`` names: the same text (any case), else the one whose bare
    name it is (``time`` finds ``Time (min)``); None if no header or several match."""
    lower = wanted.strip().lower()
    exact = [h for h in headers if h.strip().lower() == lower]
    if exact:
        return exact[0]
    bare = [h for h in headers if header_unit(h)[0].lower() == lower]
    return bare[0] if len(bare) == 1 else None
