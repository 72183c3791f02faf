"""Import of a PEtab (v1) problem's measurements as datasets.

Rows are grouped by (observableId, simulationConditionId, preequilibrationConditionId,
datasetId); replicates stay together. Every cell of every measurement row is kept verbatim
(``annotations['petab_rows']``), together with the observable's and the condition's table
rows, so that an export can give back each measurement, time and noise value exactly.
Files are read as text first; real problems have CRLF line ends, missing final newlines and
columns we do not interpret.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import numpy as np

from curate.errors import InputError
from curate.ingest.files import Draft, draft_from_arrays
from curate.ingest.tables import Table, read_table

__all__ = ["read_petab_problem"]

_GROUP_COLUMNS = (
    "observableId",
    "simulationConditionId",
    "preequilibrationConditionId",
    "datasetId",
)
_SCALE_OF_TRANSFORMATION = {"lin": "linear", "log": "ln", "log10": "log10"}


def _load_yaml(path: Path) -> dict[str, Any]:
    import yaml

    if not path.is_file():
        raise InputError(f"{path}: no such PEtab problem file")
    try:
        content = yaml.safe_load(path.read_text(encoding="utf-8"))
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
    return content


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
    problem = Path(problem)
    content = _load_yaml(problem)
    base = problem.parent
    lab = lab or problem.stem
    drafts: list[Draft] = []
    for part in content["problems"]:
        observables: dict[str, dict[str, str]] = {}
        for name in part.get("observable_files", []):
            observables.update(
                _table_rows(read_table(_inside(base, name, problem)), "observableId")
            )
        conditions: dict[str, dict[str, str]] = {}
        for name in part.get("condition_files", []):
            conditions.update(_table_rows(read_table(_inside(base, name, problem)), "conditionId"))
        for name in part.get("measurement_files", []):
            path = _inside(base, name, problem)
            table = read_table(path)
            drafts += _drafts_from_measurements(
                table,
                observables,
                conditions,
                lab=lab,
                time_unit=time_unit,
                unit=unit,
                actor=actor,
                problem=problem.name,
                sha256=hashlib.sha256(path.read_bytes()).hexdigest(),
            )
    if not drafts:
        raise InputError(f"{problem}: the problem lists no measurements")
    ids = [d.requested_id for d in drafts]
    if len(set(ids)) != len(ids):  # a datasetId spanning groups: let the catalog number them
        drafts = [
            Draft(record=d.record, arrays=d.arrays, requested_id=None, origin=d.origin)
            for d in drafts
        ]
    return drafts


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
        if "noiseParameters" in table.columns:
            text = [str(table.cells["noiseParameters"][i]).strip() for i in rows]
            numbers = np.array([_number_or_nan(t) for t in text])
            if np.isfinite(numbers).any():
                sd = numbers
        transformation = (observable_row.get("observableTransformation") or "lin").strip() or "lin"
        condition_values: dict[str, Any] = {}
        for column, cell in condition_row.items():
            if column in ("conditionId", "conditionName") or not cell.strip():
                continue
            number = _number_or_nan(cell)
            condition_values[column] = (
                float(number) if np.isfinite(number) else {"text": cell.strip()}
            )
        replicate = labels = None
        if "replicateId" in table.columns:
            text_rep = np.array([str(table.cells["replicateId"][i]).strip() for i in rows])
            if (text_rep != "").all():
                label_values, codes = np.unique(text_rep, return_inverse=True)
                labels, replicate = tuple(str(v) for v in label_values), codes
        petab_rows = {c: [str(table.cells[c][i]) for i in rows] for c in table.columns}
        metadata: dict[str, Any] = {
            "observable": {
                "id": observable_id,
                "label": observable_row.get("observableName", "").strip(),
                "unit": unit,
                "relative": "observableParameter" in observable_row.get("observableFormula", ""),
            },
            "time": {"unit": time_unit},
            "source": {"lab": lab, "reference": problem},
            "conditions": condition_values,
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
            },
        )
        drafts.append(
            Draft(
                record=draft.record,
                arrays=draft.arrays,
                requested_id=requested,
                origin=draft.origin,
            )
        )
    return drafts


def _number_or_nan(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        return float("nan")
    return value if np.isfinite(value) else float("nan")
