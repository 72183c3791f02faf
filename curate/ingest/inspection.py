"""What a data file holds and what `curate add` would make of it, without writing anything.

``curate inspect FILE`` lists a workbook's sheets, the table's header line, columns (with the
unit a header states and the role intake gives it), the detected dialect of a text file, and
the dataset `add` would log with the options given, or the one line it would refuse with.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.ingest.files import build_draft, resolve_pair
from curate.ingest.headers import header_unit, match_column
from curate.ingest.reading import layout_of, read_with_layout
from curate.ingest.sidecar import SidecarColumns, deep_merge, validate_layout
from curate.ingest.tables import NAMED_SUFFIXES, read_table
from curate.ingest.workbook import workbook_sheets

__all__ = ["FileInspection", "inspect_file"]


@dataclass
class FileInspection:
    """A data file as intake reads it, and what ``add`` would do with it."""

    path: str
    sheets: list[dict[str, Any]] = field(default_factory=list)  # {"name", "rows"} of a workbook
    sheet: str | None = None
    dialect: dict[str, Any] | None = None
    header_line: int | None = None
    rows: int = 0
    columns: list[dict[str, Any]] = field(
        default_factory=list
    )  # {"header", "name", "unit", "role"}
    layout_notes: list[str] = field(default_factory=list)  # title rows, merged headers, footer
    table_error: str | None = None
    would_add: dict[str, Any] | None = None
    would_refuse: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Give the plain data ``curate inspect --json`` prints."""
        return dataclasses.asdict(self)


def inspect_file(path: str | Path, *, sidecar: str | Path | None = None,
                 options: dict[str, Any] | None = None, actor: str = "inspect") -> FileInspection:  # fmt: skip
    """Give what the file holds and what ``add`` would log from it (nothing is written)."""
    data, sidecar_path, content = resolve_pair(Path(path), Path(sidecar) if sidecar else None)
    found = FileInspection(path=str(data))
    if data.suffix.lower() not in NAMED_SUFFIXES:
        raise InputError(
            f"{data}: unsupported file type '{data.suffix}'; expected "
            + ", ".join(sorted(NAMED_SUFFIXES))
        )
    if not data.is_file():
        raise InputError(f"{data}: no such file")
    merged = deep_merge(content, options or {})
    if data.suffix.lower() == ".xlsx":
        found.sheets = [{"name": name, "rows": rows} for name, rows in workbook_sheets(data)]
    try:
        # the table as placed, before the checks of its columns: shown even when add refuses
        layout = validate_layout(merged, origin=str(data), sidecar=sidecar_path)
        table = read_table(data, layout=layout_of(layout))
    except InputError as err:
        found.table_error = str(err)
        found.would_refuse = str(err)
        return found
    try:
        read_with_layout(data, merged, sidecar_path)
    except InputError as err:
        found.would_refuse = str(err)
    found.sheet, found.header_line, found.rows = table.sheet, table.header_line, len(table)
    found.dialect = table.dialect.to_dict() if table.dialect is not None else None
    found.layout_notes = list(table.notes)
    columns = SidecarColumns.model_validate(merged.get("columns", {}))
    roles = {}
    for role in ("time", "value", "sd", "replicate", "n"):
        header = match_column(str(getattr(columns, role)), table.columns)
        if header is not None:
            roles[header] = role
    wide = merged.get("layout", "auto") != "long" and "value" not in roles.values()
    if wide:  # one column per replicate: the listed ones, else every column but the time
        listed = [match_column(r, table.columns) for r in columns.replicates or []]
        for header in listed if columns.replicates else table.columns:
            if header is not None and header not in roles:
                roles[header] = "replicate column"
    for header in table.columns:
        name, unit = header_unit(header)
        found.columns.append({"header": header, "name": name, "unit": unit,
                              "role": roles.get(header)})  # fmt: skip
    if found.would_refuse is not None:
        return found
    try:
        draft = build_draft(data, sidecar=sidecar_path, options=options, actor=actor)
    except InputError as err:
        found.would_refuse = str(err)
        return found
    record = draft.record
    found.would_add = {
        "observable": record.observable.id,
        "unit": record.observable.unit_original,
        "relative": record.observable.relative,
        "time_unit": record.time_unit_original,
        "points": len(draft.arrays),
        "lab": record.source.lab,
        "conditions": {k: v.model_dump(mode="json") for k, v in record.conditions.items()},
        "warnings": [w.message for w in record.warnings],
        "time_cells": record.annotations.get("time_cells"),
    }
    return found
