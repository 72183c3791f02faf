"""The export formats by name: each entry turns a weighted selection into files in a folder.

A writer gets an :class:`ExportInput` (the weighted table, the versions, the catalog facts it
may need, and what the format settled before anything was written: :class:`Prepared`) and the
folder, and gives back {relative file name: sha256}. The writers themselves
(:mod:`curate.export.table`, ``petab``, ``datapackage``, ``prov``) take frames and plain data;
the small adapters here hand them what they need. Adding a format is one writer module plus one
entry in :data:`FORMATS`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from curate.errors import InputError
from curate.export.datapackage import write_datapackage
from curate.export.manifest import NamedVersion, build_manifest
from curate.export.petab import write_petab
from curate.export.petab_problem import (
    ProblemExport,
    plan_problem_export,
    problem_of_selection,
    write_problem_export,
)
from curate.export.prov import write_prov
from curate.export.table import write_table, write_table_batches, write_units
from curate.ledger import Ledger
from curate.ledger.provenance import BATCH_EVENT
from curate.records import DatasetVersion
from curate.units import (
    canonical_unit,
    condition_text,
    scale_factor,
    short_unit,
    to_unit,
    ucum_code,
)
from curate.version import __version__
from curate.weighting import WeightedTable
from curate.weighting.stream import WeightedStream
from curate.weighting.table import SetAside, condition_column

__all__ = [
    "FORMATS",
    "PREPARE",
    "STREAMED",
    "ExportInput",
    "Prepared",
    "Writer",
    "units_description",
]


@dataclass(frozen=True)
class Prepared:
    """What a format settles before anything is written (a refusal leaves no files behind):
    text for the README, fields for the manifest, and the plan its writer writes."""

    readme: str = ""
    manifest: dict[str, Any] = field(default_factory=dict)
    plan: Any = None


@dataclass(frozen=True)
class ExportInput:
    """What a writer may use: the weighted selection and the catalog it came from."""

    catalog: Ledger
    weighted: WeightedTable | WeightedStream  # a stream for the formats in STREAMED
    fmt: str
    files: dict[str, str]  # written so far (the README), for writers that describe the folder
    prepared: Prepared = Prepared()

    @property
    def table(self) -> pd.DataFrame:
        """Give the weighted long table."""
        return self.weighted.table

    @property
    def versions(self) -> list[DatasetVersion]:
        """Give the dataset versions in the table (parsed whole; a stream parses them here)."""
        weighted = self.weighted
        return (
            weighted.full_versions() if isinstance(weighted, WeightedStream) else weighted.versions
        )


Writer = Callable[[ExportInput, Path], dict[str, str]]


def _dataset_facts(
    versions: list[DatasetVersion], aside: SetAside | None = None
) -> dict[str, dict[str, Any]]:
    """Give what the PEtab writers need of each dataset; per-point annotations without the
    points a mask sets aside (they follow the weighted table's rows)."""
    aside = aside or SetAside(pd.DataFrame(), {})
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
            "petab_rows": aside.annotation(version.id, record.annotations.get("petab_rows")),
            "petab_row_index": aside.annotation(
                version.id, record.annotations.get("petab_row_index")
            ),
            # a stored problem's rows keep their cells as imported: in the unit given then
            "unit_verbatim": record.observable.unit_original,
        }
    return facts


def _version_facts(catalog: Ledger, versions: list[DatasetVersion]) -> list[dict[str, Any]]:
    events: dict[tuple[Any, Any], dict[str, Any]] = {}
    for e in catalog.events():
        if e["version"] is not None:
            events[(e["dataset_id"], e["version"])] = e
        elif e["kind"] == BATCH_EVENT:  # one event wrote many versions
            for entry in e["payload"].get("datasets", []):
                events[(entry[0], entry[1])] = e
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


def units_description(versions: Sequence[NamedVersion], *, petab: bool) -> dict[str, Any]:
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
    weighted = given.weighted
    if isinstance(weighted, WeightedStream):
        written = write_table_batches(weighted.schema, weighted.batches(), folder)
    else:
        written = write_table(given.table, folder)
    return {**written, **write_units(folder, units_description(weighted.versions, petab=False))}


