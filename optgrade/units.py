"""Units at the edges: parse quantity strings such as ``"2.5 mm"`` or ``"150 kHz"`` into SI floats.

One module-level pint registry (:data:`ureg`) serves the whole package. Inside the code every
number is SI (m, s, kg, Pa, Hz, m/s, kg/m^3); angles are the one exception and are kept in
degrees where a field name says so (``angle_window_deg``).

Dimensional values must carry their unit as a string. A bare number (``2.5``) or a unitless
string (``"2.5"``) is refused with a message asking for a unit, because a silent guess of the unit
(mm or m? Hz or kHz?) is the most common way a study goes wrong by orders of magnitude.

A quantity is **one number and one unit** (:data:`ACCEPTED_FORM`): the number is written with a
decimal point, an optional exponent and nothing inside it (no decimal comma, no spaces or
thousands separators, no second dot); the unit is unit names joined by ``*`` or ``/`` with small
integer powers (``kg/m^3``). Anything else, including arithmetic (``"0.5 mm + 0.5 mm"``,
``"9**9**9 mm"``) and implicit products (``"2 3 mm"``), is refused before pint sees it, so no
expression is ever evaluated. Angular units (``rad/s``, ``rpm``, ``cycle/s``) are refused for
frequencies: a frequency is written in Hz, f = omega / (2 pi).
"""

from __future__ import annotations

import math
import re
from typing import Any

import pint

__all__ = [
    "ACCEPTED_FORM",
    "DIMENSIONS",
    "UnitError",
    "format_quantity",
    "parse_quantity",
    "ureg",
]



def _make_registry() -> pint.UnitRegistry:
    """pint registry; the parsed definitions are cached on disk when possible (about 0.4 s of
    start-up saved per process), else built from scratch."""
    try:
        return pint.UnitRegistry(cache_folder=":auto:")
    except Exception:  # unwritable cache folder, a cache file being written by another process
        return pint.UnitRegistry()


#: The package-wide unit registry (pint). "kHz", "MHz", "mm", "um", "GPa", "g", "kg/m^3" and
#: "deg" work out of the box.
ureg = _make_registry()

#: Dimension name -> (SI unit the value is converted to, example shown in messages).
DIMENSIONS: dict[str, tuple[str, str]] = {
    "length": ("m", "2.5 mm"),
    "frequency": ("Hz", "150 kHz"),
    "density": ("kg/m^3", "7850 kg/m^3"),
    "mass": ("kg", "0.2 g"),
    "modulus": ("Pa", "200 GPa"),
    "speed": ("m/s", "3100 m/s"),
    "angle": ("deg", "30 deg"),
    "time": ("s", "10 ms"),
}

# A quantity string must start with a number; pint alone would read "mm" as 1 mm.
_LEADING_NUMBER = re.compile(r"^\s*[-+]?(\d|\.\d|nan\b|inf\b)", re.IGNORECASE)

#: Longest quantity text read at all (characters); "7850 kg/m^3" is 11.
MAX_QUANTITY_CHARS = 64
#: Most digits in the number (mantissa): a double holds 17 significant digits.
MAX_DIGITS = 30
#: The accepted form, shown in every refusal of a malformed quantity.
ACCEPTED_FORM = (
    "one number and one unit, e.g. \"2.5 mm\", \"150 kHz\", \"1.2e5 Hz\", \"7850 kg/m^3\" "
    "(decimal point, no spaces, commas or separators inside the number, no arithmetic)"
)
# number: digits with at most one decimal point, optional exponent (a huge exponent gives inf,
# refused as not finite)
_NUMBER = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d{1,9})?"
# unit: names (letters, the micro signs, an underscore) with optional small integer powers,
# joined by * or /; no digits outside the powers, no other operators
_NAME = r"[A-Za-z_\u00b5\u03bc\u00b0]+"
_POWER = r"(?:(?:\^|\*\*)[-+]?[1-9])?"
_UNIT = rf"{_NAME}{_POWER}(?:\s*[*/]\s*{_NAME}{_POWER})*"
_QUANTITY = re.compile(rf"^(?P<number>{_NUMBER})\s*(?P<unit>{_UNIT})$")
_NUMBER_ONLY = re.compile(rf"^{_NUMBER}$")


class UnitError(ValueError):
    """A value that is not a valid quantity of the expected dimension (message = the reason)."""


def _si_unit(dimension: str) -> pint.Unit:
    try:
        return ureg.Unit(DIMENSIONS[dimension][0])
    except KeyError:
        raise ValueError(f"unknown dimension name {dimension!r}") from None


def _shown(value: str) -> str:
    """The user's text for a message, shortened (a 100,000-digit number is not echoed)."""
    return repr(value) if len(value) <= MAX_QUANTITY_CHARS else repr(value[:40] + "...")


