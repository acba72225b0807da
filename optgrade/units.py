"""Units at the edges: parse quantity strings such as ``"2.5 mm"`` or ``"150 kHz"`` into SI floats.

One module-level pint registry (:data:`ureg`) serves the whole package. Inside the code every
number is SI (m, s, kg, Pa, Hz, m/s, kg/m^3); angles are the one exception and are kept in
degrees where a field name says so (``angle_window_deg``).

Dimensional values must carry their unit as a string. A bare number (``2.5``) or a unitless
string (``"2.5"``) is refused with a message asking for a unit, because a silent guess of the unit
(mm or m? Hz or kHz?) is the most common way a study goes wrong by orders of magnitude.
"""

from __future__ import annotations

import math
import re
from typing import Any

import pint

__all__ = [
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


class UnitError(ValueError):
    """A value that is not a valid quantity of the expected dimension (message = the reason)."""


def _si_unit(dimension: str) -> pint.Unit:
    try:
        return ureg.Unit(DIMENSIONS[dimension][0])
    except KeyError:
        raise ValueError(f"unknown dimension name {dimension!r}") from None


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
    if not _LEADING_NUMBER.match(text):
        raise UnitError(f"{value!r} does not start with a number; expected e.g. \"{example}\"")
    try:
        quantity = ureg.Quantity(text)
    except pint.UndefinedUnitError as exc:
        names = exc.unit_names if isinstance(exc.unit_names, (list, tuple)) else [exc.unit_names]
        raise UnitError(f"unknown unit {', '.join(map(str, names))!r} in {value!r}") from None
    except Exception as exc:  # pint raises many kinds on malformed text
        raise UnitError(f"cannot read {value!r} as a quantity ({type(exc).__name__})") from None
    if not isinstance(quantity, ureg.Quantity):  # pragma: no cover - defensive
        raise UnitError(f"cannot read {value!r} as a quantity")
    if quantity.unitless:
        raise UnitError(
            f"{value!r} has no unit; write the {dimension} with its unit, e.g. \"{example}\""
        )
    if dimension == "angle":
        is_angle = quantity.units in (ureg.degree, ureg.radian, ureg.arcminute, ureg.turn)
        if not is_angle:
            raise UnitError(f"{value!r} is not an angle; expected e.g. \"{example}\"")
    elif quantity.dimensionality != target.dimensionality:
        raise UnitError(
            f"{value!r} has dimension {quantity.dimensionality}, expected a {dimension} "
            f"({target.dimensionality}), e.g. \"{example}\""
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
