"""Import of a PEtab (v1) problem's measurements as datasets.

Rows are grouped by (observableId, simulationConditionId, preequilibrationConditionId,
datasetId); replicates stay together. Every cell of every measurement row is kept verbatim
(``annotations['petab_rows']``), with each point's row number in its file
(``annotations['petab_row_index']``) and the observable's and the condition's table rows, so
that an export can give back each measurement, time and noise value exactly, in file order.
Files are read as text first; real problems have CRLF line ends, missing final newlines and
columns we do not interpret.

The problem itself is read too, byte for byte (:class:`PetabFiles`): the YAML, every file it
names (SBML models, condition, observable, parameter, measurement and visualization tables),
each read once, so that what the tables were parsed from is exactly what the catalog stores.
Storing them is the ledger's part (``curate.ledger.problems``); a file the YAML names that is
missing, unreadable or not what its role needs refuses the whole problem here, before anything
is written.

A problem that curate exported carries its own facts back: where the annotation columns
``curateUnit``, ``curateRelative``, ``curateGrade`` and ``curateSd`` are present they give each
dataset its unit, relative flag, grade and sd (before trust inflation), and ``units.json``
beside the problem gives the condition columns their units.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from curate.errors import InputError
from curate.ingest.files import Draft, draft_from_arrays
from curate.ingest.tables import MAX_FILE_BYTES, Table, table_from_bytes

__all__ = [
    "FILE_ROLES",
    "PetabFiles",
    "PetabImport",
    "petab_file_names",
    "read_petab_import",
    "read_petab_problem",
    "sbml_model_id",
]

# the YAML fields that name a problem's files, by the role the file plays (PEtab v1 schema)
FILE_ROLES = {
    "sbml": "sbml_files",
    "condition": "condition_files",
    "observable": "observable_files",
    "parameter": "parameter_file",
    "measurement": "measurement_files",
    "visualization": "visualization_files",
}


@dataclass(frozen=True)
class PetabFiles:
    """A PEtab problem's files as read, byte for byte: what the catalog stores of it.

    ``files`` maps each name as the YAML gives it (the YAML itself under its own file name,
    ``source``) to the file's bytes; ``model_ids`` are the ids of the SBML ``<model>``
    elements, in the YAML's order.
    """

    source: str
    files: dict[str, bytes]
    model_ids: tuple[str, ...]

    def manifest(self) -> dict[str, str]:
        """Give {file name: sha256 of its bytes}."""
        return {name: hashlib.sha256(raw).hexdigest() for name, raw in self.files.items()}


@dataclass(frozen=True)
class PetabImport:
    """A PEtab problem read whole: its files and one draft per measurement group."""

    problem: PetabFiles
    drafts: list[Draft]


_GROUP_COLUMNS = (
    "observableId",
    "simulationConditionId",
    "preequilibrationConditionId",
    "datasetId",
)
_SCALE_OF_TRANSFORMATION = {"lin": "linear", "log": "ln", "log10": "log10"}
UNITS_FILE = "units.json"  # what curate's exports write beside their tables
_MAX_UNITS_BYTES = 1024 * 1024


def _condition_units(base: Path) -> dict[str, str]:
    """Give {condition column: unit} from a curate export's units.json (empty without one)."""
    path = base / UNITS_FILE
    if not path.is_file():
        return {}
    if path.stat().st_size > _MAX_UNITS_BYTES:
        raise InputError(f"{path}: larger than {_MAX_UNITS_BYTES} bytes; expected curate's units")
    try:
        content = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not readable JSON ({err})") from None
    conditions = content.get("conditions") if isinstance(content, dict) else None
    if not isinstance(conditions, dict):
        raise InputError(f"{path}, field 'conditions': missing; expected curate's units.json")
    found = {}
    for key, entry in conditions.items():
        unit = entry.get("unit") if isinstance(entry, dict) else None
        column = entry.get("column", key) if isinstance(entry, dict) else key
        if isinstance(unit, str) and unit:
            found[str(column)] = unit
    return found


