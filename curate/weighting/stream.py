"""The weighted long table as a stream of Arrow record batches, never held whole.

Two passes over the stored arrays. The first works out, dataset by dataset, what the weights
depend on across the selection (each dataset's sum of base weights, its footing, the balancing
factors, the weight summary) and keeps no more than one float per point (the weights Kish's
n_eff reads) until the summary is made; the second reads the arrays again, a few datasets at a
time, and gives them as record batches with the columns, types and values of
:func:`curate.weighting.table.weighted_table` (which :mod:`curate.export.table` writes
straight into pyarrow's CSV and Parquet writers).

The footing of relative-unit data (see :mod:`curate.weighting.weights`) compares a dataset
with the absolute datasets of its observable point by point, so the arrays of the observables
that hold relative data are kept for the first pass; a selection of absolute data keeps none.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.ledger import Ledger
from curate.records import CENSORED_WORDS, DatasetVersion, SeriesArrays, masked_points
from curate.weighting.policy import Policy
from curate.weighting.selection import Selection, select
from curate.weighting.table import (
    STANDARD_COLUMNS,
    SetAside,
    _sd_of,
    condition_column,
    set_aside,
    unit_symbols,
)
from curate.weighting.weights import (
    DatasetParts,
    Footing,
    WeightSummary,
    balance_factors,
    footing_of,
    summarise_parts,
    zero_sd_message,
)

if TYPE_CHECKING:
    import pyarrow as pa

__all__ = ["ROWS_PER_BATCH", "WeightedStream", "weighted_stream"]

ROWS_PER_BATCH = 131_072  # about 13 MB a batch: one Parquet row group each

_LABELS = ("dataset_id", "observable", "unit", "unit_ucum", "lab", "sd_source", "calibration_group")
_CENSORED_CATEGORIES = [CENSORED_WORDS[k] for k in sorted(CENSORED_WORDS)]


@dataclass
class _Dataset:
    """What the first pass learns of one dataset version (in selection order)."""

    version: DatasetVersion
    points: int
    sd_source: str
    grade_used: str
    inflation: float
    floor: float  # the absolute noise floor that applies (0 for relative units)
    replicates: bool  # whether its points carry replicate labels
    labels: dict[str, str] = field(default_factory=dict)  # label column -> its value


def _arrays(catalog_arrays: SeriesArrays, version: DatasetVersion) -> SeriesArrays:
    """Give the arrays a computation reads: masked points set aside."""
    record = version.record
    if record.masks:
        return catalog_arrays.subset(~masked_points(record, catalog_arrays))
    return catalog_arrays


def _codes(arrays: SeriesArrays) -> np.ndarray:
    return (arrays.censored_mask() if arrays.censored is None
            else np.asarray(arrays.censored, dtype=np.int8)).astype(np.int8)  # fmt: skip


def _floored(sd: np.ndarray, value: np.ndarray, floor: float, policy: Policy) -> np.ndarray:
    """Give the sd after the policy's noise floors (as :func:`apply_policy` floors it)."""
    floored: np.ndarray = np.maximum(np.maximum(sd, floor), policy.relative_floor * np.abs(value))
    return floored


def _sequential_sum(values: np.ndarray) -> float:
    """Give the sum in row order, as ``np.bincount(..., weights=)`` adds the whole table's rows
    (np.sum adds pairwise, which differs in the last digits)."""
    return float(np.bincount(np.zeros(len(values), dtype=np.intp), weights=values, minlength=1)[0])


