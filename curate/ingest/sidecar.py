"""The TOML sidecar that describes a data file, and merging it with command-line options.

A sidecar sits beside its data file (``run7.csv`` + ``run7.toml``) or names it with
``data_file``. Command-line options override sidecar fields. Both pass through one pydantic
model, :class:`Sidecar`, whose JSON Schema is in ``schemas/sidecar.schema.json``.
"""

from __future__ import annotations

import datetime as dt
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
)

from curate.errors import InputError
from curate.records import Identifier, Normalisation, Uncertainty, normalise_grade

__all__ = [
    "Sidecar",
    "SidecarCensoring",
    "SidecarDialect",
    "SidecarLayout",
    "deep_merge",
    "load_sidecar",
    "validate_layout",
    "validate_sidecar",
]

MAX_SIDECAR_BYTES = 1024 * 1024


class _Part(BaseModel):
    model_config = ConfigDict(extra="forbid")


class SidecarObservable(_Part):
    id: Identifier
    label: str = ""
    unit: str = Field(description="unit of the values: 'nM', 'um/min', 'a.u.', '1' ...")
    relative: bool | None = Field(
        None, description="relative units needing a scale factor; default: true for a.u.-like units"
    )


class SidecarTime(_Part):
    unit: str = Field(description="unit of the time column: 's', 'min', 'h'")


class SidecarColumns(_Part):
    time: str = "time"
    value: str = "value"
    sd: str = "sd"
    replicate: str = "replicate"
    n: str = "n"
    replicates: list[str] | None = Field(
        None, description="wide layout: the replicate columns (default: every other column)"
    )


class SidecarDialect(_Part):
    """How a delimited text file is written; what is left out is detected from the file."""

    delimiter: str | None = Field(None, description="',', ';', 'tab' or '|'")
    decimal: Literal[".", ","] | None = Field(None, description="the decimal mark")
    thousands: Literal["", ".", ",", " ", "'"] | None = Field(
        None, description="the thousands separator ('' for none)"
    )
    encoding: str | None = Field(None, description="'utf-8', 'latin-1', 'utf-16', 'cp1252' ...")


class SidecarCensoring(_Part):
    """The lab's own tokens for a value below a limit, and the limits they stand for."""

    tokens: list[Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]] = Field(
        default_factory=list, description="cells meaning 'below the limit': 'n.d.', 'LOD', 'BLQ'"
    )
    limit: float | None = Field(
        None,
        allow_inf_nan=False,
        description="the limit a token stands for (value unit unless 'unit')",
    )
    unit: str | None = Field(None, description="unit of the limits (default: the values' unit)")
    limits: dict[str, Annotated[float, Field(allow_inf_nan=False)]] = Field(
        default_factory=dict, description="one limit per column header (wide layout)"
    )


class ConditionSpec(_Part):
    value: float | bool | str | None = None
    unit: str | None = None
    text: str | None = Field(None, description="a literal text value, never read as a quantity")


ConditionInput = float | int | bool | str | ConditionSpec


class SidecarSource(_Part):
    lab: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]
    contact: str | None = None
    method: str | None = None
    instrument: str | None = None
    acquired: dt.date | None = None
    reference: str | None = None


class SidecarPretreatment(_Part):
    step: Annotated[str, StringConstraints(min_length=1)]
    duration: str | float | None = Field(None, description="'2 h', '30 min' or seconds")
    details: str | None = None


class SidecarProtocol(_Part):
    normalisation: Normalisation = Normalisation()
    calibration_group: str | None = None
    pretreatment: list[SidecarPretreatment] = Field(default_factory=list)


class SidecarTrust(_Part):
    grade: Annotated[Literal["A", "B", "C", "D", "X"], BeforeValidator(normalise_grade)]
    rationale: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]


class SidecarMask(_Part):
    """Points set aside at intake: a time (in the file's time unit, or '30 min'), a reason."""

    time: float | str
    reason: Annotated[str, StringConstraints(min_length=1, strip_whitespace=True)]
    replicate: str | None = None