def _read_quantity(text: str, value: str, dimension: str, example: str) -> Any:
    """One number and one unit -> pint Quantity; anything else refused without evaluation."""
    if len(text) > MAX_QUANTITY_CHARS:
        raise UnitError(f"{_shown(value)} is {len(text)} characters long, more than a quantity "
                        f"needs (limit {MAX_QUANTITY_CHARS}); write {ACCEPTED_FORM}")
    if not _LEADING_NUMBER.match(text):
        raise UnitError(f"{value!r} does not start with a number; expected e.g. \"{example}\"")
    if re.match(r"^[-+]?(nan|inf)", text, re.IGNORECASE):
        raise UnitError(f"{value!r} is not a finite number")
    if _NUMBER_ONLY.match(text):
        raise UnitError(
            f"{value!r} has no unit; write the {dimension} with its unit, e.g. \"{example}\""
        )
    match = _QUANTITY.match(text)
    if match is None:
        raise UnitError(f"cannot read {value!r} as a quantity: {_malformed_reason(text)}; "
                        f"write {ACCEPTED_FORM}")
    number = match.group("number")
    if len(re.sub(r"[^0-9]", "", number.split("e")[0].split("E")[0])) > MAX_DIGITS:
        raise UnitError(f"{_shown(value)} has more than {MAX_DIGITS} digits in its number; "
                        f"write {ACCEPTED_FORM}")
    unit_text = match.group("unit").replace("**", "^")
    try:
        unit = ureg.parse_units(unit_text)
    except pint.UndefinedUnitError as exc:
        names = exc.unit_names if isinstance(exc.unit_names, (list, tuple)) else [exc.unit_names]
        raise UnitError(f"unknown unit {', '.join(map(str, names))!r} in {value!r}"
                        f"{_case_hint(unit_text, dimension)}") from None
    except Exception as exc:  # pint raises many kinds on malformed unit text
        raise UnitError(f"cannot read the unit of {value!r} ({type(exc).__name__}); "
                        f"write {ACCEPTED_FORM}") from None
    if unit.dimensionless and not _is_angular(ureg.Quantity(1.0, unit)):
        raise UnitError(
            f"{value!r} has no unit; write the {dimension} with its unit, e.g. \"{example}\""
        )
    return ureg.Quantity(float(number), unit)


#: Units people write, by dimension, for the "did you mean" hint of a mis-cased unit.
_COMMON_UNITS = {
    "frequency": ("Hz", "kHz", "MHz", "GHz"),
    "length": ("nm", "um", "mm", "cm", "m", "km", "in", "ft"),
    "mass": ("mg", "g", "kg", "t", "lb"),
    "density": ("kg/m^3", "g/cm^3", "t/m^3"),
    "modulus": ("Pa", "kPa", "MPa", "GPa"),
    "speed": ("m/s", "km/s", "mm/us"),
    "time": ("ns", "us", "ms", "s"),
    "angle": ("deg", "rad"),
}


def _case_hint(unit_text: str, dimension: str) -> str:
    """' (did you mean 'kHz'?)' when the unit differs from a common unit of the dimension only
    in letter case (300 KHz, 5 MM), else ''."""
    low = unit_text.replace(" ", "").lower()
    for unit in _COMMON_UNITS.get(dimension, ()):
        if unit.lower() == low and unit != unit_text:
            return (f" (did you mean {unit!r}? unit prefixes are case-sensitive: "
                    "M = mega, m = milli)")
    return ""


def _malformed_reason(text: str) -> str:
    """Why a quantity text does not have the accepted form (for the message)."""
    number_part = re.match(r"^[-+]?[\d.,\s_']*", text).group(0).strip()
    if re.search(r"\d,\d", text):
        return "decimal commas and thousands separators are not read (use a decimal point)"
    if re.search(r"\d[\s_']+\d", number_part):
        return "spaces or separators inside a number are not read (no implicit products)"
    if number_part.count(".") > 1:
        return "a number has at most one decimal point"
    if re.search(r"[+\-]\s*\d|\*\*?\s*\d|/\s*\d|[()]", text[1:]):
        return "arithmetic is not evaluated (one number, one unit)"
    if re.search(r"\d", text[len(number_part):]):
        return "only one number is allowed (digits after the unit start)"
    return "not one number followed by one unit"


def _is_angular(quantity: Any) -> bool:
    """Does the quantity's unit contain an angle (rad, deg, turn, revolution, cycle, rpm)?"""
    try:
        root = quantity.to_root_units().units
    except Exception:  # pragma: no cover - pint internals
        return False
    return "radian" in dict(root._units)