def _load_yaml(path: Path) -> tuple[bytes, dict[str, Any]]:
    import yaml

    if not path.is_file():
        raise InputError(f"{path}: no such PEtab problem file")
    raw = _read_bytes(path)
    try:
        content = yaml.safe_load(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a readable YAML file (not UTF-8 text)") from None
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        problem = getattr(err, "problem", None) or "invalid YAML"
        at = f"line {mark.line + 1}: " if mark is not None else ""
        raise InputError(f"{path}: not a readable YAML file ({at}{problem})") from None
    if not isinstance(content, dict) or "problems" not in content:
        raise InputError(f"{path}: not a PEtab problem file (no 'problems' list)")
    version = str(content.get("format_version", ""))
    if not version.startswith("1"):
        raise InputError(f"{path}, field 'format_version': '{version}'; this reader takes PEtab 1")
    return raw, content


def _read_bytes(path: Path) -> bytes:
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    size = path.stat().st_size
    if size > MAX_FILE_BYTES:
        raise InputError(
            f"{path}: the file has {size} bytes, more than the limit of {MAX_FILE_BYTES} bytes "
            "for one file"
        )
    return path.read_bytes()


def _names(value: Any, field: str, origin: str) -> list[str]:
    """Give the file names a YAML field lists (a name or a list of names)."""
    if value is None:
        return []
    listed = [value] if isinstance(value, str) else value
    if not isinstance(listed, list) or not all(isinstance(n, str) and n.strip() for n in listed):
        raise InputError(f"{origin}, field '{field}': expected a list of file names")
    return list(listed)


def petab_file_names(content: dict[str, Any], origin: str = "the problem") -> dict[str, list[str]]:
    """Give {role: file names} of a loaded PEtab v1 YAML (roles as in :data:`FILE_ROLES`).

    Names keep the YAML's spelling and order; a name listed twice counts once.
    """
    parts = content.get("problems")
    if not isinstance(parts, list) or not all(isinstance(p, dict) for p in parts):
        raise InputError(f"{origin}, field 'problems': expected a list of problem entries")
    found: dict[str, list[str]] = {role: [] for role in FILE_ROLES}
    listed = [("parameter", content.get("parameter_file"), "parameter_file")]
    for part in parts:
        listed += [(role, part.get(field), field) for role, field in FILE_ROLES.items()]
    for role, value, field in listed:
        for name in _names(value, field, origin):
            if name not in found[role]:
                found[role].append(name)
    return found


def sbml_model_id(path: str | Path, raw: bytes) -> str:
    """Give the id of an SBML file's <model> element; refuse a file that is not SBML."""
    import xml.etree.ElementTree as ElementTree

    try:  # expat >= 2.4 (Python's own) bounds entity expansion; external entities are not read
        root = ElementTree.fromstring(raw)
    except ElementTree.ParseError as err:
        raise InputError(f"{path}: not a readable SBML file ({err}); expected SBML XML") from None
    if root.tag.rsplit("}", 1)[-1] != "sbml":
        raise InputError(
            f"{path}: not an SBML file (its root element is <{root.tag.rsplit('}', 1)[-1]}>, "
            "expected <sbml>)"
        )
    model = next((c for c in root if c.tag.rsplit("}", 1)[-1] == "model"), None)
    if model is None:
        raise InputError(f"{path}: the SBML file has no <model> element")
    return str(model.get("id", ""))


def _table_rows(table: Table, key: str) -> dict[str, dict[str, str]]:
    if key not in table.columns:
        raise InputError(f"{table.path}: required column '{key}' is missing")
    rows: dict[str, dict[str, str]] = {}
    for i in range(len(table)):
        row = {c: str(table.cells[c][i]) for c in table.columns}
        rows[row[key].strip()] = row
    return rows


def _inside(base: Path, name: str, origin: Path) -> Path:
    candidate = Path(name)
    if candidate.is_absolute() or ".." in candidate.parts:
        raise InputError(f"{origin}: file '{name}' is outside the problem's folder")
    return base / candidate


def read_petab_problem(
    problem: str | Path,
    *,
    lab: str | None,
    time_unit: str,
    unit: str,
    actor: str,
) -> list[Draft]:
    """Give one draft per measurement group of a PEtab problem."""
    return read_petab_import(problem, lab=lab, time_unit=time_unit, unit=unit, actor=actor).drafts


def read_petab_import(
    problem: str | Path,
    *,
    lab: str | None,
    time_unit: str,
    unit: str,
    actor: str,
) -> PetabImport:
    """Give a PEtab problem's files (byte for byte) and one draft per measurement group."""
    problem = Path(problem)
    yaml_bytes, content = _load_yaml(problem)
    base = problem.parent
    lab = lab or problem.stem
    condition_units = _condition_units(base)
    names = petab_file_names(content, str(problem))
    files = {problem.name: yaml_bytes}
    tables: dict[str, Table] = {}
    model_ids = []
    for role, listed in names.items():
        for name in listed:
            path = _inside(base, name, problem)
            if not path.is_file():
                raise InputError(
                    f"{problem}, field '{FILE_ROLES[role]}': file '{name}' does not exist "
                    "beside the problem; put it there or correct the name"
                )
            raw = files.get(name)
            if raw is None:
                raw = files[name] = _read_bytes(path)
            if role == "sbml":
                model_ids.append(sbml_model_id(path, raw))
            else:  # a table that estimates or plots nothing may be a header alone
                tables[name] = table_from_bytes(
                    path, raw, require_rows=role == "measurement", strict_text=True
                )
    observables: dict[str, dict[str, str]] = {}
    for name in names["observable"]:
        observables.update(_table_rows(tables[name], "observableId"))
    conditions: dict[str, dict[str, str]] = {}
    for name in names["condition"]:
        conditions.update(_table_rows(tables[name], "conditionId"))
    for name in names["parameter"]:
        if "parameterId" not in tables[name].columns:
            raise InputError(f"{tables[name].path}: required column 'parameterId' is missing")
    drafts: list[Draft] = []
    for name in names["measurement"]:
        drafts += _drafts_from_measurements(
            tables[name],
            observables,
            conditions,
            lab=lab,
            time_unit=time_unit,
            unit=unit,
            actor=actor,
            problem=problem.name,
            sha256=hashlib.sha256(files[name]).hexdigest(),
            condition_units=condition_units,
        )
    if not drafts:
        raise InputError(f"{problem}: the problem lists no measurements")
    ids = [d.requested_id for d in drafts]
    if len(set(ids)) != len(ids):  # a datasetId spanning groups: let the catalog number them
        drafts = [dataclasses.replace(d, requested_id=None) for d in drafts]
    return PetabImport(PetabFiles(problem.name, files, tuple(model_ids)), drafts)


def _drafts_from_measurements(
    table: Table,
    observables: dict[str, dict[str, str]],
    conditions: dict[str, dict[str, str]],
    *,
    lab: str,
    time_unit: str,
    unit: str,
    actor: str,
    problem: str,
    sha256: str,
    condition_units: dict[str, str],
) -> list[Draft]:
    for required in ("observableId", "simulationConditionId", "measurement", "time"):
        if required not in table.columns:
            raise InputError(f"{table.path}: required PEtab column '{required}' is missing")
    time = table.numbers("time", what="a time (steady state 'inf' is not supported)")
    measurement = table.numbers("measurement", what="a measured value")
    keys = [
        tuple(str(table.cells[c][i]).strip() if c in table.columns else "" for c in _GROUP_COLUMNS)
        for i in range(len(table))
    ]
    groups: dict[tuple[str, ...], list[int]] = {}
    for index, key in enumerate(keys):
        groups.setdefault(key, []).append(index)
    drafts = []
    for key, rows in groups.items():
        observable_id, condition_id, pre_id, dataset_id = key
        row_index = np.asarray(rows)
        observable_row = observables.get(observable_id)
        if observable_row is None:
            raise InputError(
                table.locate(rows[0], "observableId")
                + f"observable '{observable_id}' is not in the observable table"
            )
        condition_row = conditions.get(condition_id)
        if condition_row is None:
            raise InputError(
                table.locate(rows[0], "simulationConditionId")
                + f"condition '{condition_id}' is not in the condition table"
            )
        sd = None
        # curate's own export: curateSd is the sd before trust inflation (noiseParameters is
        # the inflated sigma, which a second export would inflate again)
        sd_column = "curateSd" if "curateSd" in table.columns else "noiseParameters"
        if sd_column in table.columns:
            text = [str(table.cells[sd_column][i]).strip() for i in rows]
            numbers = np.array([_number_or_nan(t) for t in text])
            negative = np.flatnonzero(numbers <= 0)
            if len(negative):
                k = int(negative[0])
                raise InputError(
                    table.locate(rows[k], sd_column)
                    + f"'{text[k]}' is a noise standard deviation of {numbers[k]:g}; expected > 0"
                )
            if np.isfinite(numbers).any():
                sd = numbers
        transformation = (observable_row.get("observableTransformation") or "lin").strip() or "lin"
        condition_values: dict[str, Any] = {}
        for column, cell in condition_row.items():
            if column in ("conditionId", "conditionName") or not cell.strip():
                continue
            if cell.strip().lower() == "nan":  # PEtab: keep the model's (preequilibrated) value
                continue
            number = _number_or_nan(cell)
            if not np.isfinite(number):
                condition_values[column] = {"text": cell.strip()}
            elif column in condition_units:
                condition_values[column] = {"value": float(number), "unit": condition_units[column]}
            else:
                condition_values[column] = float(number)
        replicate = labels = None
        if "replicateId" in table.columns:
            text_rep = np.array([str(table.cells["replicateId"][i]).strip() for i in rows])
            if (text_rep != "").all():
                label_values, codes = np.unique(text_rep, return_inverse=True)
                labels, replicate = tuple(str(v) for v in label_values), codes
        petab_rows = {c: [str(table.cells[c][i]) for i in rows] for c in table.columns}
        relative = "observableParameter" in observable_row.get("observableFormula", "")
        own = {c: _constant(table, rows, c) for c in _OWN_COLUMNS if c in table.columns}
        if "curateRelative" in own:
            if own["curateRelative"] not in ("true", "false"):
                raise InputError(
                    table.locate(rows[0], "curateRelative")
                    + f"'{own['curateRelative']}'; expected true or false"
                )
            relative = own["curateRelative"] == "true"
        if own.get("curateConditions"):
            try:
                carried = json.loads(own["curateConditions"])
            except json.JSONDecodeError:
                raise InputError(
                    table.locate(rows[0], "curateConditions") + "not JSON; expected an object"
                ) from None
            if not isinstance(carried, dict):
                raise InputError(table.locate(rows[0], "curateConditions") + "expected an object")
            for key, value in carried.items():
                condition_values[key] = value if isinstance(value, bool) else {"text": str(value)}
        metadata: dict[str, Any] = {
            "observable": {
                "id": observable_id,
                "label": observable_row.get("observableName", "").strip(),
                "unit": own.get("curateUnit") or unit,
                "relative": relative,
            },
            "time": {"unit": time_unit},
            "source": {"lab": lab, "reference": problem},
            "conditions": condition_values,
        }
        if own.get("curateGrade"):
            version = own.get("curateVersion", "?")
            metadata["trust"] = {
                "grade": own["curateGrade"],
                "rationale": f"carried over from a curate PEtab export ({problem}): the grade "
                f"of dataset {dataset_id or '?'} version {version}",
            }
        if sd is not None:
            metadata["uncertainty"] = {
                "type": "sd",
                "scale": _SCALE_OF_TRANSFORMATION.get(transformation, "linear"),
            }
        requested = (
            dataset_id
            if dataset_id and dataset_id.isidentifier() and dataset_id.isascii()
            else None
        )
        draft = draft_from_arrays(
            time[row_index],
            measurement[row_index],
            sd=sd,
            replicate=replicate,
            replicate_labels=labels or (),
            metadata=metadata,
            actor=actor,
            origin=f"{table.path} ({observable_id} / {condition_id})",
            annotations={
                "petab": {
                    "problem": problem,
                    "observable": observable_row,
                    "condition": condition_row,
                    "simulationConditionId": condition_id,
                    "preequilibrationConditionId": pre_id,
                    "datasetId": dataset_id,
                    "measurement_file": table.path.name,
                    "measurement_file_sha256": sha256,
                },
                "petab_rows": petab_rows,
                # each point's data row in its measurement file (0 = the first row under the
                # header): intake sorts points by time, an export gives back the file's order
                "petab_row_index": {"row": [int(i) for i in rows]},
            },
        )
        drafts.append(dataclasses.replace(draft, requested_id=requested))
    return drafts


# curate's annotation columns that hold one value per dataset
_OWN_COLUMNS = ("curateUnit", "curateRelative", "curateGrade", "curateVersion", "curateConditions")


def _constant(table: Table, rows: list[int], column: str) -> str:
    """Give the one value an annotation column holds for a dataset's rows."""
    values = [str(table.cells[column][i]).strip() for i in rows]
    for position, value in enumerate(values):
        if value != values[0]:
            raise InputError(
                table.locate(rows[position], column)
                + f"'{value}' differs from '{values[0]}' in the same dataset; expected one value"
            )
    return values[0]


def _number_or_nan(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        return float("nan")
    return value if np.isfinite(value) else float("nan")
