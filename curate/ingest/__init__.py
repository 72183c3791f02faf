"""Readers that turn files (CSV, TSV, XLSX, PEtab) into validated drafts, and folder intake."""

from __future__ import annotations

from curate.ingest.files import Draft, build_draft, draft_from_arrays
from curate.ingest.inbox import IntakeItem, IntakeReport, intake_folder
from curate.ingest.petab import read_petab_problem

__all__ = [
    "Draft",
    "IntakeItem",
    "IntakeReport",
    "build_draft",
    "draft_from_arrays",
    "intake_folder",
    "read_petab_problem",
]