def _verbatim_unit(original: str | None, canonical: str | None) -> dict[str, str | None]:
    """Give the symbol and UCUM code of a unit as given at intake (a UCUM code only where
    curate's code for the canonical unit is that unit's, factor 1)."""
    if not original:
        return {
            "unit": short_unit(canonical) if canonical else None,
            "ucum": ucum_code(canonical or ""),
        }
    try:
        parsed = canonical_unit(original, role="value")
        same = scale_factor(parsed) == 1.0 and to_unit(0.0, original, parsed.canonical) == 0.0
    except InputError:
        return {"unit": original, "ucum": None}
    return {"unit": original, "ucum": parsed.ucum if same else None}  # fmt: skip


def problem_units_description(versions: list[DatasetVersion]) -> dict[str, Any]:
    """Give ``units.json`` of a stored problem's export: time, values and condition columns in
    the units the problem was imported with (its cells are verbatim, never converted)."""
    time_units = sorted({v.record.time_unit_original for v in versions})
    conditions: dict[str, Any] = {}
    for version in versions:
        for key, condition in version.record.conditions.items():
            text = isinstance(condition.value, bool | str)
            unit = (
                {"unit": None, "ucum": None}
                if text
                else _verbatim_unit(condition.unit_original, condition.unit)
            )
            conditions.setdefault(key, {"column": "curateConditions" if text else key, **unit})  # fmt: skip
    return {
        "about": "the unit of every column; a symbol (as pint reads it) and a UCUM code",
        "time": {"column": "time", **_verbatim_unit(time_units[0], None)},
        "values": "measurement, numeric noiseParameters, curateSd: in the unit named by the "
        "row's curateUnit, as the problem was imported",
        "conditions": dict(sorted(conditions.items())),
    }


def _petab(given: ExportInput, folder: Path) -> dict[str, str]:
    plan = given.prepared.plan
    if isinstance(plan, ProblemExport):
        written = write_problem_export(plan, folder)
        return {**written, **write_units(folder, problem_units_description(given.versions))}
    written = write_petab(given.table, _dataset_facts(given.versions, given.weighted.aside), folder)
    return {**written, **write_units(folder, units_description(given.versions, petab=True))}


def _prepare_petab(catalog: Ledger, weighted: WeightedTable) -> Prepared:
    """Refuse what PEtab cannot hold; for a selection from one stored problem, plan the
    problem's export whole (see :mod:`curate.export.petab_problem`)."""
    _check_times(weighted)
    links = {v.id: v.record.annotations.get("petab_problem") for v in weighted.versions}
    problem_id = problem_of_selection(links)
    if problem_id is None:
        return Prepared()
    time_units = {v.record.time_unit_original for v in weighted.versions}
    if len(time_units) > 1:
        raise InputError(
            f"petab export: the datasets of stored problem {problem_id} were imported with "
            f"different time units ({', '.join(sorted(time_units))}), so their times cannot "
            "share one measurement table; select the datasets of one import"
        )
    # the newest stored version: an edit (bounds, a corrected model) stores a new version
    # while the unchanged datasets stay linked to the one they were first imported from
    problem = catalog.problem(problem_id)
    plan = plan_problem_export(
        problem, weighted.table, _dataset_facts(weighted.versions, weighted.aside)
    )
    return Prepared(plan.readme_text(), {"petab_problem": plan.manifest_entry()}, plan)


def _check_times(weighted: WeightedTable) -> None:
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


# the formats whose writer takes the weighted table as a stream of record batches
STREAMED = frozenset({"table"})

# what runs before anything is written: a refused export leaves no files behind
PREPARE: dict[str, Callable[[Ledger, WeightedTable], Prepared]] = {"petab": _prepare_petab}

FORMATS: dict[str, Writer] = {
    "table": _table,
    "petab": _petab,
    "datapackage": _datapackage,
    "prov": _prov,
}
