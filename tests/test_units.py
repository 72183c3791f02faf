"""Units: conversions checked against handbook factors, UCUM codes against a UCUM parser."""

from __future__ import annotations

import math

import numpy as np
import pytest

from curate import units
from curate.errors import UnitError

# Exact factors from the SI Brochure (BIPM, 9th edition, 2019): SI prefixes (Table 7) and the
# non-SI units accepted for use with the SI (Table 8: min = 60 s, h = 3600 s, d = 86400 s;
# t/°C = T/K - 273.15). The inch is exactly 25.4 mm (international yard and pound agreement,
# 1959). 1 M = 1 mol/L (IUPAC Green Book, 3rd edition, section 2.10).
HANDBOOK = [
    ("min", 1.0, "second", 60.0),
    ("h", 1.0, "second", 3600.0),
    ("d", 1.0, "second", 86400.0),
    ("ms", 250.0, "second", 0.25),
    ("uM", 1.0, "nanomolar", 1000.0),
    ("µM", 2.5, "nanomolar", 2500.0),
    ("mM", 1.0, "nanomolar", 1e6),
    ("nmol/L", 7.0, "nanomolar", 7.0),
    ("mm", 1.0, "micrometer", 1000.0),
    ("nm", 500.0, "micrometer", 0.5),
    ("inch", 1.0, "micrometer", 25400.0),
    ("um/min", 60.0, "micrometer / second", 1.0),
    ("nN", 1.0, "piconewton", 1000.0),
    ("ug/L", 1.0, "nanogram / milliliter", 1.0),
    ("K", 298.15, "degree_Celsius", 25.0),
    ("degF", 212.0, "degree_Celsius", 100.0),  # water boils at 212 °F = 100 °C (definition)
    ("%", 50.0, "dimensionless", 0.5),
]


@pytest.mark.parametrize(("given", "value", "canonical", "expected"), HANDBOOK)
def test_conversion_matches_handbook_factor(given, value, canonical, expected):
    unit = units.canonical_unit(given)
    assert unit.canonical == canonical
    converted = units.convert(np.array([value]), unit)[0]
    assert math.isclose(converted, expected, rel_tol=1e-12)


def test_difference_scale_of_offset_units_is_the_degree_size():
    # an sd of 1 K is an sd of 1 °C; an sd of 1.8 °F is 1 °C (SI Brochure, Table 8)
    assert units.scale_factor(units.canonical_unit("K")) == pytest.approx(1.0)
    assert units.scale_factor(units.canonical_unit("degF")) == pytest.approx(1 / 1.8)


@pytest.mark.parametrize("text", ["a.u.", "au", "AU", "RFU", "fold change", "normalised", "arb"])
def test_arbitrary_units_have_their_own_dimension(text):
    unit = units.canonical_unit(text)
    assert unit.relative
    assert unit.canonical == "arbitrary_unit"
    assert unit.dimensionality == "[arbitrary]"


@pytest.mark.parametrize("text", ["1", "dimensionless", "", "-"])
def test_dimensionless_spellings(text):
    unit = units.canonical_unit(text)
    assert unit.canonical == "dimensionless"
    assert not unit.relative


def test_unknown_unit_is_a_clear_error():
    with pytest.raises(UnitError, match="unknown value unit 'furlongs_per_blink'"):
        units.canonical_unit("furlongs_per_blink")


def test_time_unit_of_wrong_dimension_is_refused():
    with pytest.raises(UnitError, match=r"has dimension \[length\]: expected \[time\]"):
        units.canonical_unit("um", role="time", dimension="[time]")


def test_quantity_text_parsing():
    value, unit = units.parse_quantity("25 degC", role="temperature")
    assert value == 25.0 and unit.canonical == "degree_Celsius"
    value, unit = units.parse_quantity("10uM", role="dose")
    assert value == pytest.approx(10_000.0) and unit.canonical == "nanomolar"
    assert units.parse_quantity("wild type", role="genotype") is None


