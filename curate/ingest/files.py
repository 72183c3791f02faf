"""From a data file plus its metadata to a validated draft dataset (nothing is stored here)."""

from __future__ import annotations

import datetime as dt
import hashlib
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from curate import units
from curate.errors import InputError
from curate.ingest.censoring import (
    CensoringRules,
    censoring_codes,
    censoring_note,
    refuse_censored_cells,
    value_column,
)
from curate.ingest.headers import match_column
from curate.ingest.masks import mask_times
from curate.ingest.plausibility import check_series, typical_magnitude
from curate.ingest.reading import read_with_layout
from curate.ingest.sidecar import (
    ConditionSpec,
    Sidecar,
    deep_merge,
    load_sidecar,
    validate_sidecar,
)
from curate.ingest.tables import NAMED_SUFFIXES, Table
from curate.records import (
    ConditionValue,
    DatasetRecord,
    Observable,
    PretreatmentStep,
    Protocol,
    SeriesArrays,
    Source,
    TrustAssessment,
    Uncertainty,
    UncertaintyScale,
    UncertaintyType,
    as_given_hash,
    content_hash,
    masked_points,
)

__all__ = [
    "REFERENCE_NORMALISATIONS",
    "Draft",
    "build_draft",
    "convert_as_given",
    "draft_from_arrays",
    "find_sidecar",
    "nonnegative_dimension",
    "parse_condition",
    "resolve_pair",
    "sd_converts",
]

# annotations holding one text cell per point, kept in the same (time-sorted) order as the arrays
_PER_POINT_ANNOTATIONS = ("extra_columns", "petab_rows", "petab_row_index")
# normalisations to a reference of the same series or experiment: values in '%' or a fraction
# of such a reference are relative (a fit needs a scale factor), not absolute dimensionless
REFERENCE_NORMALISATIONS = ("peak", "reference_time", "reference_condition")
# dimensions whose quantities cannot be negative (negative values hint at a log transform)
_NONNEGATIVE = {
    "[substance] / [length] ** 3",
    "[length]",
    "[length] ** 2",
    "[substance]",
    "[mass] / [length] ** 3",
    "[mass]",
}


@dataclass(frozen=True, eq=False)
class Draft:
    """A dataset ready to be logged: its record (hashed) and arrays, not yet in a catalog."""

    record: DatasetRecord
    arrays: SeriesArrays
    requested_id: str | None
    origin: str  # the file (or "arrays") it came from, for messages
    # the content hash these data had before converted values were rounded to 15 digits
    # (None when rounding changed nothing): how a file logged earlier is still recognised
    legacy_hash: str | None = None
    # the numbers as the file gave them (time-sorted, file units), stored when they differ
    # from ``arrays``: corrections of a unit reconvert from these, never from converted values
    as_given: SeriesArrays | None = None

    @property
    def magnitude(self) -> float:
        """Give the series' median absolute value (of its observed points: a limit is no value)."""
        observed = self.arrays.observed().value
        return typical_magnitude(observed if len(observed) else self.arrays.value)


def find_sidecar(data_path: Path) -> Path | None:
    """Give the sidecar beside a data file (same name, ``.toml``), if there is one."""
    candidate = data_path.with_suffix(".toml")
    return candidate if candidate.is_file() else None


def resolve_pair(path: Path, sidecar: Path | None) -> tuple[Path, Path | None, dict[str, Any]]:
    """Give (data file, sidecar, sidecar content) for a path that is either of the two.

    A sidecar may name its data file only inside its own folder (no absolute path, no '..').
    """
    if path.suffix.lower() == ".toml":
        if sidecar is not None:
            raise InputError(f"{path}: give either a sidecar or --meta, not both")
        content = load_sidecar(path)
        name = content.get("data_file")
        if not isinstance(name, str) or not name:
            raise InputError(
                f"{path}, field 'data_file': required when the sidecar is given "
                "instead of the data file"
            )
        data = _inside(path, name)
        if not data.is_file():
            raise InputError(f"{path}, field 'data_file': the data file '{name}' does not exist")
        return data, path, content
    if sidecar is None:
        sidecar = find_sidecar(path)
    content = load_sidecar(sidecar) if sidecar is not None else {}
    name = content.get("data_file")
    if sidecar is not None and isinstance(name, str) and name:
        named = _inside(sidecar, name)
        if named.resolve() != path.resolve():
            raise InputError(f"{sidecar}, field 'data_file': names '{name}', not {path.name}")
    return path, sidecar, content


