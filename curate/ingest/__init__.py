"""Readers that turn files (CSV, TSV, XLSX, PEtab) into validated drafts, and plausibility checks.

Nothing here opens the catalog: a draft is a validated record plus its arrays, ready for the
ledger to write.
"""

from __future__ import annotations

from curate.ingest.files import Draft, build_draft, draft_from_arrays, parse_condition
from curate.ingest.petab import PetabImport, read_petab_import, read_petab_problem

__all__ = [
    "Draft",
    "PetabImport",
    "build_draft",
    "draft_from_arrays",
    "parse_condition",
    "read_petab_import",
    "read_petab_problem",
]
