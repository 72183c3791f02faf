"""The ledger: versioned, hash-chained datasets and stored PEtab problems (store, provenance,
verify, backup, intake, problems).

The bottom room of the catalog. It imports nothing above it: noise, weights, exports and fits
are built on :class:`Ledger` and never the other way round.
"""

from __future__ import annotations

from curate.ledger.backup import backup_catalog, restore_catalog
from curate.ledger.catalog import (
    DEFAULT_CATALOG,
    AddPlan,
    AddResult,
    HistoryEntry,
    Ledger,
    default_actor,
)
from curate.ledger.intake import IntakeItem, IntakeReport, intake_folder
from curate.ledger.problems import ProblemOutcome, ProblemSummary, StoredProblem
from curate.ledger.verify import VerifyReport

__all__ = [
    "DEFAULT_CATALOG",
    "AddPlan",
    "AddResult",
    "HistoryEntry",
    "IntakeItem",
    "IntakeReport",
    "Ledger",
    "ProblemOutcome",
    "ProblemSummary",
    "StoredProblem",
    "VerifyReport",
    "backup_catalog",
    "default_actor",
    "intake_folder",
    "restore_catalog",
]
