"""Exports: writers for each open format, the manifest, and the runs that write them.

``files`` (atomic writes, the folder rule), ``table``/``petab``/``datapackage``/``prov`` (pure
writers: frames in, files out), ``petab_problem`` (a stored PEtab problem given back whole),
``formats`` (the name -> writer registry), ``manifest`` (the
sealed manifest, the README, the run's event), ``actions`` (export and fold sets of a
selection), ``trace`` (trace and impact).
"""

from __future__ import annotations

from curate.export.actions import ExportResult, FoldSet, export, write_folds
from curate.export.formats import FORMATS
from curate.export.trace import ImpactEntry, TraceReport, impact, recorded_head, trace

__all__ = [
    "FORMATS",
    "ExportResult",
    "FoldSet",
    "ImpactEntry",
    "TraceReport",
    "export",
    "impact",
    "recorded_head",
    "trace",
    "write_folds",
]
