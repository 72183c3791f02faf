"""The weighted long table: one row per point of a selection, with sd, sigma and weight.

Columns (their meanings are written down in every export's README): dataset_id, version,
observable, unit, unit_ucum, relative, lab, grade, grade_used, time (s), value (canonical
unit), sd (measured or estimated noise), sd_source, inflation, balance, sigma (after trust
inflation), weight = 1/sigma^2, replicate, calibration_group, censored (only when the
selection holds a censored point: 'below' or 'above' its limit, which is then the row's value;
empty for an observed point), then one column per condition.

A censored point keeps its row: the fit gives it the censored-normal term (or leaves it out,
as the policy's ``censored`` says), the exports write it with its limit. Its sigma is the
dataset's noise at the limit: a reported sd in its row, else the noise estimate, else what the
policy does with unknown noise, worked out from the observed points only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.ledger import Ledger
from curate.quality import noise
from curate.quality.measured import measured_sd, reported_sd
from curate.records import CENSORED_WORDS, DatasetVersion, SeriesArrays, masked_points
from curate.units import short_unit
from curate.weighting.policy import Policy
from curate.weighting.selection import Selection, select
from curate.weighting.weights import WeightSummary, apply_policy

__all__ = [
    "MASKED_COLUMNS",
    "STANDARD_COLUMNS",
    "SetAside",
    "WeightedTable",
    "condition_column",
    "points_table",
    "set_aside",
    "unit_symbols",
    "weighted_table",
]

STANDARD_COLUMNS = (
    "dataset_id", "version", "observable", "unit", "unit_ucum", "relative", "lab", "grade",
    "grade_used", "time", "value", "sd", "sd_source", "inflation", "balance", "sigma", "weight",
    "replicate", "calibration_group", "censored",
)  # fmt: skip


def condition_column(key: str) -> str:
    """Give the weighted table's column of a condition key (prefixed where it meets a standard one)."""
    return f"condition_{key}" if key in STANDARD_COLUMNS else key


def _sd_of(version: DatasetVersion, arrays: SeriesArrays, policy: Policy) -> tuple[np.ndarray, str]:
    """Give each point's measured SD and where it came from, the policy deciding when unknown."""
    record = version.record
    try:
        sd = measured_sd(version, arrays)
        if record.uncertainty is not None and arrays.sd is not None:
            return sd, "reported"
        return sd, f"noise estimate ({record.noise.method if record.noise else '?'})"
    except InputError:
        censored = arrays.censored_mask()
        if not censored.any() or censored.all():
            return _unknown_sd(version, arrays, policy)
        # the observed points keep their own sd; a censored point without one takes the
        # noise the policy finds for unknown noise (from the observed points)
        observed_sd, source = _sd_of(version, arrays.observed(), policy)
        full = np.empty(len(arrays))
        full[~censored] = observed_sd
        fallback, fallback_source = _unknown_sd(version, arrays, policy)
        own = arrays.sd[censored] if arrays.sd is not None else np.full(int(censored.sum()), np.nan)
        full[censored] = np.where(np.isfinite(own), own, fallback[censored])
        if fallback_source != source and not np.isfinite(own).all():
            source = f"{source}; censored points: {fallback_source}"
        return full, source


def _unknown_sd(
    version: DatasetVersion, arrays: SeriesArrays, policy: Policy
) -> tuple[np.ndarray, str]:
    """Give each point's SD as the policy decides for unknown noise (estimated from the
    observed points: a censored point's value is a limit, not a measurement)."""
    if policy.unknown_noise == "refuse":
        raise InputError(
            f"dataset {version.id}: no uncertainty is known and the policy refuses to guess; run `curate noise {version.id}`"
        ) from None
    if policy.unknown_noise == "default":
        return policy.default_relative_sd * np.abs(
            arrays.value
        ), f"policy default ({policy.default_relative_sd:g} of |y|)"
    observed = arrays.observed()
    left_out = len(arrays) - len(observed)
    reported = reported_sd(version, observed)  # the observed points' own sds, where given
    result = noise.choose_and_estimate(
        observed.time, observed.value, replicate=observed.replicate, reported_sd=reported,
        origin=f"dataset {version.id}" + (f" ({left_out} censored points left out)" if left_out else ""),
    )  # fmt: skip
    return np.full(len(arrays), result.sd), f"estimated at export ({result.method})"