def _inside(sidecar: Path, name: str) -> Path:
    candidate = Path(name)
    if candidate.is_absolute() or ".." in candidate.parts:
        raise InputError(
            f"{sidecar}, field 'data_file': '{name}' is outside the sidecar's "
            "folder; name a file in the same folder"
        )
    resolved = (sidecar.parent / candidate).resolve()
    if not resolved.is_relative_to(sidecar.parent.resolve()):
        raise InputError(
            f"{sidecar}, field 'data_file': '{name}' leads outside the sidecar's "
            "folder (a symbolic link?)"
        )
    return sidecar.parent / candidate


def parse_condition(key: str, raw: Any, *, origin: str) -> ConditionValue:
    """Give a typed condition value from text ('25 degC', 'wt'), a number or a table."""
    if isinstance(raw, dict):
        try:
            raw = ConditionSpec.model_validate(raw)
        except Exception:
            raise InputError(
                f"{origin}, condition '{key}': expected value and unit, or text"
            ) from None
    if isinstance(raw, ConditionSpec):
        if raw.text is not None:
            return ConditionValue(value=raw.text)
        if raw.value is None:
            raise InputError(f"{origin}, condition '{key}': no value given")
        if raw.unit is None or isinstance(raw.value, bool | str):
            return parse_condition(key, raw.value, origin=origin)
        unit = units.canonical_unit(raw.unit, role=f"condition '{key}'")
        value = units.convert_scalar(float(raw.value), unit)
        if unit.canonical == "dimensionless" and unit.original in {"", "1"}:
            return ConditionValue(value=value)  # a plain number, as '5' on its own
        return ConditionValue(value=value, unit=unit.canonical, unit_original=unit.original)
    if isinstance(raw, bool):
        return ConditionValue(value=raw)
    if isinstance(raw, int | float):
        if not np.isfinite(raw):
            raise InputError(f"{origin}, condition '{key}': {raw} is not a finite number")
        return ConditionValue(value=float(raw))
    text = str(raw).strip()
    if text.lower() in {"true", "false"}:
        return ConditionValue(value=text.lower() == "true")
    parsed = units.parse_quantity(text, role=f"condition '{key}'")
    if parsed is None:
        return ConditionValue(value=text)
    value, unit = parsed
    if not np.isfinite(value):
        raise InputError(f"{origin}, condition '{key}': '{text}' is not a finite number")
    if unit.canonical == "dimensionless" and unit.original in {"", "1"}:
        return ConditionValue(value=value)
    return ConditionValue(value=value, unit=unit.canonical, unit_original=unit.original)


def _duration_seconds(raw: str | float | None, *, origin: str) -> float | None:
    if raw is None:
        return None
    if isinstance(raw, int | float):
        return float(raw)
    parsed = units.parse_quantity(raw, role="pretreatment duration")
    if parsed is None or parsed[1].dimensionality not in ("[time]", "dimensionless"):
        raise InputError(
            f"{origin}, field 'protocol.pretreatment.duration': '{raw}' is not a "
            "duration such as '2 h' or '30 min'"
        )
    return parsed[0]


