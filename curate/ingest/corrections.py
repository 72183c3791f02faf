"""Corrections of how a dataset's numbers are read: unit, time unit, uncertainty, relative
flag, normalisation. Each gives the record and arrays of a new version (nothing is stored here).

A correction never edits converted values: it starts again from the numbers as the file gave
them (kept beside the converted arrays since they were first logged) and converts those with the
corrected reading, exactly as intake would have converted the file had it been told so. For
versions logged before the numbers as given were kept, they are recovered by converting the
stored values back to the unit they were logged in and rounding to 15 significant digits, which
gives the typed numbers back whenever they had 15 digits or fewer (every lab file we know).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from curate import units
from curate.errors import InputError, UnitError
from curate.ingest.files import (
    REFERENCE_NORMALISATIONS,
    convert_as_given,
    nonnegative_dimension,
    sd_converts,
)
from curate.ingest.plausibility import check_series
from curate.records import (
    DatasetRecord,
    Normalisation,
    SeriesArrays,
    Uncertainty,
    UncertaintyType,
    as_given_hash,
    content_hash,
)

__all__ = [
    "SERIES_WARNINGS",
    "Corrected",
    "Correction",
    "correct",
    "numbers_as_given",
]

# warnings check_series gives (recomputed by a correction); the rest are kept or recomputed
# against the other datasets by the catalog
SERIES_WARNINGS = frozenset({
    "negative_values", "zero_sd", "round_uncertainty", "percent_as_absolute",
    "negative_times", "repeated_times", "unit_slip",
})  # fmt: skip


@dataclass(frozen=True)
class Correction:
    """What a correction changes (None: keep as it is)."""

    unit: str | None = None
    time_unit: str | None = None
    uncertainty_type: str | None = None
    sem_n: int | None = None
    ci_level: float | None = None
    relative: bool | None = None
    normalisation: str | None = None  # KIND or KIND:REFERENCE

    def given(self) -> bool:
        """Tell whether anything is to be corrected."""
        return bool(self.words())

    def words(self) -> dict[str, Any]:
        """Give what was asked for, for the event's payload."""
        return {k: v for k, v in vars(self).items() if v is not None}


@dataclass(frozen=True)
class Corrected:
    """A corrected reading: the record fields to replace and the new arrays (None: unchanged)."""

    update: dict[str, Any]
    arrays: SeriesArrays | None
    as_given: SeriesArrays | None  # to store, when the numbers as given were recovered now
    recovered: bool  # the numbers as given were recovered from the stored values


def _reverse(unit: units.CanonicalUnit) -> units.CanonicalUnit:
    return units.CanonicalUnit(
        original=unit.canonical,
        canonical=unit.original,
        dimensionality=unit.dimensionality,
        relative=unit.relative,
    )


def numbers_as_given(
    record: DatasetRecord, stored: SeriesArrays, kept: SeriesArrays | None
) -> tuple[SeriesArrays, bool]:
    """Give the numbers as the file gave them, and whether they had to be recovered from the
    stored (converted) values because the version predates keeping them."""
    if kept is not None:
        return kept, False
    if record.as_given == record.content_hash:
        return stored, False  # no conversion was needed: the stored numbers are the given ones
    value_unit = units.canonical_unit(record.observable.unit_original, role="value")
    time_unit = units.canonical_unit(record.time_unit_original, role="time", dimension="[time]")
    sd = stored.sd
    if sd is not None and sd_converts(stored, record.uncertainty):
        sd = units.convert_difference(sd, _reverse(value_unit))
    given = SeriesArrays(
        time=units.convert(stored.time, _reverse(time_unit)),
        value=units.convert(stored.value, _reverse(value_unit)),
        sd=sd,
        replicate=stored.replicate,
        n=stored.n,
        censored=stored.censored,
    )
    return given, True


def _normalisation(text: str, *, origin: str) -> Normalisation:
    kind, _, reference = text.partition(":")
    kinds = ("none", "reference_time", "reference_condition", "peak", "sum")
    if kind.strip() not in kinds:
        raise InputError(
            f"{origin}: --normalisation '{text}' is not one of {', '.join(kinds)} "
            "(optionally KIND:REFERENCE, e.g. reference_time:0 min)"
        )
    return Normalisation(kind=kind.strip(), reference=reference.strip() or None)