MASKED_COLUMNS = ("dataset_id", "version", "observable", "lab", "time", "value", "sd", "replicate",
                  "masked", "mask_reason", "masked_by", "masked_at")  # fmt: skip


@dataclass(frozen=True)
class SetAside:
    """The points masks set aside in a selection, and where the kept points sit in each
    dataset's arrays (for per-point annotations kept in array order, such as PEtab rows)."""

    points: pd.DataFrame  # MASKED_COLUMNS, times in s
    kept: dict[str, np.ndarray]  # dataset id -> positions of the kept points (masked ones only)

    def annotation(self, dataset_id: str, cells: Any) -> Any:
        """Give a per-point annotation ({column: [cell per point]}) without the masked points."""
        positions = self.kept.get(dataset_id)
        if positions is None or not isinstance(cells, dict):
            return cells
        return {k: [v[i] for i in positions] for k, v in cells.items()}


def _set_aside(version: DatasetVersion, arrays: SeriesArrays, masked: np.ndarray) -> pd.DataFrame:
    record = version.record
    labels = np.array(record.replicate_labels, dtype=object)
    replicate = (labels[arrays.replicate] if arrays.replicate is not None and len(labels)
                 else np.full(len(arrays), None, dtype=object))  # fmt: skip
    rows = []
    for index in np.flatnonzero(masked):
        mask = next(m for m in record.masks if np.isclose(m.time, arrays.time[index], rtol=1e-12, atol=1e-9)
                    and m.replicate in (None, replicate[index]))  # fmt: skip
        rows.append({
            "dataset_id": version.id, "version": version.version, "observable": record.observable.id,
            "lab": record.source.lab, "time": float(arrays.time[index]), "value": float(arrays.value[index]),
            "sd": float(arrays.sd[index]) if arrays.sd is not None else np.nan, "replicate": replicate[index],
            "masked": True, "mask_reason": mask.reason, "masked_by": mask.masked_by,
            "masked_at": mask.masked_at.isoformat(),
        })  # fmt: skip
    return pd.DataFrame(rows, columns=list(MASKED_COLUMNS))


def set_aside(catalog: Ledger, versions: list[DatasetVersion]) -> SetAside:
    """Give the masked points of the versions and the positions of the points kept."""
    masked_versions = [v for v in versions if v.record.masks]
    frames, kept = [], {}
    stored = catalog.series_many([v.record.content_hash for v in masked_versions])
    for version in masked_versions:
        arrays = stored[version.record.content_hash]
        masked = masked_points(version.record, arrays)
        kept[version.id] = np.flatnonzero(~masked)
        frames.append(_set_aside(version, arrays, masked))
    points = (pd.concat(frames, ignore_index=True) if frames
              else pd.DataFrame(columns=list(MASKED_COLUMNS)))  # fmt: skip
    return SetAside(points, kept)


