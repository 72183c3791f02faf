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

from curate.errors import InputError
from curate.export.datapackage import write_datapackage
from curate.export.manifest import build_manifest
from curate.export.petab import write_petab
from curate.export.prov import write_prov
from curate.export.table import write_table, write_units
from curate.ledger import Ledger
from curate.records import DatasetVersion
from curate.units import condition_text, short_unit, to_unit, ucum_code
from curate.version import __version__
from curate.weighting import WeightedTable
from curate.weighting.table import condition_column

__all__ = ["CHECKS", "FORMATS", "ExportInput", "Writer", "units_description"]


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
            "unit": short_unit(record.observable.unit),
            "grade": version.grade,
            "time_unit": record.time_unit_original,
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


def units_description(versions: list[DatasetVersion], *, petab: bool) -> dict[str, Any]:
    """Give what ``units.json`` says: the unit of time, of the values, of each condition column.

    A condition key has one kind across the catalog (see the ledger), so its column has one
    canonical unit; a text or true/false column has none (null).
    """
    found: dict[str, set[str]] = {}
    for version in versions:
        for key, condition in version.record.conditions.items():
            kinds = found.setdefault(key, set())
            text = isinstance(condition.value, bool | str)
            kinds.add("" if text else condition.unit or "dimensionless")
    conditions = {}
    for key in sorted(found):
        only = next(iter(found[key])) if len(found[key]) == 1 else ""
        text = not only and "" in found[key]
        conditions[key] = {
            # in PEtab, text conditions travel in the measurement table's curateConditions
            "column": ("curateConditions" if text else key) if petab else condition_column(key),
            "unit": short_unit(only) if only else None,
            "ucum": ucum_code(only) if only else None,
        }
    values = (
        "measurement, noiseParameters, curateSd: in the unit named by the row's curateUnit"
        if petab
        else "value, sd, sigma: in the unit named by the row's unit (symbol) and unit_ucum "
        "columns; weight in its inverse square"
    )
    return {
        "about": "the unit of every column; a symbol (as pint reads it) and a UCUM code",
        "time": {"column": "time", "unit": "s", "ucum": "s"},
        "values": values,
        "conditions": conditions,
    }


def _table(given: ExportInput, folder: Path) -> dict[str, str]:
    written = write_table(given.table, folder)
    return {**written, **write_units(folder, units_description(given.versions, petab=False))}


def _petab(given: ExportInput, folder: Path) -> dict[str, str]:
    written = write_petab(given.table, _dataset_facts(given.versions), folder)
    return {**written, **write_units(folder, units_description(given.versions, petab=True))}


def _check_petab(weighted: WeightedTable) -> None:
    """Refuse points before t = 0: a PEtab 1 simulation starts at 0 (the initial time of SBML
    models; PEtab 1 has no way to name another), so a fitter cannot place them."""
    early = weighted.table[weighted.table["time"] < 0]
    if early.empty:
        return
    dataset_id = str(early["dataset_id"].iloc[0])
    version = next(v for v in weighted.versions if v.id == dataset_id)
    unit = version.record.time_unit_original
    times = early.loc[early["dataset_id"] == dataset_id, "time"].unique()
    shown = ", ".join(f"{to_unit(float(t), 'second', unit):.6g}" for t in times[:5])
    more = f" and {len(times) - 5} more" if len(times) > 5 else ""
    raise InputError(
        f"petab export: dataset {dataset_id} has {len(times)} time(s) before t = 0 "
        f"(t = {shown}{more} {unit}), but a PEtab 1 simulation starts at t = 0; leave the "
        "dataset out of the selection (--id for the others, or --lab), or export table or "
        "datapackage, which keep them"
    )


def _datapackage(given: ExportInput, folder: Path) -> dict[str, str]:
    datasets = pd.DataFrame([
        {"dataset_id": v.id, "version": v.version, "observable": v.record.observable.id, "unit": v.record.observable.unit,
         "unit_ucum": v.record.observable.ucum or "", "relative": v.record.observable.relative, "lab": v.record.source.lab,
         "grade": v.grade or "", "content_hash": v.record.content_hash}
        for v in given.versions
    ])  # fmt: skip
    described = units_description(given.versions, petab=False)["conditions"]
    condition_units = {entry["column"]: entry["ucum"] for entry in described.values()}
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


# checks that run before anything is written: a refused export leaves no files behind
CHECKS: dict[str, Callable[[WeightedTable], None]] = {"petab": _check_petab}

FORMATS: dict[str, Writer] = {
    "table": _table,
    "petab": _petab,
    "datapackage": _datapackage,
    "prov": _prov,
}
