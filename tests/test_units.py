"""Quantity parsing at the edges (optgrade.units).

Reference conversions are SI definitions (BIPM, *The International System of Units*, 9th ed.,
2019: prefixes k = 1e3, M = 1e6, m = 1e-3, u = 1e-6; 1 g = 1e-3 kg; 1 deg = pi/180 rad).
"""

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from optgrade.units import UnitError, format_quantity, parse_quantity


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        ("2.5 mm", "length", 2.5e-3),
        ("1 um", "length", 1e-6),
        ("1.5 m", "length", 1.5),
        ("150 kHz", "frequency", 150e3),
        ("2 MHz", "frequency", 2e6),
        ("40 Hz", "frequency", 40.0),
        ("7850 kg/m^3", "density", 7850.0),
        ("7.85 g/cm^3", "density", 7850.0),
        ("0.2 g", "mass", 2e-4),
        ("3 t", "mass", 3000.0),
        ("200 GPa", "modulus", 200e9),
        ("3100 m/s", "speed", 3100.0),
        ("3.1 km/s", "speed", 3100.0),
        ("30 deg", "angle", 30.0),
        ("0.5 rad", "angle", math.degrees(0.5)),
        ("10 ms", "time", 0.01),
    ],
)
def test_si_conversions(text, dimension, expected):
    """SI prefixes and derived units (BIPM SI brochure, 9th ed., 2019)."""
    assert parse_quantity(text, dimension) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("value", [2.5, 3, "2.5", "  7 "])
def test_bare_number_is_refused_with_a_request_for_a_unit(value):
    with pytest.raises(UnitError, match="unit"):
        parse_quantity(value, "length")


@pytest.mark.parametrize(
    ("text", "dimension", "fragment"),
    [
        ("100 mm", "frequency", "expected a frequency"),
        ("2700 kg", "density", "expected a density"),
        ("5 N", "mass", "expected a mass"),
        ("3 m/s", "length", "expected a length"),
        ("30 mm", "angle", "not an angle"),
        ("1 furlongz", "length", "unknown unit 'furlongz'"),
        ("mm", "length", "does not start with a number"),
        ("nan mm", "length", "not a finite number"),
        ("inf Hz", "frequency", "not a finite number"),
        ("", "length", "empty"),
        ("2 mm +", "length", "cannot read"),
    ],
)
def test_bad_quantities_name_the_reason(text, dimension, fragment):
    with pytest.raises(UnitError, match=fragment):
        parse_quantity(text, dimension)


@pytest.mark.parametrize("value", [None, True, [1, "mm"], {"a": 1}])
def test_non_strings_are_refused(value):
    with pytest.raises(UnitError):
        parse_quantity(value, "length")


def test_unknown_dimension_name_is_a_programming_error():
    with pytest.raises(ValueError, match="unknown dimension"):
        parse_quantity("1 m", "colour")


@given(st.floats(min_value=1e-6, max_value=1e6, allow_nan=False))
def test_millimetre_round_trip(x):
    """Property: formatting in mm and parsing back returns the SI value (1 mm = 1e-3 m)."""
    text = format_quantity(x, "length", "mm", digits=17)
    assert parse_quantity(text, "length") == pytest.approx(x, rel=1e-12)


# --------------------------------------------------------------------------- issue 17, part 3
# Before the fix these texts were handed to pint's expression parser, which read them as other
# values without a word ("12,5 mm" -> 125 mm, "1 000 mm" -> 0, "2 3 mm" -> 6 mm, "1.5.2 mm" ->
# 0.3 mm), evaluated arithmetic ("0.5 mm + 0.5 mm" -> 1 mm; "9**9**9 mm" ran for minutes) and
# read angular rates as cycles per second (628318 rad/s taken as 628318 Hz, a 2 pi error).
@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("12,5 mm", "decimal commas"),
        ("0,02 mm", "decimal commas"),
        ("1 000 mm", "spaces or separators inside a number"),
        ("2 3 mm", "spaces or separators inside a number"),
        ("1.5.2 mm", "at most one decimal point"),
        ("0.5 mm + 0.5 mm", "arithmetic is not evaluated"),
        ("9**9**9 mm", "arithmetic is not evaluated"),
        ("2 mm * 3", "arithmetic is not evaluated"),
        ("1 mm mm", "not one number followed by one unit"),
    ],
)
def test_malformed_quantities_are_refused_with_the_accepted_form(text, fragment):
    with pytest.raises(UnitError, match=fragment) as info:
        parse_quantity(text, "length")
    assert "one number and one unit" in str(info.value)


def test_power_towers_are_refused_at_once_never_evaluated():
    import time

    start = time.perf_counter()
    with pytest.raises(UnitError):
        parse_quantity("9**9**9 mm", "length")
    assert time.perf_counter() - start < 0.5


@pytest.mark.parametrize("text", ["628318 rad/s", "6000 rpm", "5 cycle/s", "2 rad*kHz"])
def test_angular_units_are_refused_for_frequencies(text):
    """f = omega / (2 pi): pint treats rad as 1, so 628318 rad/s would be read as 628 kHz
    instead of 100 kHz. The parser refuses angular rates (docs/study-reference.md)."""
    with pytest.raises(UnitError, match="angular"):
        parse_quantity(text, "frequency")


def test_numbers_too_long_to_mean_anything_are_refused_quickly():
    import time

    text = "1" + "0" * 100_000 + " mm"
    start = time.perf_counter()
    with pytest.raises(UnitError, match="characters long") as info:
        parse_quantity(text, "length")
    assert time.perf_counter() - start < 0.5
    assert len(str(info.value)) < 400  # the 100,000 digits are not echoed back


@pytest.mark.parametrize("text", ["1e999999999 mm", "-1e400 m"])
def test_overflowing_exponents_are_not_finite(text):
    with pytest.raises(UnitError, match="not a finite number"):
        parse_quantity(text, "length")


@pytest.mark.parametrize(
    ("text", "dimension", "expected"),
    [
        ("1.2e5 Hz", "frequency", 1.2e5),
        ("5 kg/m**3", "density", 5.0),
        ("5 kg / m^3", "density", 5.0),
        ("3 s^-1", "frequency", 3.0),
        ("+.5 mm", "length", 5e-4),
        ("2. mm", "length", 2e-3),
    ],
)
def test_the_accepted_form_still_reads(text, dimension, expected):
    """Exponents, powers, spaces around operators between unit names (SI brochure 2019)."""
    assert parse_quantity(text, dimension) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("text, dimension, hint", [
    ("300 KHz", "frequency", "'kHz'"), ("300 khz", "frequency", "'kHz'"),
    ("5 MM", "length", "'mm'"), ("15.5 MM", "length", "'mm'"), ("3 GPA", "modulus", "'GPa'"),
])
def test_miscased_unit_gets_a_hint(text, dimension, hint):
    """Issue 15 item 8: a unit that differs from a common one only in letter case is refused
    (SI prefixes are case-sensitive: 5 MM would be read as molar) with the likely unit named."""
    with pytest.raises(UnitError, match="did you mean " + hint):
        parse_quantity(text, dimension)