def points_table(catalog: Ledger, versions: list[DatasetVersion], policy: Policy) -> pd.DataFrame:
    """Give one row per point of the versions (before weighting), built column-wise in one go.

    Points a mask sets aside are left out (see :func:`set_aside` for them).
    """
    per_point: dict[str, list[np.ndarray]] = {"time": [], "value": [], "sd": [], "replicate": [],
                                              "censored": []}  # fmt: skip
    per_dataset: dict[str, list[Any]] = {name: [] for name in (
        "dataset_id", "version", "observable", "unit", "unit_ucum", "relative", "lab", "grade", "sd_source", "calibration_group")}  # fmt: skip
    conditions: dict[str, list[Any]] = {}
    lengths = []
    stored = catalog.series_many([v.record.content_hash for v in versions])
    for position, version in enumerate(versions):
        record = version.record
        arrays = stored[record.content_hash]
        if record.masks:
            arrays = arrays.subset(~masked_points(record, arrays))
        sd, source = _sd_of(version, arrays, policy)
        labels = np.array(record.replicate_labels, dtype=object)
        per_point["time"].append(arrays.time)
        per_point["value"].append(arrays.value)
        per_point["sd"].append(np.asarray(sd, dtype=float))
        per_point["censored"].append(arrays.censored_mask() if arrays.censored is None else
                                     np.asarray(arrays.censored, dtype=np.int8))  # fmt: skip
        per_point["replicate"].append(labels[arrays.replicate] if (arrays.replicate is not None and len(labels))
                                      else np.full(len(arrays), None, dtype=object))  # fmt: skip
        for name, value in (("dataset_id", version.id), ("version", version.version), ("observable", record.observable.id),
                            ("unit", record.observable.unit), ("unit_ucum", record.observable.ucum or ""),
                            ("relative", record.observable.relative), ("lab", record.source.lab), ("grade", version.grade),
                            ("sd_source", source), ("calibration_group", record.protocol.calibration_group or version.id)):  # fmt: skip
            per_dataset[name].append(value)
        for key, condition in record.conditions.items():
            conditions.setdefault(condition_column(key), [None] * position).append(condition.value)
        for values in conditions.values():
            if len(values) == position:
                values.append(None)
        lengths.append(len(arrays))
    counts = np.asarray(lengths)
    columns: dict[str, Any] = {}
    for name in (
        "dataset_id",
        "version",
        "observable",
        "unit",
        "unit_ucum",
        "relative",
        "lab",
        "grade",
    ):
        columns[name] = np.repeat(
            np.asarray(per_dataset[name], dtype=object if name != "version" else np.int64), counts
        )
    columns["relative"] = columns["relative"].astype(bool)
    for name in ("time", "value", "sd"):
        columns[name] = np.concatenate(per_point[name])
    columns["sd_source"] = np.repeat(np.asarray(per_dataset["sd_source"], dtype=object), counts)
    columns["replicate"] = np.concatenate(per_point["replicate"])
    columns["calibration_group"] = np.repeat(
        np.asarray(per_dataset["calibration_group"], dtype=object), counts
    )
    codes = np.concatenate(per_point["censored"]).astype(np.int8) if versions else np.array([])
    if codes.any():  # only then: a selection without censoring keeps the columns it always had
        words = [CENSORED_WORDS[k] for k in sorted(CENSORED_WORDS)]
        columns["censored"] = pd.Categorical.from_codes(codes, categories=words)
    for column, values in conditions.items():
        kinds = {type(v) for v in values if v is not None}
        if kinds == {float}:
            data = np.array([np.nan if v is None else v for v in values], dtype=float)
        elif len(kinds) > 1:  # a key numeric in one dataset, text in another: keep it as text
            data = np.array([None if v is None else str(v) for v in values], dtype=object)
        else:
            data = np.array(values, dtype=object)
        columns[column] = np.repeat(data, counts)
    for name in (
        "dataset_id",
        "observable",
        "unit",
        "unit_ucum",
        "lab",
        "sd_source",
        "calibration_group",
    ):
        # repeated labels as categories: a fraction of the memory, dictionary-encoded in Parquet;
        # built from codes, never from one string per point (gigabytes at millions of points)
        labels, codes = np.unique(
            np.asarray([str(v) for v in per_dataset[name]], dtype=str), return_inverse=True
        )
        columns[name] = pd.Categorical.from_codes(np.repeat(codes, counts), categories=labels)
    return pd.DataFrame(columns)


def unit_symbols(frame: pd.DataFrame) -> pd.DataFrame:
    """Give the frame with its ``unit`` column as symbols ('nanomolar' -> 'nM')."""
    if "unit" not in frame.columns:
        return frame
    column = frame["unit"]
    if isinstance(column.dtype, pd.CategoricalDtype):
        renamed = [short_unit(str(c)) for c in column.cat.categories]
        if len(set(renamed)) == len(renamed):
            return frame.assign(unit=column.cat.rename_categories(renamed))
    symbols = column.map(lambda u: None if u is None else short_unit(str(u)))
    return frame.assign(unit=symbols)


@dataclass(frozen=True)
class WeightedTable:
    """The weighted long table of a selection, its weight summary and the versions it holds."""

    table: pd.DataFrame
    summary: WeightSummary
    versions: list[DatasetVersion]
    policy: Policy
    selection: Selection
    aside: SetAside = SetAside(pd.DataFrame(columns=list(MASKED_COLUMNS)), {})


def weighted_table(catalog: Ledger, policy: Policy, selection: Selection) -> WeightedTable:
    """Give the weighted long table (one row per point), the weight summary and the versions used."""
    versions = select(catalog, selection, policy)
    points = points_table(catalog, versions, policy)
    condition_columns = [c for c in points.columns if c not in STANDARD_COLUMNS]
    weighted, summary = apply_policy(points, policy, conditions=condition_columns)
    ordered = [c for c in STANDARD_COLUMNS if c in weighted.columns] + sorted(condition_columns)
    aside = set_aside(catalog, versions)
    return WeightedTable(weighted[ordered], summary, versions, policy, selection, aside)