class WeightedStream:
    """The weighted long table of a selection as record batches, beside its weight summary,
    the versions it holds and the points masks set aside.

    ``batches()`` reads the catalog again on every call; ``table`` gives the whole DataFrame
    (built from the batches, the same frame :func:`weighted_table` gives).
    """

    def __init__(self, catalog: Ledger, policy: Policy, selection: Selection,
                 rows_per_batch: int = ROWS_PER_BATCH) -> None:  # fmt: skip
        self.catalog, self.policy, self.selection = catalog, policy, selection
        self.rows_per_batch = rows_per_batch
        self.versions: list[DatasetVersion] = select(catalog, selection, policy)
        self._datasets: list[_Dataset] = []
        self.censored_counts: dict[str, int] = {"below": 0, "above": 0}
        self.summary: WeightSummary = self._first_pass()
        self.aside: SetAside = set_aside(catalog, self.versions)

    # -- the first pass: what every weight depends on -------------------------------------

    def _first_pass(self) -> WeightSummary:
        policy, catalog = self.policy, self.catalog
        relative_observables = {v.record.observable.id for v in self.versions
                                if v.record.observable.relative}  # fmt: skip
        bases: list[np.ndarray] = []
        kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}  # for the footing
        first_bad: dict[str, int] = {}  # kind -> position of the first dataset with it
        codes_seen = np.zeros(len(CENSORED_WORDS), dtype=np.int64)
        for chunk in _chunks(self.versions, 500):
            stored = catalog.series_many([v.record.content_hash for v in chunk])
            for version in chunk:
                record = version.record
                arrays = _arrays(stored[record.content_hash], version)
                sd, source = _sd_of(version, arrays, policy)
                sd = np.asarray(sd, dtype=float)
                grade = str(version.grade if version.grade is not None else policy.ungraded)
                position = len(self._datasets)
                relative = bool(record.observable.relative)
                floor = 0.0 if relative else policy.absolute_floor
                dataset = _Dataset(
                    version, len(arrays), source, grade,
                    float(policy.inflation.get(grade, np.nan)), floor,
                    arrays.replicate is not None and len(record.replicate_labels) > 0,
                )  # fmt: skip
                dataset.labels = _label_values(version, source)
                self._datasets.append(dataset)
                codes = _codes(arrays)
                codes_seen += np.bincount(codes, minlength=len(CENSORED_WORDS))[: len(codes_seen)]
                if grade in policy.exclude:
                    first_bad.setdefault("excluded", position)
                if not np.all(np.isfinite(sd)) or np.any(sd < 0):
                    first_bad.setdefault("sd", position)
                    bases.append(np.empty(0))
                    continue
                floored = _floored(sd, arrays.value, floor, policy)
                if np.any(floored <= 0):
                    first_bad.setdefault("zero", position)
                    bases.append(np.empty(0))
                    continue
                bases.append(1.0 / (floored**2 * dataset.inflation))
                if record.observable.id in relative_observables:
                    kept[position] = (arrays.time, arrays.value, codes)
        self.censored_counts = {CENSORED_WORDS[k]: int(codes_seen[k]) for k in sorted(CENSORED_WORDS)
                                if CENSORED_WORDS[k]}  # fmt: skip
        self._has_censored = bool(codes_seen[1:].any())
        self._refuse(first_bad)
        return self._summarise(bases, kept)

    def _refuse(self, first_bad: dict[str, int]) -> None:
        """Refuse as :func:`apply_policy` refuses, naming the dataset it would name."""
        if sum(d.points for d in self._datasets) == 0:
            raise InputError("nothing to weight: the selection holds no points")
        if "excluded" in first_bad:
            ident = self._datasets[first_bad["excluded"]].version.id
            raise InputError(f"dataset {ident}: its grade is excluded by the policy")
        if "sd" in first_bad:
            ident = self._datasets[first_bad["sd"]].version.id
            raise InputError(f"dataset {ident}: a point has no usable sd")
        if "zero" in first_bad:
            dataset = self._datasets[first_bad["zero"]]
            version = dataset.version
            content = version.record.content_hash
            arrays = _arrays(self.catalog.series_many([content])[content], version)
            sd, _ = _sd_of(version, arrays, self.policy)
            floored = _floored(
                np.asarray(sd, dtype=float), arrays.value, dataset.floor, self.policy
            )
            bad = floored <= 0
            rows = pd.DataFrame({"dataset_id": version.id, "time": arrays.time[bad],
                                 "value": arrays.value[bad], "unit": version.record.observable.unit})  # fmt: skip
            raise InputError(zero_sd_message(rows, self.policy))

    def _summarise(self, bases: list[np.ndarray],
                   kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]) -> WeightSummary:  # fmt: skip
        present = [k for k, d in enumerate(self._datasets) if d.points > 0]
        order = sorted(present, key=lambda k: self._datasets[k].version.id)  # the summary's order
        ids = np.asarray([self._datasets[k].version.id for k in order], dtype=object)
        sizes = np.asarray([self._datasets[k].points for k in order])
        totals = np.asarray([_sequential_sum(bases[k]) for k in order])
        labs = np.asarray(
            [self._datasets[k].version.record.source.lab for k in order], dtype=object
        )
        observable_of = np.asarray(
            [self._datasets[k].version.record.observable.id for k in order]
        ).astype(str)
        footing = self._footing(order, bases, kept, observable_of)
        factors = balance_factors(
            totals * footing.multiplier, sizes, labs, observable_of, self.policy
        )
        self._balance = {order[j]: float(factors[j]) for j in range(len(order))}
        weights = {order[j]: (bases[order[j]] * factors[j]) * footing.multiplier[j]
                   for j in range(len(order))}  # fmt: skip
        parts = DatasetParts(
            ids=ids, sizes=sizes, observable=observable_of, lab=labs.astype(str),
            grade=np.asarray([self._datasets[k].grade_used for k in order]).astype(str),
            inflation=np.asarray([self._datasets[k].inflation for k in order], dtype=float),
            balance=factors,
            weight=np.asarray([_sequential_sum(weights[k]) for k in order]),
            weight_squared=np.asarray([_sequential_sum(weights[k] ** 2) for k in order]),
        )  # fmt: skip
        by_observable = {
            obs: np.concatenate([weights[k] for k in present
                                 if self._datasets[k].version.record.observable.id == obs])
            for obs in np.unique(observable_of)
        }  # fmt: skip
        return summarise_parts(self.policy, parts, by_observable, footing)

    def _footing(self, order: list[int], bases: list[np.ndarray],
                 kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]],
                 observable_of: np.ndarray) -> Footing:  # fmt: skip
        """Give each dataset's footing, computed on the rows of the observables with relative
        data only (a dataset's footing reads its own observable's rows alone)."""
        count = len(order)
        footing = Footing(np.ones(count), [None] * count, ["absolute"] * count)
        members = [j for j, k in enumerate(order) if k in kept]
        if not any(self._datasets[order[j]].version.record.observable.relative for j in members):
            return footing
        in_table = sorted(members, key=lambda j: order[j])  # rows in selection order
        counts = [self._datasets[order[j]].points for j in in_table]
        local = {j: n for n, j in enumerate(sorted(members))}  # sorted by id, as the table's codes
        conditions = self._conditions()
        columns: dict[str, Any] = {
            "relative": np.repeat([self._datasets[order[j]].version.record.observable.relative
                                   for j in in_table], counts).astype(bool),
            "value": np.concatenate([kept[order[j]][1] for j in in_table]),
            "time": np.concatenate([kept[order[j]][0] for j in in_table]),
        }  # fmt: skip
        if self._has_censored:
            codes = np.concatenate([kept[order[j]][2] for j in in_table])
            columns["censored"] = pd.Categorical.from_codes(codes, categories=_CENSORED_CATEGORIES)
        for column, (values, _) in conditions.items():
            columns[column] = np.repeat(values[[order[j] for j in in_table]], counts)
        frame = pd.DataFrame(columns)
        inverse = np.repeat([local[j] for j in in_table], counts)
        base = np.concatenate([bases[order[j]] for j in in_table])
        sub = footing_of(frame, base, inverse, observable_of[sorted(members)], list(conditions))
        for j in members:
            n = local[j]
            footing.multiplier[j], footing.scale[j], footing.kind[j] = (
                sub.multiplier[n], sub.scale[n], sub.kind[n])  # fmt: skip
        return footing

    # -- the columns -----------------------------------------------------------------------

    def _conditions(self) -> dict[str, tuple[np.ndarray, str]]:
        """Give each condition column's per-dataset values (in selection order), typed as the
        whole table types them, and their kind ('float', 'text' or 'object')."""
        if hasattr(self, "_condition_cache"):
            return self._condition_cache  # type: ignore[has-type, no-any-return]
        found: dict[str, list[Any]] = {}
        for position, dataset in enumerate(self._datasets):
            for key, condition in dataset.version.record.conditions.items():
                found.setdefault(condition_column(key), [None] * position).append(condition.value)
            for values in found.values():
                if len(values) == position:
                    values.append(None)
        typed: dict[str, tuple[np.ndarray, str]] = {}
        for column, values in found.items():
            kinds = {type(v) for v in values if v is not None}
            if kinds == {float}:
                typed[column] = (
                    np.array([np.nan if v is None else v for v in values], dtype=float),
                    "float",
                )
            elif len(kinds) > 1:  # a key numeric in one dataset, text in another: text
                typed[column] = (
                    np.array([None if v is None else str(v) for v in values], dtype=object),
                    "text",
                )
            else:
                typed[column] = (np.array(values, dtype=object), "object")
        self._condition_cache = typed
        return typed

    def _categories(self) -> dict[str, tuple[list[str], np.ndarray]]:
        """Give each label column's categories (sorted, as the table's) and every dataset's code."""
        if hasattr(self, "_category_cache"):
            return self._category_cache  # type: ignore[has-type, no-any-return]
        result = {}
        for name in _LABELS:
            values = np.asarray([d.labels[name] for d in self._datasets], dtype=str)
            labels, codes = np.unique(values, return_inverse=True)
            result[name] = ([str(v) for v in labels], np.asarray(codes))
        self._category_cache = result
        return result

    @cached_property
    def _prototype(self) -> pd.DataFrame:
        """Give one row per dataset with points, typed as the whole table (its schema's source)."""
        present = [k for k, d in enumerate(self._datasets) if d.points > 0]
        return self._frame(present, {k: 1 for k in present}, prototype=True)

    def _typed(self, frame: pd.DataFrame) -> pd.DataFrame:
        """Give a part typed as the whole table (pandas infers text columns per frame: a part
        whose grades are all missing would keep them as objects)."""
        wanted = self._prototype.dtypes
        differ = {c: wanted[c] for c in frame.columns if frame[c].dtype != wanted[c]}
        return frame.astype(differ) if differ else frame

    @cached_property
    def schema(self) -> pa.Schema:
        """Give the Arrow schema of the batches (with the pandas metadata the whole frame gets)."""
        import pyarrow as pa

        return pa.Schema.from_pandas(unit_symbols(self._prototype), preserve_index=False)

    def _frame(self, positions: list[int], lengths: dict[int, int], *, prototype: bool = False,
               stored: dict[str, SeriesArrays] | None = None) -> pd.DataFrame:  # fmt: skip
        """Give the weighted rows of the datasets at ``positions`` as a DataFrame; the prototype
        takes each dataset's first point only."""
        counts = np.asarray([lengths[k] for k in positions], dtype=np.intp)
        columns: dict[str, Any] = {}
        per_point: dict[str, list[np.ndarray]] = {n: [] for n in ("time", "value", "sd", "replicate", "censored",
                                                                  "inflation", "balance", "weight")}  # fmt: skip
        categories = self._categories()
        if stored is None and not prototype:
            stored = self.catalog.series_many(
                [self._datasets[k].version.record.content_hash for k in positions]
            )
        for k in positions:
            dataset = self._datasets[k]
            version = dataset.version
            if prototype:  # one stand-in point: only the types count
                per_point["time"].append(np.ones(1))
                per_point["value"].append(np.ones(1))
                per_point["sd"].append(np.ones(1))
                per_point["weight"].append(np.ones(1))
                per_point["censored"].append(np.zeros(1, dtype=np.int8))
                per_point["replicate"].append(
                    np.array(["" if dataset.replicates else None], dtype=object)
                )
                continue
            assert stored is not None
            arrays = _arrays(stored[version.record.content_hash], version)
            sd, _ = _sd_of(version, arrays, self.policy)
            floored = _floored(
                np.asarray(sd, dtype=float), arrays.value, dataset.floor, self.policy
            )
            base = 1.0 / (floored**2 * dataset.inflation)
            weight = base * self._balance[k]
            labels = np.array(version.record.replicate_labels, dtype=object)
            per_point["time"].append(arrays.time)
            per_point["value"].append(arrays.value)
            per_point["sd"].append(floored)
            per_point["weight"].append(weight)
            per_point["censored"].append(_codes(arrays))
            per_point["replicate"].append(labels[arrays.replicate] if dataset.replicates
                                          else np.full(len(arrays), None, dtype=object))  # fmt: skip
        take = np.asarray(positions, dtype=np.intp)
        for name in ("dataset_id", "observable", "unit", "unit_ucum", "lab"):
            labels_, codes = categories[name]
            columns[name] = pd.Categorical.from_codes(
                np.repeat(codes[take], counts), categories=labels_
            )
        columns["version"] = np.repeat(np.asarray([self._datasets[k].version.version for k in positions],
                                                  dtype=np.int64), counts)  # fmt: skip
        columns["relative"] = np.repeat(np.asarray([self._datasets[k].version.record.observable.relative
                                                    for k in positions], dtype=bool), counts)  # fmt: skip
        columns["grade"] = np.repeat(np.asarray([self._datasets[k].version.grade for k in positions],
                                                dtype=object), counts)  # fmt: skip
        columns["grade_used"] = np.repeat(np.asarray([self._datasets[k].grade_used for k in positions],
                                                     dtype=object), counts)  # fmt: skip
        for name in ("time", "value", "sd"):
            columns[name] = (
                np.concatenate(per_point[name]) if positions else np.array([], dtype=float)
            )
        labels_, codes = categories["sd_source"]
        columns["sd_source"] = pd.Categorical.from_codes(
            np.repeat(codes[take], counts), categories=labels_
        )
        columns["inflation"] = np.repeat(np.asarray([self._datasets[k].inflation for k in positions],
                                                    dtype=float), counts)  # fmt: skip
        columns["balance"] = np.repeat(
            np.asarray([self._balance[k] for k in positions], dtype=float), counts
        )
        weight = np.concatenate(per_point["weight"]) if positions else np.array([], dtype=float)
        columns["sigma"] = 1.0 / np.sqrt(weight)
        columns["weight"] = weight
        columns["replicate"] = (np.concatenate(per_point["replicate"]) if positions
                                else np.array([], dtype=object))  # fmt: skip
        labels_, codes = categories["calibration_group"]
        columns["calibration_group"] = pd.Categorical.from_codes(np.repeat(codes[take], counts),
                                                                 categories=labels_)  # fmt: skip
        if self._has_censored:
            columns["censored"] = pd.Categorical.from_codes(
                np.concatenate(per_point["censored"]), categories=_CENSORED_CATEGORIES)  # fmt: skip
        conditions = self._conditions()
        for column in sorted(conditions):
            columns[column] = np.repeat(conditions[column][0][take], counts)
        ordered = [c for c in STANDARD_COLUMNS if c in columns] + sorted(conditions)
        return pd.DataFrame({c: columns[c] for c in ordered})

    # -- the second pass -------------------------------------------------------------------

    def frames(self) -> Iterator[pd.DataFrame]:
        """Give the weighted table as DataFrames of about ``rows_per_batch`` rows, in order
        (a dataset is never split; units are canonical names, as in :attr:`table`)."""
        group: list[int] = []
        rows = 0
        for k, dataset in enumerate(self._datasets):
            if dataset.points == 0:
                continue
            group.append(k)
            rows += dataset.points
            if rows >= self.rows_per_batch:
                yield self._typed(self._frame(group, {j: self._datasets[j].points for j in group}))
                group, rows = [], 0
        if group:
            yield self._typed(self._frame(group, {j: self._datasets[j].points for j in group}))

    def batches(self) -> Iterator[pa.RecordBatch]:
        """Give the weighted table as Arrow record batches of :attr:`schema`, unit column as
        symbols ('nM'), as the table export writes it."""
        import pyarrow as pa

        schema = self.schema
        for frame in self.frames():
            yield pa.RecordBatch.from_pandas(
                unit_symbols(frame), schema=schema, preserve_index=False
            )

    @cached_property
    def table(self) -> pd.DataFrame:
        """Give the whole weighted table as one DataFrame (canonical unit names)."""
        frames = list(self.frames())
        if len(frames) == 1:
            return frames[0]
        return pd.concat(frames, ignore_index=True)


def _label_values(version: DatasetVersion, source: str) -> dict[str, str]:
    record = version.record
    return {
        "dataset_id": version.id, "observable": record.observable.id, "unit": record.observable.unit,
        "unit_ucum": record.observable.ucum or "", "lab": record.source.lab, "sd_source": source,
        "calibration_group": record.protocol.calibration_group or version.id,
    }  # fmt: skip


def _chunks(items: list[DatasetVersion], size: int) -> Iterator[list[DatasetVersion]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


def weighted_stream(catalog: Ledger, policy: Policy, selection: Selection, *,
                    rows_per_batch: int = ROWS_PER_BATCH) -> WeightedStream:  # fmt: skip
    """Give the weighted long table of a selection as a stream of record batches, with its
    weight summary (worked out in a first pass over the arrays)."""
    return WeightedStream(catalog, policy, selection, rows_per_batch)
