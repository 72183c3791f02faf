"""Units: one pint registry, one canonical unit per dimension, UCUM codes for export.

Every unit string is parsed here at intake. Values are stored in the canonical unit of their
dimension (seconds, micrometres, nanomolar, ...) and the string the user typed is kept beside
them. Arbitrary ("a.u.", fold change, normalised) units get a dimension of their own so that
they can never convert silently into anything physical: pint would otherwise read "a.u." as
atomic-mass-unit times year and "au" as the astronomical unit.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from curate.errors import UnitError

if TYPE_CHECKING:
    from curate.records import ConditionValue

__all__ = [
    "CanonicalUnit",
    "Quantity",
    "canonical_unit",
    "condition_text",
    "convert",
    "convert_difference",
    "convert_scalar",
    "dimension_of",
    "is_relative_unit",
    "parse_quantity",
    "registry",
    "round_significant",
    "scale_factor",
    "short_unit",
    "time_unit_spelling",
    "to_unit",
    "ucum_code",
]

# Spellings labs use for arbitrary or relative units. Matched case-sensitively after stripping,
# except where a lower-case form is listed too: "AU" (absorbance) and "au" (astronomical unit)
# must never reach pint.
_RELATIVE_ALIASES = {
    "a.u.",
    "a. u.",
    "au",
    "AU",
    "A.U.",
    "arb",
    "arb.",
    "arb. units",
    "arbitrary",
    "arbitrary units",
    "arbitrary unit",
    "arbitrary_unit",
    "RFU",
    "RLU",
    "fold",
    "fold change",
    "fold_change",
    "normalised",
    "normalized",
    "relative",
    "rel",
    "rel.",
}
_DIMENSIONLESS_ALIASES = {"", "1", "-", "dimensionless", "none", "unitless", "fraction"}

# Canonical unit per dimensionality (pint's dimensionality string). A dimension not listed
# keeps SI base units.
_CANONICAL_BY_DIMENSION = {
    "[time]": "second",
    "1 / [time]": "1 / second",
    "[length]": "micrometer",
    "[length] ** 2": "micrometer ** 2",
    "[length] ** 3": "micrometer ** 3",
    "[length] / [time]": "micrometer / second",
    "[length] ** 2 / [time]": "micrometer ** 2 / second",
    "[substance] / [length] ** 3": "nanomolar",
    "[substance]": "nanomole",
    "[mass] / [length] ** 3": "nanogram / milliliter",
    "[mass] * [length] / [time] ** 2": "piconewton",
    "[temperature]": "degree_Celsius",
    "[mass] * [length] ** 2 / [time] ** 3 / [current]": "millivolt",
    "[mass]": "kilodalton",
    "dimensionless": "dimensionless",
    "[arbitrary]": "arbitrary_unit",
    "[substance] / [length] ** 3 / [time]": "nanomolar / second",
}

# UCUM codes (case-sensitive form) for the canonical units above. Looked up by canonical unit,
# never by the string a user typed ("nM" and "nmol/L" are different pint names).
_UCUM = {
    "second": "s",
    "1 / second": "/s",
    "micrometer": "um",
    "micrometer ** 2": "um2",
    "micrometer ** 3": "um3",
    "micrometer / second": "um/s",
    "micrometer ** 2 / second": "um2/s",
    "nanomolar": "nmol/L",
    "nanomole": "nmol",
    "nanogram / milliliter": "ng/mL",
    "piconewton": "pN",
    "degree_Celsius": "Cel",
    "millivolt": "mV",
    "kilodalton": "ku",
    "dimensionless": "1",
    "arbitrary_unit": "[arb'U]",
    "nanomolar / second": "nmol/L/s",
}

_NUMBER_THEN_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


@functools.cache
def registry() -> Any:
    """Give the process-wide pint registry (built once: quantities of two registries never mix)."""
    import pint

    ureg: Any = pint.UnitRegistry()
    ureg.define("arbitrary_unit = [arbitrary] = arb_unit")
    return ureg


def Quantity(value: Any, unit: str) -> Any:
    """Give a pint Quantity of the shared registry."""
    return registry().Quantity(value, _parse(unit, role="value"))


@dataclass(frozen=True)
class CanonicalUnit:
    """A parsed unit: what the user wrote, its canonical storage unit and the factor between."""

    original: str
    canonical: str
    dimensionality: str
    relative: bool

    @property
    def ucum(self) -> str | None:
        """Give the UCUM code of the canonical unit, or None where we keep no code for it."""
        return _UCUM.get(self.canonical)


def is_relative_unit(text: str) -> bool:
    """Tell whether a unit string names arbitrary or relative units."""
    return text.strip() in _RELATIVE_ALIASES or text.strip().lower() in _RELATIVE_ALIASES


def _parse(text: str, *, role: str) -> Any:
    try:
        return _parse_cached(text)
    except UnitError as err:
        message = str(err).replace("unknown value unit", f"unknown {role} unit")
        if "time" in role:
            message = (
                message.split(": expected")[0]
                + ": expected a unit of time such as 's', 'min', 'h' or 'day'"
            )
        raise UnitError(message) from None


@functools.lru_cache(maxsize=4096)
def _parse_cached(text: str) -> Any:
    """Give the pint unit for a string (cached: intake parses the same few units again and again)."""
    import pint

    role = "value"
    stripped = text.strip()
    if is_relative_unit(stripped):
        stripped = "arbitrary_unit"
    elif stripped.lower() in _DIMENSIONLESS_ALIASES:
        stripped = "dimensionless"
    try:
        return registry().parse_units(stripped)
    except (
        pint.UndefinedUnitError,
        pint.errors.DefinitionSyntaxError,
        ValueError,
        TypeError,
        AttributeError,
        SyntaxError,
        AssertionError,
    ):
        examples = (
            "'s', 'min', 'h' or 'day'"
            if "time" in role
            else "'s', 'min', 'um', 'nM', 'um/min', 'a.u.' or '1'"
        )
        raise UnitError(
            f"unknown {role} unit '{text}': expected a unit such as {examples}"
        ) from None


@functools.lru_cache(maxsize=4096)
def _conversion(original: str, canonical: str) -> tuple[float, float]:
    """Give (factor, offset) with canonical = factor * original + offset (every unit here is affine)."""
    source = _parse_cached(original)
    target = _parse_cached(canonical)
    if source == target:
        return 1.0, 0.0
    ureg = registry()
    zero = float(ureg.Quantity(0.0, source).m_as(target))
    one = float(ureg.Quantity(1.0, source).m_as(target))
    return one - zero, zero


# time units as headers write them in any case ('Min', 'MIN', 'Sec', 'HRS'): in a time
# column 'Min' is minutes, never the prefixed unit pint would read ('M' + 'in')
_TIME_WORDS = {"s", "sec", "secs", "second", "seconds", "ms", "msec", "min", "mins", "minute",
               "minutes", "h", "hr", "hrs", "hour", "hours", "d", "day", "days"}  # fmt: skip


def time_unit_spelling(text: str) -> str:
    """Give a time unit's usual spelling: 'Min' and 'MIN' as 'min', 'Hrs' as 'hrs'."""
    stripped = text.strip()
    return stripped.lower() if stripped.lower() in _TIME_WORDS else stripped


