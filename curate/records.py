"""Validated records (pydantic v2) of a dataset version, and content hashing.

A dataset is one measured series (or a replicate set of one observable under one condition
set). Each change to it is a new immutable :class:`DatasetVersion`. The arrays live in a
:class:`SeriesArrays` value whose :func:`content_hash` is a sha256 over a canonical byte form
of the arrays and their units; the metadata lives in :class:`DatasetRecord`.

Uncertainty is kept as reported: the ``sd`` array holds the numbers the lab gave, and
:class:`Uncertainty` says what they are (SD, SEM with n, CI half-width with level, percent of
the value, an estimate, an assumption) and on which scale (linear, ln, log10). The effective
sigma of a fit is derived only at export.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from dataclasses import dataclass
from enum import StrEnum
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    field_validator,
    model_validator,
)

__all__ = [
    "ABOVE",
    "BELOW",
    "CENSORED_WORDS",
    "EXCLUSION_GRADE",
    "GRADES",
    "OBSERVED",
    "ConditionValue",
    "DatasetRecord",
    "DatasetVersion",
    "Identifier",
    "NoiseEstimate",
    "Normalisation",
    "Observable",
    "PlausibilityWarning",
    "PointMask",
    "PretreatmentStep",
    "Protocol",
    "SeriesArrays",
    "Source",
    "TrustAssessment",
    "Uncertainty",
    "UncertaintyScale",
    "UncertaintyType",
    "as_given_hash",
    "canonical_json",
    "content_hash",
    "in_use",
    "jsonable",
    "masked_points",
    "normalise_grade",
    "record_hash",
]

IDENTIFIER_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"
# ASCII only: the PEtab library's own check is Unicode-aware, SBML ids are not.
Identifier = Annotated[str, StringConstraints(pattern=IDENTIFIER_PATTERN, max_length=128)]

# Our trust scale: A (best) to D, and X = kept in the catalog, never fitted.
GRADES = ("A", "B", "C", "D", "X")
EXCLUSION_GRADE = "X"


def normalise_grade(text: Any) -> Any:
    """Give a grade as the scale writes it: ' b ' -> 'B'; 'none' (any case) -> 'none'.

    Anything that is not a grade comes back unchanged, for the caller's error to quote it.
    """
    if not isinstance(text, str):
        return text
    cleaned = text.strip()
    if cleaned.upper() in GRADES:
        return cleaned.upper()
    if cleaned.lower() == "none":
        return "none"
    return text


class _Record(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class UncertaintyType(StrEnum):
    """What the numbers in a dataset's ``sd`` column are."""

    SD = "sd"
    SEM = "sem"
    CI = "ci"
    PERCENT = "percent"
    ESTIMATED = "estimated"
    ASSUMED = "assumed"


class UncertaintyScale(StrEnum):
    """The scale on which the uncertainty is stated (sd of y, of ln y, or of log10 y)."""

    LINEAR = "linear"
    LN = "ln"
    LOG10 = "log10"


class Uncertainty(_Record):
    """How to read a dataset's reported uncertainty column."""

    type: UncertaintyType = UncertaintyType.SD
    scale: UncertaintyScale = UncertaintyScale.LINEAR
    level: float | None = Field(None, gt=0, lt=1, description="confidence level of a CI")
    n: int | None = Field(None, ge=1, description="n behind an SEM when no per-point n is given")

    @model_validator(mode="after")
    def _level_for_ci(self) -> Uncertainty:
        if self.type is UncertaintyType.CI and self.level is None:
            raise ValueError("a confidence interval needs its level (e.g. 0.95)")
        return self


class Observable(_Record):
    """What was measured and in which unit."""

    id: Identifier
    label: str = ""
    unit: str = Field(description="canonical pint unit the values are stored in")
    unit_original: str = Field(description="unit string as given at intake")
    ucum: str | None = Field(None, description="UCUM code of the canonical unit")
    relative: bool = Field(description="relative units: a fit needs a scale factor")


class ConditionValue(_Record):
    """One experimental condition: a number with its canonical unit, or a category."""

    value: float | bool | str
    unit: str | None = None
    unit_original: str | None = None


class Source(_Record):
    """Where a dataset came from."""

    lab: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]
    contact: str | None = None
    method: str | None = None
    instrument: str | None = None
    acquired: dt.date | None = None
    reference: str | None = Field(None, description="publication, DOI or lab notebook reference")
    raw_file_name: str | None = None
    raw_file_sha256: str | None = None


class Normalisation(_Record):
    """How the lab normalised the values before sending them."""

    kind: Literal["none", "reference_time", "reference_condition", "peak", "sum"] = "none"
    reference: str | None = Field(None, description="the reference time or condition")


class PretreatmentStep(_Record):
    """A step applied before the measured time course (starvation, pre-equilibration...)."""

    step: Annotated[str, StringConstraints(min_length=1)]
    duration_s: float | None = Field(None, ge=0, description="duration in seconds")
    details: str | None = None