def _arrays_from_table(
    table: Table, meta: Sidecar, meta_origin: str | None = None
) -> tuple[dict[str, np.ndarray | None], tuple[str, ...], dict[str, Any]]:
    columns = meta.columns
    rules = CensoringRules.from_section(
        meta.censoring, value_unit=meta.observable.unit, origin=meta_origin or str(table.path)
    )
    written: Counter[str] = Counter()

    def find(name: str) -> str | None:
        return match_column(name, table.columns)

    time_col = find(columns.time)
    if time_col is None:
        raise InputError(
            f"{table.path}: required column '{columns.time}' is missing; the columns "
            f"are {', '.join(table.columns)}; name the time column with --column time=HEADER "
            "(columns.time in the sidecar)" + table.header_hint(columns.time)
        )
    value_col = find(columns.value)
    layout = meta.layout
    if layout == "auto":
        layout = "long" if value_col is not None else "wide"
    extras: dict[str, Any] = {}
    if layout == "long":
        if value_col is None:
            raise InputError(
                f"{table.path}: required column '{columns.value}' is missing; the "
                f"columns are {', '.join(table.columns)}; name it with --column value=HEADER "
                "(columns.value in the sidecar)"
            )
        time, converted = table.times(time_col, meta.time.unit)
        if converted:
            extras["time_cells"] = converted
        read = value_column(table, value_col, rules, what="a measured value")
        value, censored, written = read.values, read.codes, read.written
        sd = n = replicate = None
        labels: tuple[str, ...] = ()
        used = {time_col, value_col}
        if (sd_col := find(columns.sd)) is not None:
            refuse_censored_cells(table, sd_col, rules, role="sd")
            sd = table.numbers(sd_col, allow_empty=True, what="an uncertainty (or an empty cell)")
            negative = np.flatnonzero(sd < 0)
            if len(negative):
                raise InputError(
                    table.locate(int(negative[0]), sd_col)
                    + f"negative uncertainty {sd[negative[0]]:g}; expected >= 0"
                )
            used.add(sd_col)
        if (n_col := find(columns.n)) is not None:
            counts = table.numbers(n_col, what="a whole number of measurements")
            bad = np.flatnonzero((counts < 1) | (counts != np.round(counts)))
            if len(bad):
                raise InputError(
                    table.locate(int(bad[0]), n_col)
                    + f"'{table.cells[n_col][bad[0]]}'; expected a whole number >= 1"
                )
            n = counts.astype(np.int64)
            used.add(n_col)
        if (rep_col := find(columns.replicate)) is not None:
            text = np.array([str(c).strip() for c in table.cells[rep_col]], dtype=object)
            empty = np.flatnonzero(text == "")
            if len(empty):
                raise InputError(
                    table.locate(int(empty[0]), rep_col) + "empty cell; expected a replicate label"
                )
            label_values, codes = np.unique(text.astype(str), return_inverse=True)
            labels = tuple(str(v) for v in label_values)
            replicate = codes.astype(np.int64)
            used.add(rep_col)
        rest = [c for c in table.columns if c not in used]
        if rest:
            extras["extra_columns"] = {c: [str(x) for x in table.cells[c]] for c in rest}
        if censored is not None:
            extras["censoring"] = censoring_note(censored, written)
        return (
            {"time": time, "value": value, "sd": sd, "replicate": replicate, "n": n,
             "censored": censored},
            labels,
            extras,
        )  # fmt: skip
    # wide: one column per replicate, empty cells are missing points
    names = meta.columns.replicates
    if names is None:
        rep_cols = [c for c in table.columns if c != time_col]
    else:
        rep_cols = []
        for name in names:
            found = find(name)
            if found is None:
                raise InputError(f"{table.path}: replicate column '{name}' is missing")
            rep_cols.append(found)
    if not rep_cols:
        raise InputError(
            f"{table.path}: no value columns besides '{time_col}'; expected a "
            f"'{columns.value}' column or one column per replicate"
        )
    time, converted = table.times(time_col, meta.time.unit)
    if converted:
        extras["time_cells"] = converted
    times, values, codes_list, censored_list = [], [], [], []
    for code, col in enumerate(rep_cols):
        read = value_column(
            table, col, rules, allow_empty=True, what="a measured value (or an empty cell)"
        )
        column = read.values
        present = np.isfinite(column)
        times.append(time[present])
        values.append(column[present])
        codes_list.append(np.full(int(present.sum()), code, dtype=np.int64))
        codes = np.zeros(len(column), np.int8) if read.codes is None else read.codes
        censored_list.append(codes[present])
        written.update(read.written)
    value = np.concatenate(values)
    if len(value) == 0:
        raise InputError(f"{table.path}: every value cell is empty")
    order_input = {
        "time": np.concatenate(times),
        "value": value,
        "sd": None,
        "replicate": np.concatenate(codes_list),
        "n": None,
        "censored": None,
    }
    all_censored = np.concatenate(censored_list)
    if all_censored.any():
        order_input["censored"] = all_censored
        extras["censoring"] = censoring_note(all_censored, written)
    extras["layout"] = "wide"
    return order_input, tuple(rep_cols), extras