@functools.lru_cache(maxsize=4096)
def canonical_unit(
    text: str, *, role: str = "value", dimension: str | None = None
) -> CanonicalUnit:
    """Give the canonical storage unit for a unit string; check its dimension if one is named.

    ``dimension`` is a pint dimensionality such as ``"[time]"``.
    """
    if dimension == "[time]":
        text = time_unit_spelling(text)
    unit = _parse(text, role=role)
    ureg = registry()
    dims = str(ureg.get_dimensionality(unit))
    if dimension is not None and dims != dimension:
        raise UnitError(
            f"{role} unit '{text}' has dimension {dims}: expected {dimension}"
            + (" (a time unit such as 's', 'min' or 'h')" if dimension == "[time]" else "")
        )
    canonical = _CANONICAL_BY_DIMENSION.get(dims)
    if canonical is None:
        canonical = str(ureg.Quantity(1.0, unit).to_base_units().units)
    return CanonicalUnit(
        original=text.strip(),
        canonical=canonical,
        dimensionality=dims,
        relative=dims == "[arbitrary]",
    )


# Converted values keep 15 significant digits, what a float64 carries exactly: 0.41 min is
# then 24.6 s, not the product's 24.599999999999998. Exact powers of ten below, so that
# the rounding is the same on every machine (no log10, whose last bit varies by platform).
SIGNIFICANT_DIGITS = 15
_EXACT_POWERS = np.array([10.0**n for n in range(23)])  # 10^0 .. 10^22 are exact doubles
_DECADES = np.array([float(f"1e{n}") for n in range(-7, 23)])  # the decade edges we round in


