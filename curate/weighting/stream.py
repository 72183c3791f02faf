"""The weighted long table as a stream of Arrow record batches, never held whole.

The columns, types and values are those of :func:`curate.weighting.table.weighted_table`
(:mod:`curate.export.table` writes the batches straight into pyarrow's CSV and Parquet
writers). Two passes over the stored arrays:

1. what every weight depends on across the selection: each dataset's sum of base weights,
   its footing, the balancing factors and the weight summary. It keeps one float per point
   (the weights Kish's n_eff reads whole, summed as the table sums them) until the summary is
   made, and the arrays of the observables that hold relative-unit data (their footing
   compares datasets point by point);
2. the arrays again, a few datasets at a time (a dataset is never split), as record batches.

Records are not parsed whole: SQLite reads the fields the table needs from each record's
JSON. A dataset whose sd is the lab's reported SD as stored (no masks, no per-point n, a
linear scale, every sd finite) is computed column-wise over the batch; any other dataset is
parsed and goes through the table's own per-dataset code (:func:`_sd_of`). Sums are the
table's sums (``np.bincount`` in row order), so the numbers are the same to the last digit.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from functools import cached_property, lru_cache
from sys import intern
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.ledger import Ledger
from curate.records import (
    CENSORED_WORDS,
    ConditionValue,
    DatasetVersion,
    SeriesArrays,
    masked_points,
    normalise_grade,
)
from curate.units import short_unit
from curate.weighting.policy import Policy
from curate.weighting.selection import Selection, nothing_selected, select
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

__all__ = [
    "ROWS_PER_BATCH",
    "ConditionFacts",
    "RecordFacts",
    "VersionFacts",
    "WeightedStream",
    "weighted_stream",
]

ROWS_PER_BATCH = 65_536  # one Parquet row group each; about 6 MB of columns
_CHUNK = 500  # at most this many datasets read at once in the first pass
_CHUNK_ROWS = 4 * ROWS_PER_BATCH  # and about this many points

_LABELS = ("dataset_id", "observable", "unit", "unit_ucum", "lab", "sd_source", "calibration_group")
_CENSORED_CATEGORIES = [CENSORED_WORDS[k] for k in sorted(CENSORED_WORDS)]
_PLAIN_SD = ("sd", "estimated", "assumed")  # reported kinds that are the SD as they stand
_FIELDS = ("$.observable.id", "$.observable.unit", "$.observable.ucum", "$.observable.relative",
           "$.source.lab", "$.protocol.calibration_group", "$.conditions", "$.replicate_labels",
           "$.masks", "$.uncertainty", "$.trust.grade", "$.retired", "$.n_points")  # fmt: skip


@dataclass(frozen=True, slots=True)
class ConditionFacts:
    """One condition as a stored record holds it (validated when it was written)."""

    value: float | bool | str
    unit: str | None = None
    unit_original: str | None = None


@dataclass(frozen=True, slots=True)
class RecordFacts:
    """The fields of a record the weighted table reads."""

    content_hash: str
    observable: str
    unit: str
    ucum: str
    relative: bool
    lab: str
    calibration_group: str | None
    conditions: Mapping[str, ConditionValue | ConditionFacts]
    replicate_labels: tuple[str, ...]
    masked: bool  # whether any mask sets points aside
    plain_sd: bool  # the reported uncertainty is an SD of the value as stored (linear, no n)
    retired: bool
    n_points: int  # as stored, before masks


@dataclass(frozen=True, slots=True)
class VersionFacts:
    """One dataset version as the weighted table reads it (no whole record parsed)."""

    id: str
    version: int
    record_hash: str
    grade: str | None
    record: RecordFacts

    @classmethod
    def of(cls, version: DatasetVersion) -> VersionFacts:
        """Give the facts of a parsed version."""
        r = version.record
        u = r.uncertainty
        plain = (u is not None and u.type.value in _PLAIN_SD and u.n is None
                 and u.scale.value == "linear")  # fmt: skip
        return cls(version.id, version.version, version.record_hash, version.grade, RecordFacts(
            r.content_hash, r.observable.id, r.observable.unit, r.observable.ucum or "",
            r.observable.relative, r.source.lab, r.protocol.calibration_group, dict(r.conditions),
            tuple(r.replicate_labels), bool(r.masks), plain, r.retired, r.n_points,
        ))  # fmt: skip

    @classmethod
    def read(cls, ident: str, version: int, record_hash: str, content_hash: str,
             values: list[Any]) -> VersionFacts:  # fmt: skip
        """Give the facts from the record fields :data:`_FIELDS` as the store reads them."""
        (observable, unit, ucum, relative, lab, group, conditions, labels, masks, uncertainty,
         grade, retired, n_points) = values  # fmt: skip
        # objects and arrays come as JSON text: read only those that are not empty
        conditions = json.loads(conditions) if conditions not in (None, "{}") else {}
        labels = json.loads(labels) if labels not in (None, "[]") else ()
        uncertainty = json.loads(uncertainty) if uncertainty is not None else None
        masks = masks not in (None, "[]")
        plain = (uncertainty is not None and uncertainty.get("type", "sd") in _PLAIN_SD
                 and uncertainty.get("n") is None and uncertainty.get("scale", "linear") == "linear")  # fmt: skip
        # words many datasets share are kept once (a catalog of 10^5 small datasets repeats them)
        return cls(ident, version, record_hash, grade and intern(grade), RecordFacts(
            content_hash, intern(observable), intern(unit), intern(ucum or ""), bool(relative), intern(lab),
            group and intern(group),
            {intern(k): _condition(c) for k, c in (conditions or {}).items()},
            tuple(labels or ()), bool(masks), plain, bool(retired), int(n_points or 0),
        ))  # fmt: skip


@lru_cache(maxsize=4096)
def _condition_of(
    key: tuple[type, str], value: Any, unit: str | None, original: str | None
) -> ConditionFacts:
    return ConditionFacts(value, unit, original)


def _condition(stored: dict[str, Any]) -> ConditionFacts:
    """Give a stored condition's facts, one object for each distinct condition (told apart by
    type and exact text, so True is not 1.0 and -0.0 is not 0.0)."""
    value = stored["value"]
    return _condition_of(
        (type(value), repr(value)), value, stored.get("unit"), stored.get("unit_original")
    )


def select_facts(catalog: Ledger, selection: Selection, policy: Policy) -> list[VersionFacts]:
    """Give the facts of the versions :func:`select` gives, in its order. Filters the
    searchable fields answer without parsing; conditions and pinned versions parse records."""
    if selection.conditions or selection.versions:
        return [VersionFacts.of(v) for v in select(catalog, selection, policy)]
    for ident in selection.ids:
        catalog.show(ident)  # NotFoundError names an unknown id
    wanted_grades = {normalise_grade(g) for g in selection.grades}
    chosen = []
    for row in catalog.latest_fields(_FIELDS):
        facts = VersionFacts.read(*row)
        record = facts.record
        if selection.ids and facts.id not in selection.ids:
            continue
        if record.retired and not selection.include_retired:
            continue
        if selection.observables and record.observable not in selection.observables:
            continue
        if selection.labs and record.lab not in selection.labs:
            continue
        grade = facts.grade or policy.ungraded
        if (
            wanted_grades
            and (facts.grade or "none") not in wanted_grades
            and grade not in wanted_grades
        ):
            continue
        if grade in policy.exclude:
            continue
        chosen.append(facts)
    if not chosen:
        raise nothing_selected(selection, policy)
    return chosen


@dataclass(slots=True)
class _Dataset:
    """What the first pass learns of one dataset version (in selection order)."""

    facts: VersionFacts
    grade_used: str
    inflation: float
    floor: float  # the absolute noise floor that applies (0 for relative units)
    points: int = 0
    sd_source: str = "reported"
    column_wise: bool = True  # computed over the batch; else through the table's own code
    replicates: bool = False  # whether its points carry replicate labels
    full: DatasetVersion | None = None


@dataclass
class _Part:
    """The arrays of a run of whole datasets, in table order (the datasets' own, masks applied)."""

    members: list[int]
    counts: np.ndarray
    time: np.ndarray
    value: np.ndarray
    sd: np.ndarray  # measured, before the floors
    censored: np.ndarray
    replicate: list[np.ndarray | None] = field(default_factory=list)

    @property
    def row_dataset(self) -> np.ndarray:
        """Give each row's position in ``members``."""
        return np.repeat(np.arange(len(self.members)), self.counts)


def _codes(arrays: SeriesArrays) -> np.ndarray:
    """Give each point's censoring code (0: observed)."""
    if arrays.censored is None:
        return np.zeros(len(arrays), dtype=np.int8)
    return np.asarray(arrays.censored, dtype=np.int8)


def _concatenated(parts: list[np.ndarray], dtype: Any) -> np.ndarray:
    return np.concatenate(parts) if parts else np.array([], dtype=dtype)


class WeightedStream:
    """The weighted long table of a selection as record batches, beside its weight summary,
    the versions it holds (as :class:`VersionFacts`) and the points masks set aside.

    ``batches()`` reads the catalog again on every call; ``table`` gives the whole DataFrame,
    the frame :func:`curate.weighting.table.weighted_table` gives.
    """

    def __init__(self, catalog: Ledger, policy: Policy, selection: Selection,
                 rows_per_batch: int = ROWS_PER_BATCH) -> None:  # fmt: skip
        self.catalog, self.policy, self.selection = catalog, policy, selection
        self.rows_per_batch = rows_per_batch
        self.versions: list[VersionFacts] = select_facts(catalog, selection, policy)
        self._datasets = [self._dataset(f) for f in self.versions]
        self.censored_counts: dict[str, int] = {"below": 0, "above": 0}
        self._balance = np.ones(len(self._datasets))
        self._per_dataset: set[int] = set()  # datasets whose sd needs the table's own code
        self.summary: WeightSummary = self._first_pass()
        masked = [self._full(k) for k, d in enumerate(self._datasets) if d.facts.record.masked]
        self.aside: SetAside = set_aside(catalog, masked)

    def _dataset(self, facts: VersionFacts) -> _Dataset:
        policy = self.policy
        grade = str(facts.grade if facts.grade is not None else policy.ungraded)
        floor = 0.0 if facts.record.relative else policy.absolute_floor
        return _Dataset(facts, grade, float(policy.inflation.get(grade, np.nan)), floor)

    def _full(self, k: int) -> DatasetVersion:
        """Give the parsed version of dataset ``k`` (read once)."""
        dataset = self._datasets[k]
        if dataset.full is None:
            dataset.full = self.catalog.show(dataset.facts.id, dataset.facts.version)
        return dataset.full

    def full_versions(self) -> list[DatasetVersion]:
        """Give every version parsed whole (what writers other than the table's need)."""
        return [self._full(k) for k in range(len(self._datasets))]

    # -- reading the arrays ----------------------------------------------------------------

    def _read(self, members: list[int]) -> _Part:
        """Give the arrays of whole datasets (masks applied), their measured sd, censoring
        codes and replicate codes; note each dataset's points and sd source.

        A dataset whose sd stands as stored is joined byte for byte with the others; a dataset
        found to hold a non-finite sd then goes the per-dataset way (and the read is redone).
        """
        stored = self.catalog.series_bytes(
            [self._datasets[k].facts.record.content_hash for k in members]
        )
        while True:
            times: list[bytes] = []
            values: list[bytes] = []
            sds: list[bytes] = []
            codes: list[bytes] = []
            replicate: list[np.ndarray | None] = []
            for k in members:
                dataset = self._datasets[k]
                record = dataset.facts.record
                time, value, sd, codes_of, n, censored = stored[record.content_hash]
                dataset.column_wise = (record.plain_sd and not record.masked and sd is not None
                                       and n is None and k not in self._per_dataset)  # fmt: skip
                if dataset.column_wise:
                    points = len(time) // 8
                    times.append(time)
                    values.append(value)
                    sds.append(sd)
                    codes.append(bytes(points) if censored is None else censored)
                    replicates = codes_of is not None and len(record.replicate_labels) > 0
                    replicate.append(np.frombuffer(codes_of, dtype="<i8") if replicates else None)
                else:
                    arrays = self._arrays_of(k)
                    points = len(arrays)
                    sd_measured, dataset.sd_source = _sd_of(self._full(k), arrays, self.policy)
                    replicates = arrays.replicate is not None and len(record.replicate_labels) > 0
                    times.append(arrays.time.tobytes())
                    values.append(arrays.value.tobytes())
                    sds.append(np.asarray(sd_measured, dtype="<f8").tobytes())
                    codes.append(_codes(arrays).tobytes())
                    replicate.append(arrays.replicate if replicates else None)
                dataset.points, dataset.replicates = points, replicates
            counts = np.asarray([self._datasets[k].points for k in members], dtype=np.intp)
            sd_all = np.frombuffer(b"".join(sds), dtype="<f8")
            rows = np.repeat(np.arange(len(members)), counts)
            gaps = np.bincount(rows[~np.isfinite(sd_all)], minlength=len(members))
            redo = {k for j, k in enumerate(members) if gaps[j] and self._datasets[k].column_wise}
            if not redo:
                break
            self._per_dataset |= redo  # an sd the lab left out: the noise estimate stands in
        for k in members:
            if self._datasets[k].column_wise:
                self._datasets[k].sd_source = "reported"
        return _Part(members, counts, np.frombuffer(b"".join(times), dtype="<f8"),
                     np.frombuffer(b"".join(values), dtype="<f8"), sd_all,
                     np.frombuffer(b"".join(codes), dtype="<i1"), replicate)  # fmt: skip

    def _arrays_of(self, k: int) -> SeriesArrays:
        """Give dataset ``k``'s arrays with masked points set aside (the per-dataset way)."""
        content = self._datasets[k].facts.record.content_hash
        arrays = self.catalog.series_many([content])[content]
        version = self._full(k)
        if version.record.masks:
            arrays = arrays.subset(~masked_points(version.record, arrays))
        return arrays

    def _floored(self, part: _Part) -> np.ndarray:
        """Give the sd after the policy's noise floors (as :func:`apply_policy` floors it)."""
        floors = np.repeat([self._datasets[k].floor for k in part.members], part.counts)
        floored: np.ndarray = np.maximum(
            np.maximum(part.sd, floors), self.policy.relative_floor * np.abs(part.value)
        )
        return floored

    def _base(self, part: _Part, floored: np.ndarray) -> np.ndarray:
        inflation = np.repeat([self._datasets[k].inflation for k in part.members], part.counts)
        with np.errstate(divide="ignore", invalid="ignore"):  # refused before it is used
            base: np.ndarray = 1.0 / (floored**2 * inflation)
        return base

    # -- the first pass: what every weight depends on -------------------------------------

    def _first_pass(self) -> WeightSummary:
        relative_observables = {
            d.facts.record.observable for d in self._datasets if d.facts.record.relative
        }
        parts: list[tuple[list[int], np.ndarray, np.ndarray]] = []  # members, counts, base
        kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}  # for the footing
        first_bad: dict[str, int] = {}
        seen = np.zeros(len(CENSORED_WORDS), dtype=np.int64)
        for members in self._chunks():
            part = self._read(members)
            seen += np.bincount(part.censored, minlength=len(seen))[: len(seen)]
            floored = self._floored(part)
            unusable = np.bincount(part.row_dataset, weights=~np.isfinite(part.sd) | (part.sd < 0),
                                   minlength=len(part.members))  # fmt: skip
            zero = np.bincount(part.row_dataset, weights=floored <= 0, minlength=len(part.members))
            for j, k in enumerate(part.members):
                if self._datasets[k].grade_used in self.policy.exclude:
                    first_bad.setdefault("excluded", k)
                if unusable[j]:
                    first_bad.setdefault("sd", k)
                elif zero[j]:
                    first_bad.setdefault("zero", k)
            parts.append((part.members, part.counts, self._base(part, floored)))
            ends = np.cumsum(part.counts)
            for j, k in enumerate(part.members):
                if self._datasets[k].facts.record.observable in relative_observables:
                    rows = slice(ends[j] - part.counts[j], ends[j])
                    kept[k] = (
                        part.time[rows].copy(),
                        part.value[rows].copy(),
                        part.censored[rows].copy(),
                    )
        self.censored_counts = {
            CENSORED_WORDS[k]: int(seen[k]) for k in sorted(CENSORED_WORDS) if CENSORED_WORDS[k]
        }
        self._has_censored = bool(seen[1:].any())
        self._refuse(first_bad)
        return self._summarise(parts, kept)

    def _chunks(self) -> Iterator[list[int]]:
        """Give runs of whole datasets of about :data:`_CHUNK_ROWS` points (their stored
        counts) and at most :data:`_CHUNK` datasets: what the first pass reads at once."""
        members: list[int] = []
        rows = 0
        for k, dataset in enumerate(self._datasets):
            members.append(k)
            rows += dataset.facts.record.n_points
            if rows >= _CHUNK_ROWS or len(members) >= _CHUNK:
                yield members
                members, rows = [], 0
        if members:
            yield members

    def _refuse(self, first_bad: dict[str, int]) -> None:
        """Refuse as :func:`apply_policy` refuses, naming the dataset it would name."""
        if sum(d.points for d in self._datasets) == 0:
            raise InputError("nothing to weight: the selection holds no points")
        if "excluded" in first_bad:
            raise InputError(
                f"dataset {self._datasets[first_bad['excluded']].facts.id}: its grade is excluded by the policy"
            )
        if "sd" in first_bad:
            raise InputError(
                f"dataset {self._datasets[first_bad['sd']].facts.id}: a point has no usable sd"
            )
        if "zero" in first_bad:
            k = first_bad["zero"]
            part = self._read([k])
            bad = self._floored(part) <= 0
            facts = self._datasets[k].facts
            rows = pd.DataFrame({"dataset_id": facts.id, "time": part.time[bad], "value": part.value[bad],
                                 "unit": facts.record.unit})  # fmt: skip
            raise InputError(zero_sd_message(rows, self.policy))

    def _summarise(self, parts: list[tuple[list[int], np.ndarray, np.ndarray]],
                   kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]) -> WeightSummary:  # fmt: skip
        datasets = self._datasets
        totals_of = np.zeros(len(datasets))
        for members, counts, base in parts:  # sums in row order, as the table's bincount
            totals_of[members] = np.bincount(np.repeat(np.arange(len(members)), counts), weights=base,
                                             minlength=len(members))  # fmt: skip
        present = [k for k, d in enumerate(datasets) if d.points > 0]
        order = sorted(present, key=lambda k: datasets[k].facts.id)  # the summary's order
        sizes = np.asarray([datasets[k].points for k in order])
        labs = np.asarray([datasets[k].facts.record.lab for k in order], dtype=object)
        observable_of = np.asarray([datasets[k].facts.record.observable for k in order]).astype(str)
        footing = self._footing(order, parts, kept, observable_of)
        factors = balance_factors(
            totals_of[order] * footing.multiplier, sizes, labs, observable_of, self.policy
        )
        multiplier = np.ones(len(datasets))
        self._balance[order], multiplier[order] = factors, footing.multiplier
        weight_of, squared_of = np.zeros(len(datasets)), np.zeros(len(datasets))
        # each observable's weights in table order, written in place; each part's base weights
        # are let go once used, so the pass holds about one float per point
        points_of: dict[str, int] = {}
        for d in datasets:
            points_of[d.facts.record.observable] = (
                points_of.get(d.facts.record.observable, 0) + d.points
            )
        by_observable = {obs: np.empty(n) for obs, n in points_of.items() if n}
        filled = dict.fromkeys(by_observable, 0)
        for position, (members, counts, base) in enumerate(parts):
            rows = np.repeat(np.arange(len(members)), counts)
            weight = (base * self._balance[members][rows]) * multiplier[members][rows]
            parts[position] = (members, counts, np.empty(0))
            del base
            weight_of[members] = np.bincount(rows, weights=weight, minlength=len(members))
            squared_of[members] = np.bincount(rows, weights=weight**2, minlength=len(members))
            names, codes = np.unique(
                [datasets[k].facts.record.observable for k in members], return_inverse=True
            )
            observable_rows = codes.reshape(-1)[rows]
            for code, observable in enumerate(names.tolist()):
                taken = weight[observable_rows == code]
                by_observable[observable][filled[observable] : filled[observable] + len(taken)] = (
                    taken
                )
                filled[observable] += len(taken)
        summary_parts = DatasetParts(
            ids=np.asarray([datasets[k].facts.id for k in order], dtype=object), sizes=sizes,
            observable=observable_of, lab=labs.astype(str),
            grade=np.asarray([datasets[k].grade_used for k in order]).astype(str),
            inflation=np.asarray([datasets[k].inflation for k in order], dtype=float),
            balance=factors, weight=weight_of[order], weight_squared=squared_of[order],
        )  # fmt: skip
        return summarise_parts(self.policy, summary_parts, by_observable, footing)

    def _footing(self, order: list[int], parts: list[tuple[list[int], np.ndarray, np.ndarray]],
                 kept: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]],
                 observable_of: np.ndarray) -> Footing:  # fmt: skip
        """Give each dataset's footing, computed on the rows of the observables with relative
        data alone (a dataset's footing reads its own observable's rows only)."""
        count = len(order)
        footing = Footing(np.ones(count), [None] * count, ["absolute"] * count)
        members = [j for j, k in enumerate(order) if k in kept]
        if not any(self._datasets[order[j]].facts.record.relative for j in members):
            return footing
        bases: dict[int, np.ndarray] = {}
        for chunk, chunk_counts, base in parts:
            ends = np.cumsum(chunk_counts)
            for j, k in enumerate(chunk):
                if k in kept:
                    bases[k] = base[ends[j] - chunk_counts[j] : ends[j]]
        in_table = sorted(members, key=lambda j: order[j])  # rows in selection order
        counts = [self._datasets[order[j]].points for j in in_table]
        local = {j: n for n, j in enumerate(sorted(members))}  # by id, as the table's codes
        columns: dict[str, Any] = {
            "relative": np.repeat([self._datasets[order[j]].facts.record.relative for j in in_table], counts).astype(bool),
            "value": np.concatenate([kept[order[j]][1] for j in in_table]),
            "time": np.concatenate([kept[order[j]][0] for j in in_table]),
        }  # fmt: skip
        if self._has_censored:
            codes = np.concatenate([kept[order[j]][2] for j in in_table])
            columns["censored"] = pd.Categorical.from_codes(codes, categories=_CENSORED_CATEGORIES)
        conditions = self._conditions
        for column, (values, _) in conditions.items():
            columns[column] = np.repeat(values[[order[j] for j in in_table]], counts)
        frame = pd.DataFrame(columns)
        inverse = np.repeat([local[j] for j in in_table], counts)
        base = np.concatenate([bases[order[j]] for j in in_table])
        sub = footing_of(frame, base, inverse, observable_of[sorted(members)], list(conditions))
        for j in members:
            n = local[j]
            footing.multiplier[j], footing.scale[j], footing.kind[j] = (
                sub.multiplier[n],
                sub.scale[n],
                sub.kind[n],
            )
        return footing

    # -- the columns -----------------------------------------------------------------------

    @cached_property
    def _conditions(self) -> dict[str, tuple[np.ndarray, str]]:
        """Give each condition column's per-dataset values (in selection order), typed as the
        whole table types them, and their kind ('float', 'text' or 'object')."""
        by_key: dict[str, dict[int, Any]] = {}
        for position, dataset in enumerate(self._datasets):
            for key, condition in dataset.facts.record.conditions.items():
                by_key.setdefault(condition_column(key), {})[position] = condition.value
        count = len(self._datasets)
        found = {column: [held.get(k) for k in range(count)] for column, held in by_key.items()}
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
        return typed

    @cached_property
    def _categories(self) -> dict[str, tuple[list[str], np.ndarray]]:
        """Give each label column's categories (sorted, as the table's) and each dataset's code."""
        values: dict[str, list[str]] = {name: [] for name in _LABELS}
        for d in self._datasets:
            r = d.facts.record
            for name, value in zip(_LABELS, (d.facts.id, r.observable, r.unit, r.ucum, r.lab, d.sd_source,
                                             r.calibration_group or d.facts.id), strict=True):  # fmt: skip
                values[name].append(str(value))
        result = {}
        for name in _LABELS:
            labels, codes = np.unique(np.asarray(values[name], dtype=str), return_inverse=True)
            result[name] = ([str(v) for v in labels], np.asarray(codes).reshape(-1))
        return result

    @cached_property
    def _prototype(self) -> pd.DataFrame:
        """Give one row per dataset with points, typed as the whole table (the schema's source:
        pandas and pyarrow type a column by what its values are)."""
        present = [k for k, d in enumerate(self._datasets) if d.points > 0]
        take = np.asarray(present, dtype=np.intp)
        ones = np.ones(len(present))
        columns: dict[str, Any] = {}
        for name, (labels, codes) in self._categories.items():
            columns[name] = pd.Categorical.from_codes(codes[take], categories=labels)
        columns["version"] = np.asarray(
            [self._datasets[k].facts.version for k in present], dtype=np.int64
        )
        columns["relative"] = np.asarray(
            [self._datasets[k].facts.record.relative for k in present], dtype=bool
        )
        columns["grade"] = np.asarray(
            [self._datasets[k].facts.grade for k in present], dtype=object
        )
        columns["grade_used"] = np.asarray(
            [self._datasets[k].grade_used for k in present], dtype=object
        )
        for name in ("time", "value", "sd", "inflation", "balance", "sigma", "weight"):
            columns[name] = ones
        columns["replicate"] = np.asarray(
            ["" if self._datasets[k].replicates else None for k in present], dtype=object
        )
        if self._has_censored:
            columns["censored"] = pd.Categorical.from_codes(
                np.zeros(len(present), np.int8), categories=_CENSORED_CATEGORIES
            )
        for column, (values, _) in self._conditions.items():
            columns[column] = values[take]
        ordered = [c for c in STANDARD_COLUMNS if c in columns] + sorted(self._conditions)
        return pd.DataFrame({c: columns[c] for c in ordered})

    @cached_property
    def schema(self) -> pa.Schema:
        """Give the Arrow schema of the batches, unit column as symbols (with the pandas
        metadata the whole frame gets, so readers give back the same frame)."""
        import pyarrow as pa

        return pa.Schema.from_pandas(unit_symbols(self._prototype), preserve_index=False)

    @cached_property
    def _canonical_schema(self) -> pa.Schema:
        import pyarrow as pa

        return pa.Schema.from_pandas(self._prototype, preserve_index=False)

    # -- the second pass -------------------------------------------------------------------

    def _groups(self) -> Iterator[list[int]]:
        group: list[int] = []
        rows = 0
        for k, dataset in enumerate(self._datasets):
            if dataset.points == 0:
                continue
            group.append(k)
            rows += dataset.points
            if rows >= self.rows_per_batch:
                yield group
                group, rows = [], 0
        if group:
            yield group

    def batches(self, *, unit_symbols: bool = True) -> Iterator[pa.RecordBatch]:
        """Give the weighted table as Arrow record batches of :attr:`schema` (about
        ``rows_per_batch`` rows each), the unit column as symbols ('nM') as the table export
        writes it, or as canonical names (``unit_symbols=False``) as :attr:`table` has it."""
        schema = self.schema if unit_symbols else self._canonical_schema
        for group in self._groups():
            yield self._batch(group, schema, symbols=unit_symbols)

    def _batch(self, members: list[int], schema: pa.Schema, *, symbols: bool) -> pa.RecordBatch:
        import pyarrow as pa

        part = self._read(members)
        rows = part.row_dataset
        take = np.asarray(members, dtype=np.intp)
        floored = self._floored(part)
        weight = self._base(part, floored) * self._balance[take][rows]
        datasets = [self._datasets[k] for k in members]
        index = pa.array(rows.astype(np.int32))

        def per_dataset(values: list[Any], name: str) -> pa.Array:
            return pa.array(values, type=schema.field(name).type, from_pandas=True).take(index)

        def floats(values: np.ndarray) -> pa.Array:
            return pa.array(
                values, type=pa.float64(), from_pandas=True
            )  # NaN as null, as pandas gives it

        def labels(name: str) -> pa.Array:
            categories, codes = self._categories[name]
            if name == "unit" and symbols:
                categories = [short_unit(c) for c in categories]
                if len(set(categories)) < len(categories):  # symbols that coincide: plain text
                    return per_dataset([categories[c] for c in codes[take]], name)
            kind = schema.field(name).type
            indices = pa.array(
                codes[take][rows].astype(kind.index_type.to_pandas_dtype()), type=kind.index_type
            )
            return pa.DictionaryArray.from_arrays(
                indices, pa.array(categories, type=kind.value_type)
            )

        columns: dict[str, pa.Array] = {name: labels(name) for name in _LABELS}
        columns["version"] = pa.array(
            np.repeat([d.facts.version for d in datasets], part.counts).astype(np.int64)
        )
        columns["relative"] = pa.array(
            np.repeat([d.facts.record.relative for d in datasets], part.counts).astype(bool)
        )
        columns["grade"] = per_dataset([d.facts.grade for d in datasets], "grade")
        columns["grade_used"] = per_dataset([d.grade_used for d in datasets], "grade_used")
        columns["time"], columns["value"], columns["sd"] = (
            floats(part.time),
            floats(part.value),
            floats(floored),
        )
        columns["inflation"] = floats(np.repeat([d.inflation for d in datasets], part.counts))
        columns["balance"] = floats(self._balance[take][rows])
        columns["sigma"], columns["weight"] = floats(1.0 / np.sqrt(weight)), floats(weight)
        columns["replicate"] = self._replicates(datasets, part, schema.field("replicate").type)
        if self._has_censored:
            kind = schema.field("censored").type
            columns["censored"] = pa.DictionaryArray.from_arrays(
                pa.array(part.censored, type=kind.index_type), pa.array(_CENSORED_CATEGORIES, type=kind.value_type))  # fmt: skip
        for column, (values, _) in self._conditions.items():
            columns[column] = per_dataset(list(values[take]), column)
        return pa.RecordBatch.from_arrays([columns[name] for name in schema.names], schema=schema)

    @staticmethod
    def _replicates(datasets: list[_Dataset], part: _Part, kind: pa.DataType) -> pa.Array:
        """Give each point's replicate label (null where its dataset has none)."""
        import pyarrow as pa

        words: list[str | None] = [None]
        indices = []
        for dataset, codes, count in zip(datasets, part.replicate, part.counts, strict=True):
            if codes is None:
                indices.append(np.zeros(count, dtype=np.int64))
                continue
            indices.append(np.asarray(codes, dtype=np.int64) + len(words))
            words.extend(dataset.facts.record.replicate_labels)
        return pa.array(words, type=kind).take(pa.array(_concatenated(indices, np.int64)))

    @cached_property
    def table(self) -> pd.DataFrame:
        """Give the whole weighted table as one DataFrame (canonical unit names), typed as
        :func:`curate.weighting.table.weighted_table` types it."""
        import pyarrow as pa

        whole = pa.Table.from_batches(
            list(self.batches(unit_symbols=False)), schema=self._canonical_schema
        )
        frame = whole.to_pandas()
        wanted = self._prototype.dtypes
        differ = {c: wanted[c] for c in frame.columns if frame[c].dtype != wanted[c]}
        return frame.astype(differ) if differ else frame


def weighted_stream(catalog: Ledger, policy: Policy, selection: Selection, *,
                    rows_per_batch: int = ROWS_PER_BATCH) -> WeightedStream:  # fmt: skip
    """Give the weighted long table of a selection as a stream of record batches, with its
    weight summary (worked out in a first pass over the arrays)."""
    return WeightedStream(catalog, policy, selection, rows_per_batch)