class Protocol(_Record):
    """Structured protocol facts that change how a dataset enters a fit."""

    normalisation: Normalisation = Normalisation()
    calibration_group: str | None = Field(
        None, description="blot, gel, plate or run whose points share one scale and noise level"
    )
    pretreatment: tuple[PretreatmentStep, ...] = ()


class NoiseEstimate(_Record):
    """A noise level estimated for a dataset, with how it was made."""

    sd: float = Field(ge=0, description="pooled noise standard deviation, canonical units")
    method: str
    dof: int | None = Field(None, ge=0, description="degrees of freedom behind the estimate")
    scale: UncertaintyScale = UncertaintyScale.LINEAR
    parameters: dict[str, Any] = Field(default_factory=dict)
    warnings: tuple[str, ...] = ()
    made_at: dt.datetime
    made_by: str


class TrustAssessment(_Record):
    """A trust grade with its reason, who gave it and when."""

    grade: Literal["A", "B", "C", "D", "X"]
    rationale: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]
    assigned_by: str
    assigned_at: dt.datetime


class PlausibilityWarning(_Record):
    """Something at intake that looks wrong; recorded, never acted on."""

    code: str
    message: str


class PointMask(_Record):
    """Points set aside at one time (all replicates, or one): kept, but out of every fit."""

    time: float = Field(description="time of the masked points, seconds")
    replicate: str | None = Field(None, description="the one replicate masked; None: all")
    reason: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]
    masked_by: str
    masked_at: dt.datetime


class DatasetRecord(_Record):
    """Everything about one dataset version except its arrays (which the content hash names)."""

    observable: Observable
    time_unit_original: str
    conditions: dict[Identifier, ConditionValue] = Field(default_factory=dict)
    source: Source
    uncertainty: Uncertainty | None = None
    protocol: Protocol = Protocol()
    noise: NoiseEstimate | None = None
    trust: TrustAssessment | None = None
    warnings: tuple[PlausibilityWarning, ...] = ()
    retired: bool = False
    retired_reason: str | None = None
    replicate_labels: tuple[str, ...] = ()
    annotations: dict[str, Any] = Field(
        default_factory=dict, description="columns and fields kept but not interpreted"
    )
    n_points: int = Field(ge=1)
    content_hash: str
    as_given: str | None = Field(
        None,
        description="content hash of the numbers as the file gave them (file units, before "
        "conversion), from which corrections reconvert; None for versions logged before it "
        "was kept",
    )
    masks: tuple[PointMask, ...] = ()
    supersedes: str | None = Field(None, description="the dataset this one replaces")
    superseded_by: str | None = Field(None, description="the dataset that replaces this one")

    @field_validator("conditions")
    @classmethod
    def _sorted(cls, value: dict[str, ConditionValue]) -> dict[str, ConditionValue]:
        return dict(sorted(value.items()))


class DatasetVersion(_Record):
    """One immutable version of a dataset as the catalog holds it."""

    id: Identifier
    version: int = Field(ge=1)
    created_at: dt.datetime
    record: DatasetRecord
    record_hash: str

    @property
    def grade(self) -> str | None:
        """Give the current trust grade, or None if none was assigned."""
        return self.record.trust.grade if self.record.trust else None

    def summary(self) -> dict[str, Any]:
        """Give the short machine-readable form used by ``list --json``."""
        rec = self.record
        return {
            "id": self.id,
            "version": self.version,
            "observable": rec.observable.id,
            "unit": rec.observable.unit,
            "relative": rec.observable.relative,
            "lab": rec.source.lab,
            "n_points": rec.n_points,
            "grade": self.grade,
            "conditions": {k: v.value for k, v in rec.conditions.items()},
            "retired": rec.retired,
            "masks": len(rec.masks),
            "warnings": [w.code for w in rec.warnings],
            "content_hash": rec.content_hash,
        }