def round_significant(values: np.ndarray) -> np.ndarray:
    """Give ``values`` rounded to 15 significant digits, as ``float(f"{x:.15g}")`` would.

    Vectorised: x * 10^k is rounded to an integer r and r / 10^k (both exact) is the nearest
    double to the decimal, which is what parsing the 15-digit text gives. Where that shortcut
    could round differently (a product within 0.1 of a half, or |x| outside 1e-7 .. 1e22), the
    value goes through the text form itself.
    """
    data = np.asarray(values, dtype=np.float64)
    magnitude = np.abs(data)
    # the decimal exponent e with 10^e <= |x| < 10^(e+1), by comparisons (an e off by one is
    # caught below: the rounded integer would not have 15 digits)
    exponent = np.searchsorted(_DECADES, magnitude, side="right") - 8
    usable = (magnitude >= 1e-7) & (magnitude < 1e22)  # False for NaN and infinities
    shift = (SIGNIFICANT_DIGITS - 1) - exponent  # x * 10^shift has 15 digits before the point
    up = shift >= 0
    power = _EXACT_POWERS[np.clip(np.abs(shift), 0, 22)]
    with np.errstate(invalid="ignore", over="ignore"):
        scaled = np.where(up, data * power, data / power)
        whole = np.rint(scaled)
        rounded = np.where(up, whole / power, whole * power)
        # |scaled| < 2^50, so it is off by at most 1/16 from the exact product: a margin of 0.1
        # from a half decides the rounding as the exact product would
        safe = (
            usable
            & (np.abs(scaled - np.floor(scaled) - 0.5) > 0.1)
            & (np.abs(whole) >= 1e14)
            & (np.abs(whole) < 1e15)
        )
    out = np.where(safe, rounded, data)
    for index in np.flatnonzero(~safe & np.isfinite(data) & (data != 0)):
        out[index] = float(f"{data[index]:.{SIGNIFICANT_DIGITS}g}")
    return out + 0.0  # -0.0 becomes 0.0, as the content hash counts it


def convert(values: np.ndarray, unit: CanonicalUnit, *, rounded: bool = True) -> np.ndarray:
    """Give ``values`` (in ``unit.original``) converted to ``unit.canonical`` as float64.

    The factor is worked out once by pint and applied with numpy; offset units (degC, degF)
    go through pint itself so that their offsets stay exact. A converted value is rounded to
    15 significant digits (see :func:`round_significant`) unless ``rounded`` is False (the
    form stored before that rule, kept to recognise data logged earlier); values already in
    the canonical unit are kept exactly as given.
    """
    data = np.asarray(values, dtype=np.float64)
    factor, offset = _conversion(unit.original, unit.canonical)
    if (factor, offset) == (1.0, 0.0):
        return data.copy()
    if offset == 0.0:
        converted = data * factor
    else:
        q = registry().Quantity(data, _parse_cached(unit.original))
        converted = np.asarray(q.m_as(_parse_cached(unit.canonical)), dtype=np.float64)
    return round_significant(converted) if rounded else converted


