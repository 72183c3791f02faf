"""Reading a data file as its sidecar's layout fields place it, and filling in the units its
headers state (a unit given that contradicts a header is refused)."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

from curate import units
from curate.errors import InputError
from curate.ingest.headers import header_unit, match_column
from curate.ingest.sidecar import SidecarLayout, validate_layout
from curate.ingest.tables import Layout, Table, read_table

__all__ = ["layout_of", "read_with_layout"]


def layout_of(layout: SidecarLayout) -> Layout:
    """Give the table reader's layout from the sidecar's layout fields."""
    dialect = layout.dialect
    return Layout(
        sheet=layout.sheet, header_row=layout.header_row, skip_rows=layout.skip_rows,
        footer_rows=layout.footer_rows, end_at_blank=layout.end_at_blank,
        delimiter=dialect.delimiter, decimal=dialect.decimal, thousands=dialect.thousands,
        encoding=dialect.encoding,
    )  # fmt: skip


def read_with_layout(path: Path, merged: dict[str, Any], sidecar_path: Path | None
                     ) -> tuple[Table, dict[str, Any], dict[str, Any]]:  # fmt: skip
    """Give the table as the sidecar's layout fields place it, the metadata with the units its
    headers state filled in (where none is given; a contradiction is refused), and what was
    found (the dialect, the header units) for the dataset's provenance."""
    layout = validate_layout(merged, origin=str(path), sidecar=sidecar_path)
    if path.suffix.lower() == ".xlsx" and sidecar_path is not None:
        given = merged.get("dialect")
        if isinstance(given, dict) and any(v is not None for v in given.values()):
            raise InputError(
                f"{sidecar_path}: [dialect] applies to text files, not to the workbook "
                f"{path.name} (its cells hold numbers, not text); leave [dialect] out"
            )
    table = read_table(path, layout=layout_of(layout))
    merged = copy.deepcopy(merged)  # the units filled in must not reach the caller's dicts
    found: dict[str, Any] = {}
    if table.dialect is not None:
        found["file_dialect"] = table.dialect.to_dict()
    if table.sheet is not None:
        found["file_sheet"] = table.sheet
    if table.notes:
        found["file_layout"] = list(table.notes)
    if match_column(layout.columns.time, table.columns) is None:
        raise InputError(
            f"{table.path}: required column '{layout.columns.time}' is missing; the columns "
            f"are {', '.join(table.columns)}; name the time column with --column time=HEADER "
            "(columns.time in the sidecar)" + table.header_hint(layout.columns.time)
        )
    given_roles = merged.get("columns", {}) if isinstance(merged.get("columns"), dict) else {}
    for role in ("value", "sd", "replicate", "n"):
        wanted = given_roles.get(role)
        if isinstance(wanted, str) and match_column(wanted, table.columns) is None:
            raise InputError(
                f"{table.path}: --column {role}={wanted} (columns.{role}) names no column; the "
                f"columns are {', '.join(table.columns)}"
            )
    value_header = match_column(layout.columns.value, table.columns)
    if value_header is None and layout.layout == "auto":
        others = [match_column(str(getattr(layout.columns, r)), table.columns) for r in ("sd", "n")]
        if any(o is not None for o in others):
            raise InputError(
                f"{table.path}: no value column among {', '.join(table.columns)}, but an "
                f"'{next(o for o in others if o)}' column, so this is not one column per replicate; "
                "name the value column with --column value=HEADER (columns.value in the sidecar)"
            )
    stated: dict[str, str] = {}
    for role, wanted, field in (("time", layout.columns.time, ("time", "unit")),
                                ("value", layout.columns.value, ("observable", "unit"))):  # fmt: skip
        header = match_column(wanted, table.columns)
        if header is None:
            continue
        unit = header_unit(header)[1]
        if unit is None:
            continue
        if role == "time":
            unit = units.time_unit_spelling(unit)  # 'Time (Min)' is in minutes
        stated[role] = unit
        section = merged.setdefault(field[0], {})
        if not isinstance(section, dict):
            continue
        given = section.get(field[1])
        if given is None:
            section[field[1]] = unit
        elif not _same_unit(str(given), unit):
            option = "--time-unit" if role == "time" else "--unit"
            raise InputError(
                f"{path}, {table.row_word} {table.header_line}, column '{header}': the header "
                f"states '{unit}', but the {role} unit given ({option} or the sidecar) is "
                f"'{given}'; correct one of them"
            )
    time_header = match_column(layout.columns.time, table.columns)
    if (
        "value" not in stated
        and layout.layout != "long"
        and match_column(layout.columns.value, table.columns) is None
    ):
        # wide: one column per replicate; their headers give the unit when they all state one
        named = layout.columns.replicates or [c for c in table.columns if c != time_header]
        column_units = {header_unit(c)[1] for c in named}
        if len(column_units - {None}) > 1:
            raise InputError(
                f"{path}, {table.row_word} {table.header_line}: the replicate columns state "
                f"different units ({', '.join(sorted(str(u) for u in column_units - {None}))}); "
                "give every replicate in one unit"
            )
        section = merged.setdefault("observable", {})
        if len(column_units) == 1 and None not in column_units and isinstance(section, dict):
            (unit,) = column_units
            given = section.get("unit")
            if given is None:
                section["unit"] = unit
            elif not _same_unit(str(given), str(unit)):
                raise InputError(
                    f"{path}, {table.row_word} {table.header_line}: the replicate columns state "
                    f"'{unit}', but the value unit given (--unit or the sidecar) is '{given}'; "
                    "correct one of them"
                )
            stated["value"] = str(unit)
    sd_header = match_column(layout.columns.sd, table.columns)
    if sd_header is not None and (sd_unit := header_unit(sd_header)[1]) is not None:
        value_unit = (merged.get("observable") or {}).get("unit")
        if value_unit is not None and not _same_unit(str(value_unit), sd_unit):
            raise InputError(
                f"{path}, {table.row_word} {table.header_line}, column '{sd_header}': the header "
                f"states '{sd_unit}', but the values are in '{value_unit}'; give the sd in the "
                "values' unit (a percentage of the value: --sd-type percent and a header without "
                "the unit)"
            )
        stated["sd"] = sd_unit
    if stated:
        found["header_units"] = stated
    return table, merged, found


def _same_unit(given: str, stated: str) -> bool:
    """Tell whether two unit strings name the same unit (1 of one is 1 of the other)."""
    try:
        return abs(units.to_unit(1.0, given, stated) - 1.0) < 1e-12
    except Exception:  # another dimension, or not a unit at all: not the same
        return False