def test_ucum_codes_are_valid_ucum():
    # checked with ucumvert's UCUM grammar (UCUM essence 2.2), an independent reference parser
    ucumvert = pytest.importorskip("ucumvert.parser")
    for canonical, code in units._UCUM.items():
        ucumvert.parse_ucum(code)  # raises on an invalid code
        assert units.ucum_code(canonical) == code


def test_ucum_codes_convert_like_pint():
    # the UCUM code and our canonical pint unit name the same magnitude (ucumvert's registry)
    ucumvert = pytest.importorskip("ucumvert")
    registry = ucumvert.PintUcumRegistry()
    for canonical, code in units._UCUM.items():
        if canonical in ("arbitrary_unit", "degree_Celsius", "dimensionless"):
            continue  # arbitrary and offset units do not convert 1:1 by definition
        quantity = registry.from_ucum(code)
        assert math.isclose(
            quantity.to(registry.Quantity(1, canonical).units).m, 1.0, rel_tol=1e-9
        ), (canonical, code)


# Values a lab writes with a few digits, converted by exact factors (SI Brochure, Table 8:
# 1 min = 60 s, 1 h = 3600 s; 1 uM = 1000 nM): the plain products carry binary noise
# (0.41 * 60 = 24.599999999999998 in float64), the stored values must be the decimals.
EXACT_DECIMALS = [
    ("min", 0.41, 24.6),
    ("min", 0.06, 3.6),
    ("h", 1.1, 3960.0),
    ("h", 0.07, 252.0),
    ("uM", 2.01, 2010.0),
]


@pytest.mark.parametrize(("given", "value", "expected"), EXACT_DECIMALS)
def test_converted_values_are_the_decimals_the_lab_meant(given, value, expected):
    unit = units.canonical_unit(given)
    raw = value * units.scale_factor(unit)
    assert raw != expected  # the plain product is off in its last bits
    assert units.convert(np.array([value]), unit)[0] == expected
    assert units.convert(np.array([value]), unit, rounded=False)[0] == raw
    assert units.convert_difference(np.array([value]), unit)[0] == expected


def test_rounding_equals_the_fifteen_digit_text_form():
    # the vectorised rounding gives exactly what Python's own "%.15g" formatting gives
    # (correctly rounded decimal conversion), over measured-like and full-precision values
    rng = np.random.default_rng(7)
    values = np.concatenate([
        rng.uniform(0, 100, 20_000).round(3) * 60,
        rng.uniform(0, 500, 20_000).round(2) / 60,
        np.exp(rng.uniform(-50, 60, 20_000)) * rng.choice([-1.0, 1.0], 20_000),
        [0.0, 5e-324, 1e-7, 9.999999999999999e-8, 0.1, 1e22, 999999999999999.9, 1.7e308],
    ])  # fmt: skip
    expected = np.array([float(f"{x:.15g}") for x in values])
    np.testing.assert_array_equal(units.round_significant(values), expected)
    assert np.isnan(units.round_significant(np.array([np.nan]))[0])


def test_values_in_the_canonical_unit_are_kept_as_given():
    full = np.array([0.1 + 0.2, 1 / 3])  # 17 significant digits each
    np.testing.assert_array_equal(units.convert(full, units.canonical_unit("s")), full)


def test_every_canonical_unit_has_a_symbol_that_parses_back():
    # exports write the symbol (nM, µm/s, °C), never pint's long name (nanomolar)
    for canonical in units._CANONICAL_BY_DIMENSION.values():
        symbol = units.short_unit(canonical)
        assert symbol != canonical or canonical in ("dimensionless",), canonical
        assert units.canonical_unit(symbol).canonical == canonical, (canonical, symbol)
    assert units.short_unit("nanomolar") == "nM"


def test_fraction_and_percent_are_dimensionless():
    assert units.canonical_unit("fraction").canonical == "dimensionless"
    assert units.canonical_unit("%").canonical == "dimensionless"
    assert units.convert(np.array([41.0]), units.canonical_unit("%"))[0] == 0.41