def build_draft(
    data_path: str | Path,
    *,
    sidecar: str | Path | None = None,
    options: dict[str, Any] | None = None,
    actor: str,
    now: dt.datetime | None = None,
) -> Draft:
    """Give the validated draft for a data file, its sidecar and command-line ``options``.

    ``options`` has the sidecar's shape and wins over it field by field.
    """
    path = Path(data_path)
    path, sidecar_path, content = resolve_pair(path, Path(sidecar) if sidecar else None)
    merged = deep_merge(content, options or {})
    merged.pop("data_file", None)
    if path.suffix.lower() not in NAMED_SUFFIXES:
        raise InputError(
            f"{path}: unsupported file type '{path.suffix}'; expected "
            + ", ".join(sorted(NAMED_SUFFIXES))
        )
    table, merged, found = read_with_layout(path, merged, sidecar_path)
    meta = validate_sidecar(merged, origin=str(path), sidecar=sidecar_path)
    raw_arrays, labels, extras = _arrays_from_table(table, meta, str(sidecar_path or path))
    extras.update(found)
    raw = path.read_bytes()
    return _assemble(
        meta,
        raw_arrays,
        labels,
        extras,
        actor=actor,
        now=now,
        origin=str(path),
        meta_origin=str(sidecar_path or path),
        raw_file_name=path.name,
        raw_sha256=hashlib.sha256(raw).hexdigest(),
    )


def draft_from_arrays(
    time: np.ndarray,
    value: np.ndarray,
    *,
    metadata: dict[str, Any],
    sd: np.ndarray | None = None,
    replicate: np.ndarray | None = None,
    n: np.ndarray | None = None,
    censored: np.ndarray | None = None,
    replicate_labels: tuple[str, ...] = (),
    annotations: dict[str, Any] | None = None,
    actor: str,
    now: dt.datetime | None = None,
    origin: str = "arrays",
) -> Draft:
    """Give the validated draft for arrays already in memory (the API and the PEtab reader).

    ``censored``: per point '' (observed), 'below' or 'above' (or the codes 0, 1, 2); the
    value of a censored point is its limit.
    """
    meta = validate_sidecar(metadata, origin=origin, sidecar=None)
    arrays: dict[str, np.ndarray | None] = {}
    for name, given in (("time", time), ("value", value)):
        data = np.asarray(given, dtype=np.float64)
        if data.ndim != 1 or not np.isfinite(data).all():
            bad = int(np.argmax(~np.isfinite(data))) if data.ndim == 1 else 0
            raise InputError(f"{origin}, field '{name}': point {bad + 1} is not a finite number")
        arrays[name] = data
    assert arrays["time"] is not None and arrays["value"] is not None
    if len(arrays["time"]) != len(arrays["value"]):
        raise InputError(
            f"{origin}: time has {len(arrays['time'])} points but value has "
            f"{len(arrays['value'])}; the arrays must have equal lengths"
        )
    for name, array, kind in (
        ("sd", sd, np.float64),
        ("replicate", replicate, np.int64),
        ("n", n, np.int64),
    ):
        if array is None:
            arrays[name] = None
            continue
        data = np.asarray(array, dtype=kind)
        if len(data) != len(arrays["time"]):
            raise InputError(
                f"{origin}: {name} has {len(data)} points but time has "
                f"{len(arrays['time'])}; the arrays must have equal lengths"
            )
        arrays[name] = data
    if arrays["sd"] is not None:
        sd_data = arrays["sd"]
        if (sd_data < 0).any() or np.isinf(sd_data).any():
            bad = int(np.argmax((sd_data < 0) | np.isinf(sd_data)))
            raise InputError(
                f"{origin}, field 'sd': point {bad + 1} is {sd_data[bad]:g}; "
                "expected a finite uncertainty >= 0"
            )
    extras = dict(annotations or {})
    arrays["censored"] = None
    if censored is not None:
        codes = censoring_codes(censored, length=len(arrays["time"]), origin=origin)
        if codes.any():
            arrays["censored"] = codes
            extras["censoring"] = censoring_note(
                codes, Counter(arrays=int(codes.astype(bool).sum()))
            )
    return _assemble(
        meta,
        arrays,
        replicate_labels,
        extras,
        actor=actor,
        now=now,
        origin=origin,
        meta_origin=origin,
        raw_file_name=None,
        raw_sha256=None,
    )