def convert_difference(
    values: np.ndarray, unit: CanonicalUnit, *, rounded: bool = True
) -> np.ndarray:
    """Give differences such as an sd (in ``unit.original``) in ``unit.canonical``.

    Offset units convert differences by their scale alone (an sd of 1 K is 1 °C); rounded as
    :func:`convert` rounds.
    """
    data = np.asarray(values, dtype=np.float64)
    factor = scale_factor(unit)
    if factor == 1.0:
        return data.copy()
    converted = data * factor
    return round_significant(converted) if rounded else converted


def scale_factor(unit: CanonicalUnit) -> float:
    """Give the multiplier from the original to the canonical unit (for differences such as sd).

    Offset units (degC, degF) convert differences by their scale alone.
    """
    # two points, so that offset units (K -> degC) give the size of a degree, not a temperature
    return _conversion(unit.original, unit.canonical)[0]


def dimension_of(canonical: str) -> str:
    """Give the pint dimensionality of a canonical unit name, e.g. '[time]'."""
    return str(registry().get_dimensionality(_parse_cached(canonical)))


def to_unit(value: float, unit: str, target: str) -> float:
    """Give ``value`` (in ``unit``) expressed in ``target``, e.g. 10000 nanomolar -> 10 uM."""
    source, goal = _parse(unit, role="value"), _parse(target, role="value")
    return float(registry().Quantity(value, source).m_as(goal))


def ucum_code(canonical: str) -> str | None:
    """Give the UCUM code of a canonical unit name, or None."""
    return _UCUM.get(canonical)


def parse_quantity(text: str, *, role: str) -> tuple[float, CanonicalUnit] | None:
    """Give (canonical value, unit) for text like ``'25 degC'`` or ``'10uM'``; None if no number.

    A bare number gives a dimensionless quantity.
    """
    match = _NUMBER_THEN_UNIT.match(text)
    if match is None:
        return None
    number, unit_text = match.groups()
    try:
        # a word that merely starts with digits ("3T3 fibroblasts") is not a quantity
        unit = canonical_unit(unit_text or "1", role=role)
    except UnitError:
        return None
    return convert_scalar(float(number), unit), unit


def convert_scalar(value: float, unit: CanonicalUnit) -> float:
    """Give one value in canonical units, rounded to 15 significant digits.

    A condition such as 10 uM then reads 10000 nM, not pint's 9999.999999999998; 15 digits is
    what a float64 carries exactly, so nothing measurable is lost.
    """
    converted = float(convert(np.array([value]), unit)[0])
    return float(f"{converted:.15g}")


# The symbol of each canonical unit: what exports write in their unit column and what a
# person reads. Each one parses back to its canonical unit (tests/test_units.py checks it).
_UNIT_SHORT = {
    "second": "s",
    "1 / second": "1/s",
    "micrometer": "µm",
    "micrometer ** 2": "µm^2",
    "micrometer ** 3": "µm^3",
    "micrometer / second": "µm/s",
    "micrometer ** 2 / second": "µm^2/s",
    "nanomolar": "nM",
    "nanomole": "nmol",
    "nanogram / milliliter": "ng/mL",
    "piconewton": "pN",
    "degree_Celsius": "°C",
    "millivolt": "mV",
    "kilodalton": "kDa",
    "dimensionless": "1",
    "arbitrary_unit": "a.u.",
    "nanomolar / second": "nM/s",
}


def short_unit(unit: str | None) -> str:
    """Give the symbol of a canonical unit ('nanomolar' -> 'nM'); pint's own symbol otherwise."""
    if unit is None:
        return ""
    known = _UNIT_SHORT.get(unit)
    if known is not None:
        return known
    try:
        return format(_parse_cached(unit), "~P") or unit
    except UnitError:
        return unit


def condition_text(value: ConditionValue) -> str:
    """Give '25 °C' or 'wt' for one condition value."""
    if isinstance(value.value, float):
        if value.unit and value.unit_original:
            # shown as the lab wrote it (10 uM), stored canonically (10000 nM)
            number = to_unit(value.value, value.unit, value.unit_original)
            return f"{number:g} {value.unit_original}"
        number_text = f"{value.value:g}"
        return f"{number_text} {short_unit(value.unit)}".strip() if value.unit else number_text
    return str(value.value)
