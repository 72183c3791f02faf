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

from curate.api import Catalog, open_catalog
from curate.errors import (
    CatalogError,
    CurateError,
    InputError,
    IntegrityError,
    NotFoundError,
    UnitError,
)
from curate.fit import FitOptions, FitResult, ModelBackend, PythonFunction
from curate.ingest import Draft
from curate.ingest.corrections import Correction
from curate.ledger import (
    AddPlan,
    AddResult,
    HistoryEntry,
    IntakeItem,
    IntakeReport,
    StoredProblem,
    VerifyReport,
)
from curate.records import (
    EXCLUSION_GRADE,
    GRADES,
    DatasetRecord,
    DatasetVersion,
    PointMask,
    SeriesArrays,
)
from curate.version import __version__
from curate.weighting import Policy, Selection, load_policy

__all__ = [
    "EXCLUSION_GRADE",
    "GRADES",
    "AddPlan",
    "AddResult",
    "Catalog",
    "CatalogError",
    "Correction",
    "CurateError",
    "DatasetRecord",
    "DatasetVersion",
    "Draft",
    "FitOptions",
    "FitResult",
    "HistoryEntry",
    "InputError",
    "IntakeItem",
    "IntakeReport",
    "IntegrityError",
    "ModelBackend",
    "NotFoundError",
    "PointMask",
    "Policy",
    "PythonFunction",
    "Selection",
    "SeriesArrays",
    "StoredProblem",
    "UnitError",
    "VerifyReport",
    "__version__",
    "load_policy",
    "open_catalog",
]