def _assemble(
    meta: Sidecar,
    raw_arrays: dict[str, np.ndarray | None],
    labels: tuple[str, ...],
    extras: dict[str, Any],
    *,
    actor: str,
    now: dt.datetime | None,
    origin: str,
    meta_origin: str,
    raw_file_name: str | None,
    raw_sha256: str | None,
) -> Draft:
    now = now or dt.datetime.now(dt.UTC)
    time_unit = units.canonical_unit(meta.time.unit, role="time", dimension="[time]")
    value_unit = units.canonical_unit(meta.observable.unit, role="value")
    uncertainty = meta.uncertainty
    if uncertainty is None and raw_arrays.get("sd") is not None:
        uncertainty = Uncertainty()
    if (
        uncertainty is not None
        and uncertainty.type is UncertaintyType.SEM
        and raw_arrays.get("sd") is not None
        and raw_arrays.get("n") is None
        and uncertainty.n is None
    ):
        raise InputError(
            f"{meta_origin}: the uncertainty is an SEM but no n is known; add an "
            "'n' column or set uncertainty.n (or pass --sem-n)"
        )

    # stable sort by time: replicates at one time keep their file order
    time_raw = raw_arrays["time"]
    assert time_raw is not None
    order = np.argsort(time_raw, kind="stable")

    def take(name: str) -> np.ndarray | None:
        array = raw_arrays.get(name)
        return None if array is None else np.asarray(array)[order]

    given = SeriesArrays(
        time=take("time"),  # type: ignore[arg-type]
        value=take("value"),  # type: ignore[arg-type]
        sd=take("sd"),
        replicate=take("replicate"),
        n=take("n"),
        censored=take("censored"),
    )
    given_time, given_sd = given.time, given.sd
    sd_in_value_units = sd_converts(given, uncertainty)
    arrays = convert_as_given(given, value_unit, time_unit, uncertainty)
    digest = content_hash(arrays, value_unit=value_unit.canonical)
    legacy = convert_as_given(given, value_unit, time_unit, uncertainty, rounded=False)
    legacy_hash = content_hash(legacy, value_unit=value_unit.canonical)
    given_hash = as_given_hash(given)
    kept = None if given_hash == as_given_hash(arrays) else given
    extras = dict(extras)
    for per_point in _PER_POINT_ANNOTATIONS:
        if per_point in extras:
            extras[per_point] = {k: [v[i] for i in order] for k, v in extras[per_point].items()}

    conditions = {
        key: parse_condition(key, raw, origin=meta_origin) for key, raw in meta.conditions.items()
    }
    relative = _is_relative(value_unit, meta)
    observable = Observable(
        id=meta.observable.id,
        label=meta.observable.label,
        unit=value_unit.canonical,
        unit_original=value_unit.original,
        ucum=value_unit.ucum,
        relative=relative,
    )
    source = Source(
        lab=meta.source.lab,
        contact=meta.source.contact,
        method=meta.source.method,
        instrument=meta.source.instrument,
        acquired=meta.source.acquired,
        reference=meta.source.reference,
        raw_file_name=raw_file_name,
        raw_file_sha256=raw_sha256,
    )
    protocol = Protocol(
        normalisation=meta.protocol.normalisation,
        calibration_group=meta.protocol.calibration_group,
        pretreatment=tuple(
            PretreatmentStep(
                step=p.step,
                details=p.details,
                duration_s=_duration_seconds(p.duration, origin=meta_origin),
            )
            for p in meta.protocol.pretreatment
        ),
    )
    trust = None
    if meta.trust is not None:
        trust = TrustAssessment(
            grade=meta.trust.grade,
            rationale=meta.trust.rationale,
            assigned_by=actor,
            assigned_at=now,
        )
    observed = arrays.observed()  # a censored point's value is a limit, not a measurement
    keep = ~arrays.censored_mask()
    warnings = check_series(
        observed.value,
        observed.sd,
        uncertainty=uncertainty.type if uncertainty else None,
        nonnegative=nonnegative_dimension(value_unit) and not relative,
        time=given_time[keep],
        time_unit=time_unit.original,
        replicates=arrays.replicate is not None,
        sd_as_given=None if given_sd is None else given_sd[keep],
        sd_unit=value_unit.original if sd_in_value_units else "",
    )
    record = DatasetRecord(
        observable=observable,
        time_unit_original=time_unit.original,
        conditions=conditions,
        source=source,
        uncertainty=uncertainty,
        protocol=protocol,
        trust=trust,
        warnings=tuple(warnings),
        replicate_labels=labels,
        annotations=extras,
        n_points=len(arrays),
        content_hash=digest,
        as_given=digest if kept is None else given_hash,
        supersedes=meta.supersedes,
    )
    for entry in meta.masks:
        masks = mask_times(
            record, arrays, [entry.time if isinstance(entry.time, str) else f"{entry.time:g}"], replicate=entry.replicate, reason=entry.reason,
            actor=actor, now=now, origin=f"{meta_origin}, masks",
        )  # fmt: skip
        record = record.model_copy(update={"masks": masks})
    if record.masks and masked_points(record, arrays).all():
        raise InputError(
            f"{meta_origin}, masks: they would set aside every point; a dataset needs one to keep"
        )
    return Draft(
        record=record,
        arrays=arrays,
        requested_id=meta.id,
        origin=origin,
        legacy_hash=legacy_hash if legacy_hash != digest else None,
        as_given=kept,
    )


