"""A Frictionless Data Package (v2): points.csv and datasets.csv with explicit Table Schemas."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from curate.export.files import write_json
from curate.export.table import table_bytes, unit_symbols

__all__ = ["datapackage_descriptor", "write_datapackage"]

_PANDAS_TO_TABLE_SCHEMA = {"f": "number", "i": "integer", "u": "integer", "b": "boolean"}

_DESCRIPTIONS = {
    "dataset_id": "dataset id in the curate catalog",
    "version": "dataset version the point comes from",
    "observable": "observable id",
    "unit": "symbol of the canonical unit of value, sd and sigma (weight is in its inverse square)",
    "unit_ucum": "UCUM code of the unit",
    "relative": "relative units: a fit needs a scale factor",
    "lab": "source lab",
    "time": "time since the start of the time course, in seconds",
    "value": "measured value",
    "sd": "measured or estimated noise SD (after the noise floors)",
    "sigma": "effective SD after trust inflation and balancing",
    "weight": "1 / sigma^2",
    "inflation": "variance inflation of the trust grade",
    "balance": "balancing factor of the dataset",
    "grade_used": "trust grade the policy applied (ungraded datasets get the policy's default)",
    "sd_source": "where sd came from",
    "replicate": "replicate label",
    "calibration_group": "points sharing one scale factor and noise level",
    "censored": "'below' or 'above': the true value lies beyond a limit, and value holds that "
    "limit (not a measurement); empty: an observed point",
}


def _fields(frame: pd.DataFrame, units: dict[str, str | None]) -> list[dict[str, Any]]:
    fields = []
    for column in frame.columns:
        kind = _PANDAS_TO_TABLE_SCHEMA.get(frame[column].dtype.kind, "string")
        field: dict[str, Any] = {"name": str(column), "type": kind}
        if kind == "number":
            field["floatNumber"] = True
        if column in _DESCRIPTIONS:
            field["description"] = _DESCRIPTIONS[column]
        constraints: dict[str, Any] = {}
        if column in ("dataset_id", "time", "value", "sigma", "weight"):
            constraints["required"] = True
        if column in ("sd", "sigma", "weight"):
            constraints["minimum"] = 0
        if column == "censored":
            constraints["enum"] = ["", "below", "above"]
        if constraints:
            field["constraints"] = constraints
        if column == "time":
            field["unitCode"] = "s"
        elif units.get(column):
            field["unitCode"] = units[column]
        fields.append(field)
    return fields


def datapackage_descriptor(
    points: pd.DataFrame,
    datasets: pd.DataFrame,
    *,
    name: str,
    condition_units: dict[str, str | None],
) -> dict[str, Any]:
    """Give the datapackage.json content for the two tables."""
    return {
        "$schema": "https://datapackage.org/profiles/2.0/datapackage.json",
        "name": name,
        "title": "Weighted time courses exported by curate",
        "resources": [
            {
                "name": "datasets",
                "path": "datasets.csv",
                "format": "csv",
                "mediatype": "text/csv",
                "schema": {
                    "fields": _fields(datasets, {}),
                    "primaryKey": ["dataset_id"],
                    "missingValues": [""],
                },
            },
            {
                "name": "points",
                "path": "points.csv",
                "format": "csv",
                "mediatype": "text/csv",
                "schema": {
                    "fields": _fields(points, condition_units),
                    "missingValues": [""],
                    "foreignKeys": [
                        {
                            "fields": ["dataset_id"],
                            "reference": {"resource": "datasets", "fields": ["dataset_id"]},
                        }
                    ],
                },
            },
        ],
    }


def write_datapackage(points: pd.DataFrame, datasets: pd.DataFrame, outdir: Path, *, name: str,
                      condition_units: dict[str, str | None]) -> dict[str, str]:  # fmt: skip
    """Write points.csv, datasets.csv and datapackage.json; give file name -> sha256."""
    from curate.export.files import write_bytes

    points, datasets = unit_symbols(points), unit_symbols(datasets)
    written = {
        "points.csv": write_bytes(outdir / "points.csv", table_bytes(points, "csv")),
        "datasets.csv": write_bytes(outdir / "datasets.csv", table_bytes(datasets, "csv")),
    }
    descriptor = datapackage_descriptor(
        points, datasets, name=name, condition_units=condition_units
    )
    written["datapackage.json"] = write_json(outdir / "datapackage.json", descriptor)
    return written
