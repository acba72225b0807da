"""Materials library and isotropic elastic relations.

The library lives in ``optgrade/data/materials.toml``: density, Young's modulus, Poisson ratio,
category and a source string per entry. Wave speeds are derived here, never stored:

- compressional (bulk) speed  cL = sqrt(E (1 - nu) / (rho (1 + nu) (1 - 2 nu)))
- shear speed                 cT = sqrt(E / (2 rho (1 + nu)))
- bar (thin-rod) speed        c_bar = sqrt(E / rho)
- Rayleigh speed              cR = exact root of the Rayleigh equation,
                              :func:`optgrade.ground._halfspace.rayleigh_speed`

(isotropic linear elasticity; e.g. J. D. Achenbach, *Wave Propagation in Elastic Solids*, 1973,
chapter 4; K. F. Graff, *Wave Motion in Elastic Solids*, 1975, for the bar speed).
"""

from __future__ import annotations

import difflib
import sys
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

import numpy as np
from numpy.typing import ArrayLike

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "CATEGORIES",
    "Material",
    "bar_speed",
    "bulk_speeds",
    "derived_speeds",
    "elastic_from_speeds",
    "get_material",
    "library",
    "material_names",
    "suggest_material",
]

CATEGORIES = ("metal", "polymer", "mineral", "soil", "timber")


@dataclass(frozen=True)
class Material:
    """One library entry (SI units).

    Attributes
    ----------
    name : library key, e.g. ``"aluminium_6061"``
    category : one of :data:`CATEGORIES`
    density : kg/m^3
    youngs_modulus : Pa
    poisson : Poisson ratio (-)
    source : where the numbers come from (handbook, standard, "from memory", common practice)
    note : caveats, may be empty
    """

    name: str
    category: str
    density: float
    youngs_modulus: float
    poisson: float
    source: str
    note: str = ""

    @property
    def is_soil(self) -> bool:
        """Is this a soil (site-scale substrate)?"""
        return self.category == "soil"


def bulk_speeds(youngs_modulus: ArrayLike, density: ArrayLike, poisson: ArrayLike):
    """Compressional and shear speeds of an isotropic solid.

    Parameters
    ----------
    youngs_modulus : Young's modulus E (Pa)
    density : density rho (kg/m^3)
    poisson : Poisson ratio nu (-), -1 < nu < 0.5

    Returns
    -------
    (cl, ct) : compressional and shear speeds (m/s), arrays broadcast from the inputs

    Notes
    -----
    cL^2 = E (1 - nu) / (rho (1 + nu) (1 - 2 nu)), cT^2 = E / (2 rho (1 + nu)) (isotropic
    linear elasticity, e.g. Achenbach 1973, section 4.2).
    """
    e = np.asarray(youngs_modulus, dtype=float)
    rho = np.asarray(density, dtype=float)
    nu = np.asarray(poisson, dtype=float)
    cl = np.sqrt(e * (1.0 - nu) / (rho * (1.0 + nu) * (1.0 - 2.0 * nu)))
    ct = np.sqrt(e / (2.0 * rho * (1.0 + nu)))
    return cl, ct


def elastic_from_speeds(cl: ArrayLike, ct: ArrayLike, density: ArrayLike):
    """Young's modulus and Poisson ratio from the bulk wave speeds (inverse of :func:`bulk_speeds`).

    Parameters
    ----------
    cl : compressional speed (m/s)
    ct : shear speed (m/s)
    density : kg/m^3

    Returns
    -------
    (youngs_modulus, poisson) : E (Pa) and nu (-), with
        nu = (cL^2 - 2 cT^2) / (2 (cL^2 - cT^2)) and E = 2 rho cT^2 (1 + nu).
    """
    cl2 = np.asarray(cl, dtype=float) ** 2
    ct2 = np.asarray(ct, dtype=float) ** 2
    rho = np.asarray(density, dtype=float)
    nu = (cl2 - 2.0 * ct2) / (2.0 * (cl2 - ct2))
    return 2.0 * rho * ct2 * (1.0 + nu), nu


def bar_speed(youngs_modulus: ArrayLike, density: ArrayLike) -> np.ndarray:
    """Longitudinal thin-rod (bar) speed c_bar = sqrt(E / rho) in m/s (Graff 1975, section 2.1)."""
    return np.sqrt(np.asarray(youngs_modulus, dtype=float) / np.asarray(density, dtype=float))


def derived_speeds(material: Material) -> dict[str, float]:
    """Derived speeds of a library material (m/s): ``cl``, ``ct``, ``bar``, ``cr``."""
    from optgrade.ground import rayleigh_speed

    cl, ct = bulk_speeds(material.youngs_modulus, material.density, material.poisson)
    return {
        "cl": float(cl),
        "ct": float(ct),
        "bar": float(bar_speed(material.youngs_modulus, material.density)),
        "cr": float(rayleigh_speed(float(cl), float(ct))),
    }


@lru_cache(maxsize=1)
def library() -> dict[str, Material]:
    """All library entries by name (read once from ``optgrade/data/materials.toml``)."""
    text = resources.files("optgrade").joinpath("data/materials.toml").read_text("utf-8")
    raw = tomllib.loads(text)
    out = {}
    for name, entry in raw.items():
        out[name] = Material(
            name=name,
            category=str(entry["category"]),
            density=float(entry["density"]),
            youngs_modulus=float(entry["youngs_modulus"]),
            poisson=float(entry["poisson"]),
            source=str(entry["source"]),
            note=str(entry.get("note", "")),
        )
    return out


def material_names() -> list[str]:
    """Library names, sorted."""
    return sorted(library())


def suggest_material(name: str) -> str | None:
    """The library name closest to ``name`` (difflib), or None when nothing is close."""
    close = difflib.get_close_matches(str(name).lower(), material_names(), n=1, cutoff=0.5)
    return close[0] if close else None


def get_material(name: str) -> Material:
    """The library entry called ``name``.

    Raises
    ------
    KeyError
        With a message naming the nearest library name when the name is unknown.
    """
    try:
        return library()[name]
    except KeyError:
        hint = suggest_material(name)
        extra = f"; did you mean {hint!r}?" if hint else f"; known: {', '.join(material_names())}"
        raise KeyError(f"unknown material {name!r}{extra}") from None