def parse_quantity(value: Any, dimension: str) -> float:
    """Parse a quantity string into a float in the SI unit of ``dimension``.

    Parameters
    ----------
    value
        A string holding a number and a unit, e.g. ``"2.5 mm"``, ``"150 kHz"``, ``"7850 kg/m^3"``.
    dimension
        One of the keys of :data:`DIMENSIONS` ("length", "frequency", "density", "mass",
        "modulus", "speed", "angle", "time").

    Returns
    -------
    float
        The value in SI (m, Hz, kg/m^3, kg, Pa, m/s, s); angles are returned in degrees.

    Raises
    ------
    UnitError
        For a bare number, a missing unit, an unknown unit, a unit of another dimension, or a
        value that is not finite. The message is the reason only (the caller adds the field).
    """
    target = _si_unit(dimension)
    example = DIMENSIONS[dimension][1]
    if isinstance(value, bool) or value is None:
        raise UnitError(f"expected a {dimension} with a unit as a string, e.g. \"{example}\"")
    if isinstance(value, (int, float)):
        raise UnitError(
            f"bare number {value!r} has no unit; write the {dimension} with its unit, "
            f"e.g. \"{example}\""
        )
    if not isinstance(value, str):
        raise UnitError(
            f"expected a {dimension} as a string with a unit, e.g. \"{example}\", "
            f"got {type(value).__name__}"
        )
    text = value.strip()
    if not text:
        raise UnitError(f"empty value; expected a {dimension} with a unit, e.g. \"{example}\"")
    quantity = _read_quantity(text, value, dimension, example)
    if dimension == "frequency" and _is_angular(quantity):
        raise UnitError(
            f"{_shown(value)} is an angular rate; angular units (rad/s, rpm, cycle/s) are refused "
            f"for frequencies: write the frequency in Hz (f = omega / (2 pi)), e.g. \"{example}\""
        )
    if dimension == "angle":
        is_angle = quantity.units in (ureg.degree, ureg.radian, ureg.arcminute, ureg.turn)
        if not is_angle:
            raise UnitError(f"{value!r} is not an angle; expected e.g. \"{example}\"")
    elif _is_angular(quantity):
        raise UnitError(f"{value!r} contains an angle unit; expected a {dimension}, "
                        f"e.g. \"{example}\"")
    elif quantity.dimensionality != target.dimensionality:
        raise UnitError(
            f"{value!r} has dimension {quantity.dimensionality}, expected a {dimension} "
            f"({target.dimensionality}), e.g. \"{example}\""
            f"{_case_hint(re.sub(r'^[-+]?[0-9.]+([eE][-+]?[0-9]+)?', '', text).strip(), dimension)}"
        )
    try:
        magnitude = float(quantity.to(target).magnitude)
    except Exception as exc:  # pragma: no cover - offset units etc.
        raise UnitError(f"cannot convert {value!r} to {target} ({type(exc).__name__})") from None
    if not math.isfinite(magnitude):
        raise UnitError(f"{value!r} is not a finite number")
    return magnitude


def format_quantity(value: float, dimension: str, unit: str | None = None, digits: int = 4) -> str:
    """Format an SI value for people, e.g. ``format_quantity(0.0025, "length", "mm") -> "2.5 mm"``.

    Parameters
    ----------
    value
        SI value (degrees for angles).
    dimension
        Dimension name (see :data:`DIMENSIONS`).
    unit
        Display unit; default: the SI unit of the dimension.
    digits
        Significant digits.
    """
    si = _si_unit(dimension)
    shown = ureg.Quantity(value, si).to(unit) if unit else ureg.Quantity(value, si)
    return f"{shown.magnitude:.{digits}g} {unit or DIMENSIONS[dimension][0]}"


_PREFIXES = {-9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}


def format_eng(value: float, symbol: str, digits: int = 4) -> str:
    """Engineering notation with an SI prefix: ``format_eng(105200.0, "Hz") -> "105.2 kHz"``,
    ``format_eng(0.0025, "m") -> "2.5 mm"``. Exponents outside nano..giga fall back to ``e``
    notation; zero and non-finite values are printed as they are. Masses (``"kg"``) read in
    g, kg or t (``2400 -> "2.4 t"``), speeds (``"m/s"``) in plain m/s as the trade writes
    them."""
    if symbol == "kg" and math.isfinite(value) and value != 0.0:
        if abs(value) >= 1000.0:
            return f"{value / 1000.0:.{digits}g} t"
        if abs(value) >= 1.0:
            return f"{value:.{digits}g} kg"
        return format_eng(value * 1000.0, "g", digits)
    if symbol == "m/s":
        return f"{value:.{digits}g} m/s"
    if not math.isfinite(value) or value == 0.0:
        return f"{value:g} {symbol}"
    exp3 = int(math.floor(math.log10(abs(value)) / 3.0)) * 3
    if exp3 not in _PREFIXES:
        return f"{value:.{digits}g} {symbol}"
    scaled = value / 10.0**exp3
    text = f"{scaled:.{digits}g}"
    if abs(float(text)) >= 1000.0 and exp3 + 3 in _PREFIXES:  # 999.96 rounds to 1000
        exp3 += 3
        text = f"{value / 10.0**exp3:.{digits}g}"
    return f"{text} {_PREFIXES[exp3]}{symbol}"