def nonnegative_dimension(unit: units.CanonicalUnit) -> bool:
    """Tell whether quantities of the unit's dimension cannot be negative."""
    return unit.dimensionality in _NONNEGATIVE


def sd_converts(given: SeriesArrays, uncertainty: Uncertainty | None) -> bool:
    """Tell whether a series' sd column is in the value unit (and converts with it)."""
    return (
        given.sd is not None
        and uncertainty is not None
        and uncertainty.scale is UncertaintyScale.LINEAR
        and uncertainty.type is not UncertaintyType.PERCENT
    )


def convert_as_given(
    given: SeriesArrays,
    value_unit: units.CanonicalUnit,
    time_unit: units.CanonicalUnit,
    uncertainty: Uncertainty | None,
    *,
    rounded: bool = True,
) -> SeriesArrays:
    """Give the numbers as given converted to canonical units (times, values and an sd in
    the value unit; percent and log-scale uncertainties need no conversion)."""
    sd = given.sd
    if sd is not None and sd_converts(given, uncertainty):
        sd = units.convert_difference(sd, value_unit, rounded=rounded)
    return SeriesArrays(
        time=units.convert(given.time, time_unit, rounded=rounded),
        value=units.convert(given.value, value_unit, rounded=rounded),
        sd=sd,
        replicate=given.replicate,
        n=given.n,
        censored=given.censored,  # a censored point's value is its limit: converted with it
    )


def _is_relative(value_unit: units.CanonicalUnit, meta: Sidecar) -> bool:
    """Tell whether the values are relative: a.u.-like units, or a dimensionless unit ('%',
    'fraction', '1') normalised to a peak, a reference time or a reference condition; an
    explicit ``relative`` in the metadata wins."""
    if meta.observable.relative is not None:
        return meta.observable.relative
    if value_unit.relative:
        return True
    return (
        value_unit.dimensionality == "dimensionless"
        and meta.protocol.normalisation.kind in REFERENCE_NORMALISATIONS
    )
