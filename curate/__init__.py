"""curate: measured time courses with provenance, noise and trust, ready for any fitter.

The public Python API mirrors the command line::

    import curate
    catalog = curate.open_catalog("lab.db")
    result = catalog.add("run7.csv")            # reads run7.toml beside it
    catalog.list(observable="front_speed")
    catalog.points(result.id)                   # a pandas DataFrame
    catalog.verify().ok
"""

from __future__ import annotations

__version__ = "0.1.0"

from curate.catalog import (
    AddPlan,
    AddResult,
    Catalog,
    HistoryEntry,
    VerifyReport,
    open_catalog,
)
from curate.errors import (
    CatalogError,
    CurateError,
    InputError,
    IntegrityError,
    NotFoundError,
    UnitError,
)
from curate.ingest import Draft, IntakeItem, IntakeReport
from curate.records import (
    EXCLUSION_GRADE,
    GRADES,
    DatasetRecord,
    DatasetVersion,
    SeriesArrays,
)

__all__ = [
    "EXCLUSION_GRADE",
    "GRADES",
    "AddPlan",
    "AddResult",
    "Catalog",
    "CatalogError",
    "CurateError",
    "DatasetRecord",
    "DatasetVersion",
    "Draft",
    "HistoryEntry",
    "InputError",
    "IntakeItem",
    "IntakeReport",
    "IntegrityError",
    "NotFoundError",
    "SeriesArrays",
    "UnitError",
    "VerifyReport",
    "__version__",
    "open_catalog",
]