@dataclass(frozen=True, eq=False)
class SeriesArrays:
    """The measured arrays of a dataset, in canonical units, sorted by time (stably).

    ``sd`` may hold NaN where a point has no reported uncertainty. ``replicate`` holds integer
    codes into the record's ``replicate_labels``. ``censored`` (None when no point is) holds
    :data:`OBSERVED`, :data:`BELOW` (left-censored: the true value lies below the limit) or
    :data:`ABOVE` (right-censored) per point; a censored point's ``value`` is its limit.
    """

    time: np.ndarray
    value: np.ndarray
    sd: np.ndarray | None = None
    replicate: np.ndarray | None = None
    n: np.ndarray | None = None
    censored: np.ndarray | None = None

    def __post_init__(self) -> None:
        length = len(self.time)
        for name in ("value", "sd", "replicate", "n", "censored"):
            array = getattr(self, name)
            if array is not None and len(array) != length:
                raise ValueError(f"array '{name}' has {len(array)} entries, time has {length}")

    def __len__(self) -> int:
        return len(self.time)

    def subset(self, keep: np.ndarray) -> SeriesArrays:
        """Give the arrays of the points where ``keep`` is true (a boolean mask)."""
        return SeriesArrays(
            **{name: None if a is None else a[keep] for name, a in self.named().items()}  # type: ignore[arg-type]
        )

    def named(self) -> dict[str, np.ndarray | None]:
        """Give the arrays by name, in canonical order."""
        return {
            "time": self.time,
            "value": self.value,
            "sd": self.sd,
            "replicate": self.replicate,
            "n": self.n,
            "censored": self.censored,
        }

    def censored_mask(self) -> np.ndarray:
        """Give True for every censored point (all False when none is)."""
        if self.censored is None:
            return np.zeros(len(self.time), dtype=bool)
        return np.asarray(np.asarray(self.censored) != OBSERVED, dtype=bool)

    def observed(self) -> SeriesArrays:
        """Give the arrays of the observed points only (itself when none is censored).

        Noise estimates, consistency and plausibility checks speak of measured numbers; a
        censored point's value is a limit, not a measurement.
        """
        mask = self.censored_mask()
        if not mask.any():
            return self
        keep = ~mask
        return SeriesArrays(
            time=self.time[keep],
            value=self.value[keep],
            sd=None if self.sd is None else self.sd[keep],
            replicate=None if self.replicate is None else self.replicate[keep],
            n=None if self.n is None else self.n[keep],
        )


def in_use(record: DatasetRecord, arrays: SeriesArrays) -> SeriesArrays:
    """Give the arrays without the points a mask sets aside (the arrays themselves if none)."""
    if not record.masks:
        return arrays
    return arrays.subset(~masked_points(record, arrays))


def masked_points(record: DatasetRecord, arrays: SeriesArrays) -> np.ndarray:
    """Give, per point, whether a mask of the record sets it aside (times within 1e-9 s)."""
    out = np.zeros(len(arrays), dtype=bool)
    if not record.masks:
        return out
    labels = np.asarray(record.replicate_labels, dtype=object)
    for mask in record.masks:
        hit = np.isclose(arrays.time, mask.time, rtol=1e-12, atol=1e-9)
        if mask.replicate is not None and arrays.replicate is not None and len(labels):
            hit &= labels[arrays.replicate] == mask.replicate
        out |= hit
    return out


# censoring codes of SeriesArrays.censored, and the words exports write for them
OBSERVED, BELOW, ABOVE = 0, 1, 2
CENSORED_WORDS = {OBSERVED: "", BELOW: "below", ABOVE: "above"}

_ARRAY_DTYPES = {
    "time": "<f8", "value": "<f8", "sd": "<f8", "replicate": "<i8", "n": "<i8", "censored": "<i1",
}  # fmt: skip


def array_bytes(name: str, array: np.ndarray) -> bytes:
    """Give the canonical little-endian bytes of one array (NaN and -0.0 normalised)."""
    data = np.ascontiguousarray(array, dtype=_ARRAY_DTYPES[name])
    if data.dtype.kind == "f":
        data = data + 0.0  # folds -0.0 into 0.0
        data[np.isnan(data)] = np.nan
    return data.tobytes()


def content_hash(arrays: SeriesArrays, *, value_unit: str, time_unit: str = "second") -> str:
    """Give the sha256 hex digest over the canonical bytes of the arrays and their units.

    The censoring codes are hashed only when some point is censored, so that every series
    logged before censoring existed keeps its hash.
    """
    digest = hashlib.sha256()
    digest.update(f"curate-series-1|{value_unit}|{time_unit}|{len(arrays)}".encode())
    for name, array in arrays.named().items():
        if name == "censored" and (array is None or not np.any(array)):
            continue  # series without censoring keep the hash they always had
        if array is None:
            digest.update(f"|{name}:none".encode())
        else:
            digest.update(f"|{name}:".encode())
            digest.update(array_bytes(name, array))
    return digest.hexdigest()


def as_given_hash(arrays: SeriesArrays) -> str:
    """Give the content hash of numbers as a file gave them (no unit: a correction of the unit
    says what they are; it does not change them)."""
    return content_hash(arrays, value_unit="as given", time_unit="as given")


def jsonable(value: Any) -> Any:
    """Give plain JSON data: numpy scalars unwrapped, NaN and infinities as None."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [jsonable(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def canonical_json(value: Any) -> str:
    """Give the canonical JSON text (sorted keys, no spaces) hashed throughout the catalog."""
    return json.dumps(
        value,
        sort_keys=True,
        separators=(",", ":"),
        ensure_ascii=False,
        allow_nan=False,
        default=str,
    )


def record_hash(dataset_id: str, version: int, record_json: str) -> str:
    """Give the sha256 binding a version's id and number to its canonical record JSON."""
    return hashlib.sha256(f"{dataset_id}|{version}|{record_json}".encode()).hexdigest()
