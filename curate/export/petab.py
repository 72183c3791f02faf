"""PEtab (v1) tables of a weighted selection: measurements, conditions, observables, parameters.

Each point's effective sigma goes into ``noiseParameters`` with ``noiseFormula =
noiseParameter1_<observableId>``. Relative-unit data get one scale parameter per calibration
group (``observableParameter1_<observableId> * ...`` in the formula, the parameter id per row
in ``observableParameters``; data = s x model). An observable mixing absolute and relative
data keeps that one formula, and its absolute rows give the placeholder the number 1. Every
dataset has its own condition id, so scale parameters never become time-point-specific
overrides. Grades, weights, versions, units and the relative flag
ride along as annotation columns, which PEtab ignores and ``curate import-petab`` reads back:
``curateVersion``, ``trustGrade`` (the grade the policy applied), ``curateGrade`` (the
dataset's own grade, empty if ungraded), ``curateSd`` (sd before trust inflation),
``curateWeight``, ``curateUnit`` (the symbol of the measurement's unit) and ``curateRelative``.
Time is in seconds (curate's canonical unit); ``units.json`` beside the tables names the unit of
every condition column.

No model is written: ``observableFormula`` names a placeholder ``<observableId>_model`` for
absolute data, which the modeller replaces with their model's expression; data imported from
PEtab keep their original formula, transformation and observable parameters. A selection whose
datasets all come from one stored problem is written by :mod:`curate.export.petab_problem`
instead: that problem whole, with its model.
"""

from __future__ import annotations

import io
import json
import re
from pathlib import Path
from typing import Any

import pandas as pd

from curate.errors import InputError
from curate.export.files import write_text

__all__ = ["CENSORED_FILE", "petab_tables", "write_petab"]

# the censored points of a PEtab export, beside (not in) the measurement table
CENSORED_FILE = "censored_measurements.tsv"


def _censored_rows(points: pd.DataFrame) -> Any:
    """Give True for every censored row of a weighted table (a numpy bool array)."""
    if "censored" not in points.columns:
        return pd.Series(False, index=points.index).to_numpy()
    return (points["censored"].astype(str) != "").to_numpy()


def _parameter_id(text: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9_]+", "_", text).strip("_") or "group"
    return f"scale_{slug}" if slug[0].isalpha() or slug[0] == "_" else f"scale_g{slug}"


def _tsv(frame: pd.DataFrame) -> str:
    buffer = io.StringIO()
    frame.to_csv(buffer, sep="\t", index=False, lineterminator="\n", float_format=None)
    return buffer.getvalue()


def _number_text(value: float) -> str:
    return repr(float(value))