class Sidecar(_Part):
    """Metadata for one data file (TOML sidecar and/or command-line options)."""

    id: Identifier | None = Field(None, description="dataset id to use (default: generated)")
    data_file: str | None = Field(None, description="data file, relative to the sidecar's folder")
    supersedes: Identifier | None = Field(
        None, description="the dataset this file replaces (retired when this one is logged)"
    )
    layout: Literal["auto", "long", "wide"] = "auto"
    sheet: str | int | None = Field(
        None,
        description="XLSX sheet: its name, or its position from 1 (default: the only one with data)",
    )
    header_row: Annotated[int, Field(ge=1)] | None = Field(
        None, description="the line (sheet row) of the header; lines above it are left out"
    )
    skip_rows: Annotated[int, Field(ge=0)] = Field(
        0, description="lines (sheet rows) at the top to leave out before the header"
    )
    footer_rows: Annotated[int, Field(ge=0)] = Field(
        0, description="lines (sheet rows) at the end to leave out: notes below the data"
    )
    end_at_blank: bool = Field(
        False, description="the table ends at its first blank line (sheet row) below the data"
    )
    dialect: SidecarDialect = SidecarDialect()
    observable: SidecarObservable
    time: SidecarTime
    columns: SidecarColumns = SidecarColumns()
    uncertainty: Uncertainty | None = None
    conditions: dict[Identifier, ConditionInput] = Field(default_factory=dict)
    source: SidecarSource
    protocol: SidecarProtocol = SidecarProtocol()
    trust: SidecarTrust | None = None
    masks: list[SidecarMask] = Field(
        default_factory=list, description="points to set aside from the start, each with a reason"
    )
    censoring: SidecarCensoring | None = None


class SidecarLayout(BaseModel):
    """The sidecar fields that say where the table is and how it is written: read before the
    table, so that units stated in its headers can fill the unit fields."""

    model_config = ConfigDict(extra="ignore")
    sheet: str | int | None = None
    header_row: Annotated[int, Field(ge=1)] | None = None
    skip_rows: Annotated[int, Field(ge=0)] = 0
    footer_rows: Annotated[int, Field(ge=0)] = 0
    end_at_blank: bool = False
    dialect: SidecarDialect = SidecarDialect()
    columns: SidecarColumns = SidecarColumns()
    layout: Literal["auto", "long", "wide"] = "auto"


def validate_layout(content: dict[str, Any], *, origin: str, sidecar: Path | None) -> SidecarLayout:
    """Give the layout fields validated; InputError names the first offending field."""
    try:
        return SidecarLayout.model_validate(content)
    except ValidationError as err:
        _refuse(err, origin=origin, sidecar=sidecar)
        raise  # not reached: _refuse raises


# which command-line option fills a required field, for the error hint
_OPTION_FOR = {
    "observable": "--observable and --unit",
    "observable.id": "--observable",
    "observable.unit": "--unit",
    "time": "--time-unit",
    "time.unit": "--time-unit",
    "source": "--lab",
    "source.lab": "--lab",
}


def load_sidecar(path: Path) -> dict[str, Any]:
    """Give the raw TOML content of a sidecar file."""
    if not path.is_file():
        raise InputError(f"{path}: no such sidecar file")
    if path.stat().st_size > MAX_SIDECAR_BYTES:
        raise InputError(f"{path}: a sidecar larger than {MAX_SIDECAR_BYTES} bytes is refused")
    try:
        return tomllib.loads(path.read_bytes().decode("utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text; expected a TOML sidecar") from None
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{path}: not valid TOML ({err})") from None


def deep_merge(base: dict[str, Any], override: dict[str, Any]) -> dict[str, Any]:
    """Give ``base`` with ``override`` laid over it, tables merged key by key."""
    merged = dict(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = deep_merge(merged[key], value)
        else:
            merged[key] = value
    return merged


def validate_sidecar(content: dict[str, Any], *, origin: str, sidecar: Path | None) -> Sidecar:
    """Give the validated metadata; InputError names the first offending field."""
    try:
        return Sidecar.model_validate(content)
    except ValidationError as err:
        _refuse(err, origin=origin, sidecar=sidecar)
        raise  # not reached: _refuse raises


def _refuse(err: ValidationError, *, origin: str, sidecar: Path | None) -> None:
    """Raise the InputError naming the first field pydantic refused."""
    if True:
        first = err.errors()[0]
        if first["loc"] and first["loc"][-1] == "[key]":
            key = first["loc"][-2]
            place = f"{sidecar}, field '{first['loc'][0]}'" if sidecar else origin
            raise InputError(
                f"{place}: key '{key}' is not a valid identifier; use letters, digits "
                "and '_', not starting with a digit"
            ) from None
        loc = ".".join(str(part) for part in first["loc"])
        message = first["msg"]
        if first["type"] == "missing":
            hint = _OPTION_FOR.get(loc)
            if sidecar is None:
                raise InputError(
                    f"{origin}: field '{loc}' is required; pass {hint or 'it'} or write it in a "
                    "TOML sidecar beside the data file"
                ) from None
            raise InputError(
                f"{sidecar}, field '{loc}': required but missing"
                + (f" (or pass {hint})" if hint else "")
            ) from None
        where_text = f"{sidecar}, field '{loc}'" if sidecar else f"{origin}, field '{loc}'"
        if first["type"] == "extra_forbidden":
            raise InputError(
                f"{where_text}: unknown field; see schemas/sidecar.schema.json"
            ) from None
        raise InputError(f"{where_text}: {message}") from None