def _uncertainty(
    record: DatasetRecord, given: SeriesArrays, correction: Correction, *, origin: str
) -> Uncertainty | None:
    current = record.uncertainty
    if (
        correction.uncertainty_type is None
        and correction.sem_n is None
        and correction.ci_level is None
    ):
        return current
    if given.sd is None:
        raise InputError(
            f"{origin}: the dataset has no uncertainty column; there is no uncertainty type to correct"
        )
    base = current or Uncertainty()
    kind = correction.uncertainty_type or base.type.value
    try:
        kind = UncertaintyType(kind.strip().lower()).value
    except ValueError:
        raise InputError(
            f"{origin}: --uncertainty-type '{correction.uncertainty_type}' is not one of "
            + ", ".join(t.value for t in UncertaintyType)
        ) from None
    fields: dict[str, Any] = {**base.model_dump(), "type": kind}
    if correction.sem_n is not None:
        fields["n"] = correction.sem_n
    if correction.ci_level is not None:
        fields["level"] = correction.ci_level
    if kind != "ci":
        fields["level"] = None
    if kind == "sem" and fields.get("n") is None and given.n is None:
        raise InputError(
            f"{origin}: an SEM needs the n behind it; the dataset has no n column, so give --sem-n"
        )
    if kind == "ci" and fields.get("level") is None:
        raise InputError(f"{origin}: a confidence interval needs its level; give --ci-level 0.95")
    try:
        return Uncertainty.model_validate(fields)
    except ValueError as err:
        raise InputError(f"{origin}: {str(err).splitlines()[-1].strip()}") from None


def correct(
    record: DatasetRecord,
    stored: SeriesArrays,
    kept: SeriesArrays | None,
    correction: Correction,
    *,
    origin: str,
) -> Corrected:
    """Give the new version's record fields and arrays for a correction of how the numbers read."""
    if correction.time_unit is not None and record.annotations.get("time_cells"):
        raise InputError(
            f"{origin}: its times were read from clock times or durations "
            f"({record.annotations['time_cells']}), which carry their own unit; --time-unit "
            "cannot change them (log the file again if its times were misread)"
        )
    given, recovered = numbers_as_given(record, stored, kept)
    try:
        value_unit = units.canonical_unit(correction.unit or record.observable.unit_original)
        time_unit = units.canonical_unit(
            correction.time_unit or record.time_unit_original, role="time", dimension="[time]"
        )
    except UnitError as err:
        raise InputError(f"{origin}: {err}") from None
    uncertainty = _uncertainty(record, given, correction, origin=origin)
    protocol = record.protocol
    if correction.normalisation is not None:
        protocol = protocol.model_copy(
            update={"normalisation": _normalisation(correction.normalisation, origin=origin)}
        )
    if correction.relative is not None:
        relative = correction.relative
    elif correction.unit is not None or correction.normalisation is not None:
        relative = value_unit.relative or (
            value_unit.dimensionality == "dimensionless"
            and protocol.normalisation.kind in REFERENCE_NORMALISATIONS
        )
    else:
        relative = record.observable.relative
    arrays = convert_as_given(given, value_unit, time_unit, uncertainty)
    digest = content_hash(arrays, value_unit=value_unit.canonical)
    observable = record.observable.model_copy(
        update={
            "unit": value_unit.canonical,
            "unit_original": value_unit.original,
            "ucum": value_unit.ucum,
            "relative": relative,
        }
    )
    warnings = [w for w in record.warnings if w.code not in SERIES_WARNINGS]
    sd_unit = value_unit.original if sd_converts(given, uncertainty) else ""
    keep = ~arrays.censored_mask()  # a censored point's value is a limit, not a measurement
    observed = arrays.observed()
    warnings[:0] = check_series(
        observed.value,
        observed.sd,
        uncertainty=uncertainty.type if uncertainty else None,
        nonnegative=nonnegative_dimension(value_unit) and not relative,
        time=given.time[keep],
        time_unit=time_unit.original,
        replicates=arrays.replicate is not None,
        sd_as_given=None if given.sd is None else given.sd[keep],
        sd_unit=sd_unit,
    )
    update: dict[str, Any] = {
        "observable": observable,
        "time_unit_original": time_unit.original,
        "uncertainty": uncertainty,
        "protocol": protocol,
        "warnings": tuple(warnings),
        "content_hash": digest,
    }
    given_hash = as_given_hash(given)
    keep_given = given_hash != as_given_hash(arrays)
    update["as_given"] = given_hash if keep_given else digest
    return Corrected(
        update=update,
        arrays=None if digest == record.content_hash else arrays,
        as_given=given if keep_given else None,
        recovered=recovered,
    )
