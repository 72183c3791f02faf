"""The export formats by name: each entry turns a weighted selection into files in a folder.

A writer gets an :class:`ExportInput` (the weighted table, the versions, the catalog facts it
may need) and the folder, and gives back {relative file name: sha256}. The writers themselves
(:mod:`curate.export.table`, ``petab``, ``datapackage``, ``prov``) take frames and plain data;
the small adapters here hand them what they need. Adding a format is one writer module plus one
entry in :data:`FORMATS`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from curate.export.datapackage import write_datapackage
from curate.export.manifest import build_manifest
from curate.export.petab import write_petab
from curate.export.prov import write_prov
from curate.export.table import write_table
from curate.ledger import Ledger
from curate.records import DatasetVersion
from curate.units import condition_text, ucum_code
from curate.version import __version__
from curate.weighting import WeightedTable
from curate.weighting.table import condition_column

__all__ = ["FORMATS", "ExportInput", "Writer"]


@dataclass(frozen=True)
class ExportInput:
    """What a writer may use: the weighted selection and the catalog it came from."""

    catalog: Ledger
    weighted: WeightedTable
    fmt: str
    files: dict[str, str]  # written so far (the README), for writers that describe the folder

    @property
    def table(self) -> pd.DataFrame:
        """Give the weighted long table."""
        return self.weighted.table

    @property
    def versions(self) -> list[DatasetVersion]:
        """Give the dataset versions in the table."""
        return self.weighted.versions


Writer = Callable[[ExportInput, Path], dict[str, str]]


def _dataset_facts(versions: list[DatasetVersion]) -> dict[str, dict[str, Any]]:
    facts = {}
    for version in versions:
        record = version.record
        facts[version.id] = {
            "conditions": {k: c.value for k, c in record.conditions.items()},
            "conditions_text": ", ".join(
                f"{k}={condition_text(c)}" for k, c in record.conditions.items()
            ),
            "label": record.observable.label,
            "relative": record.observable.relative,
            "calibration_group": record.protocol.calibration_group,
            "petab": record.annotations.get("petab"),
            "petab_rows": record.annotations.get("petab_rows"),
        }
    return facts


def _version_facts(catalog: Ledger, versions: list[DatasetVersion]) -> list[dict[str, Any]]:
    events = {
        (e["dataset_id"], e["version"]): e for e in catalog.events() if e["version"] is not None
    }
    return [
        {
            "id": v.id, "version": v.version, "content_hash": v.record.content_hash, "record_hash": v.record_hash,
            "lab": v.record.source.lab, "created_at": v.created_at.isoformat(),
            "actor": events.get((v.id, v.version), {}).get("actor", "unknown"),
            "raw_file_name": v.record.source.raw_file_name, "raw_file_sha256": v.record.source.raw_file_sha256,
            "grade": v.grade, "observable": v.record.observable.id,
        }
        for v in versions
    ]  # fmt: skip


def _table(given: ExportInput, folder: Path) -> dict[str, str]:
    return write_table(given.table, folder)


def _petab(given: ExportInput, folder: Path) -> dict[str, str]:
    return write_petab(given.table, _dataset_facts(given.versions), folder)


def _datapackage(given: ExportInput, folder: Path) -> dict[str, str]:
    datasets = pd.DataFrame([
        {"dataset_id": v.id, "version": v.version, "observable": v.record.observable.id, "unit": v.record.observable.unit,
         "unit_ucum": v.record.observable.ucum or "", "relative": v.record.observable.relative, "lab": v.record.source.lab,
         "grade": v.grade or "", "content_hash": v.record.content_hash}
        for v in given.versions
    ])  # fmt: skip
    condition_units = {
        condition_column(key): ucum_code(c.unit)
        for v in given.versions
        for key, c in v.record.conditions.items()
        if c.unit
    }
    return write_datapackage(
        given.table, datasets, folder, name="curate-export", condition_units=condition_units
    )


def _prov(given: ExportInput, folder: Path) -> dict[str, str]:
    weighted = given.weighted
    draft = build_manifest(given.catalog, given.fmt, weighted.policy, weighted.selection,
                           weighted.versions, given.files)  # fmt: skip
    return write_prov(
        draft, _version_facts(given.catalog, given.versions), folder, tool_version=__version__
    )


FORMATS: dict[str, Writer] = {
    "table": _table,
    "petab": _petab,
    "datapackage": _datapackage,
    "prov": _prov,
}