def petab_tables(
    points: pd.DataFrame, datasets: dict[str, dict[str, Any]]
) -> dict[str, pd.DataFrame]:
    """Give the PEtab tables for a weighted table (see curate.exporting.weighted_table).

    ``datasets`` maps dataset id to its facts: conditions (key -> value), conditions_text,
    observable label, relative flag, calibration group, and the PEtab annotations it was
    imported with (or None).
    """
    rows = []
    scale_parameters: dict[str, str] = {}
    observables: dict[str, dict[str, str]] = {}
    # an observable with any relative-unit dataset gets the scale placeholder in its formula;
    # its absolute datasets then fill it with the number 1 (PEtab v1 wants every placeholder
    # filled on every row of the observable)
    scaled = {
        str(observable)
        for observable, ids in points.groupby("observable", sort=False, observed=True)["dataset_id"]
        if any(datasets[str(i)]["relative"] for i in ids.unique())
    }
    for dataset_id, group in points.groupby("dataset_id", sort=False, observed=True):
        facts = datasets[str(dataset_id)]
        observable = str(group["observable"].iloc[0])
        original = facts.get("petab") or {}
        original_rows = facts.get("petab_rows")
        own_formula = ((original.get("observable") or {}).get("observableFormula") or "").strip()
        if observable not in observables:
            observable_row = original.get("observable") or {}
            formula = observable_row.get("observableFormula", "").strip()
            if not formula:
                formula = f"{observable}_model"
                if observable in scaled:
                    formula = f"observableParameter1_{observable} * {formula}"
            observables[observable] = {
                "observableId": observable,
                "observableName": facts["label"]
                or observable_row.get("observableName", "").strip(),
                "observableFormula": formula,
                "noiseFormula": f"noiseParameter1_{observable}",
                "observableTransformation": "lin",
                "noiseDistribution": "normal",
            }
        if facts["relative"]:
            if original_rows is not None and "observableParameters" in original_rows:
                observable_parameters = [
                    str(x).strip() for x in original_rows["observableParameters"]
                ]
                for text in set(observable_parameters):
                    for part in text.split(";"):
                        if part and not _is_number(part):
                            scale_parameters[part] = part
            else:
                parameter = _parameter_id(facts["calibration_group"] or str(dataset_id))
                scale_parameters[parameter] = parameter
                observable_parameters = [parameter] * len(group)
        elif observable in scaled and not own_formula:
            observable_parameters = ["1"] * len(group)  # absolute data: the scale is 1
        else:
            observable_parameters = [""] * len(group)
        condition_id = f"c_{dataset_id}"
        for k, (_, row) in enumerate(group.iterrows()):
            rows.append({
                "observableId": observable,
                "preequilibrationConditionId": "",
                "simulationConditionId": condition_id,
                "measurement": _number_text(row["value"]),
                "time": _number_text(row["time"]),
                "observableParameters": observable_parameters[k],
                "noiseParameters": _number_text(row["sigma"]),
                "datasetId": str(dataset_id),
                "replicateId": "" if pd.isna(row.get("replicate")) else str(row["replicate"]),
                "curateVersion": str(int(row["version"])),
                "trustGrade": str(row["grade_used"]),
                "curateSd": _number_text(row["sd"]),
                "curateWeight": _number_text(row["weight"]),
                "curateGrade": "" if pd.isna(row.get("grade")) else str(row["grade"]),
                "curateUnit": facts["unit"],
                "curateRelative": "true" if facts["relative"] else "false",
                # text and true/false conditions: a PEtab condition table holds numbers only
                "curateConditions": json.dumps(
                    {k: v for k, v in facts["conditions"].items() if isinstance(v, bool | str)},
                    sort_keys=True, ensure_ascii=False,
                ),
            })  # fmt: skip
    measurements = pd.DataFrame(rows)
    numeric_keys = sorted({k for facts in datasets.values() for k, v in facts["conditions"].items()
                           if isinstance(v, float)})  # fmt: skip
    condition_rows = []
    for dataset_id in points["dataset_id"].unique():
        facts = datasets[str(dataset_id)]
        entry: dict[str, Any] = {
            "conditionId": f"c_{dataset_id}",
            "conditionName": facts["conditions_text"] or str(dataset_id),
        }
        for key in numeric_keys:
            value = facts["conditions"].get(key)
            entry[key] = _number_text(value) if isinstance(value, float) else ""
        condition_rows.append(entry)
    conditions = pd.DataFrame(condition_rows)
    observable_table = pd.DataFrame(list(observables.values()))
    parameters = pd.DataFrame(
        [
            {
                "parameterId": parameter,
                "parameterName": f"scale factor {parameter}",
                "parameterScale": "log10",
                "lowerBound": "1e-08",
                "upperBound": "100000000.0",
                "nominalValue": "1.0",
                "estimate": "1",
            }
            for parameter in sorted(scale_parameters)
        ],
        columns=[
            "parameterId",
            "parameterName",
            "parameterScale",
            "lowerBound",
            "upperBound",
            "nominalValue",
            "estimate",
        ],
    )
    return {
        "measurements": measurements,
        "conditions": conditions,
        "observables": observable_table,
        "parameters": parameters,
    }


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def write_petab(
    points: pd.DataFrame, datasets: dict[str, dict[str, Any]], outdir: Path
) -> dict[str, str]:
    """Write the PEtab tables and problem.yaml into ``outdir``; give file name -> sha256."""
    import yaml

    censored = _censored_rows(points)
    tables = petab_tables(points, datasets)
    if censored.any():
        # PEtab 1 has no censored measurements: the observed rows are the measurement table,
        # the censored ones an annotation beside it that PEtab tools do not read
        if censored.all():
            raise InputError(
                "petab export: every selected point is censored (a limit, not a measurement) "
                "and PEtab 1 has no censored measurements; export the table format instead"
            )
        tables["measurements"] = petab_tables(points.loc[~censored], datasets)["measurements"]
        beside = petab_tables(points.loc[censored], datasets)["measurements"]
        beside.insert(len(beside.columns), "curateCensored",
                      points.loc[censored, "censored"].astype(str).to_numpy())  # fmt: skip
        beside = beside.rename(columns={"measurement": "curateLimit"})
    names = {
        "measurements": "measurements.tsv",
        "conditions": "conditions.tsv",
        "observables": "observables.tsv",
        "parameters": "parameters.tsv",
    }
    written = {name: write_text(outdir / name, _tsv(tables[key])) for key, name in names.items()}
    if censored.any():
        written[CENSORED_FILE] = write_text(outdir / CENSORED_FILE, _tsv(beside))
    problem = {
        "format_version": 1,
        "parameter_file": names["parameters"],
        "problems": [
            {
                "sbml_files": [],
                "condition_files": [names["conditions"]],
                "measurement_files": [names["measurements"]],
                "observable_files": [names["observables"]],
            }
        ],
    }
    written["problem.yaml"] = write_text(
        outdir / "problem.yaml", yaml.safe_dump(problem, sort_keys=False)
    )
    return written
