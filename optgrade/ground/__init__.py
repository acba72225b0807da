"""Ground stage: the elastic body the resonators stand on.

One small base (:class:`Ground`) and a registry (:data:`GROUNDS`); the homogeneous isotropic
half-space (:class:`Substrate`, ``kind = "halfspace"``) is the one ground so far.
"""

from __future__ import annotations

from optgrade.ground._base import GROUNDS, Ground, ground_of
from optgrade.ground._halfspace import (
    Substrate,
    compliance_sq,
    rayleigh_function,
    rayleigh_speed,
    shear_share,
    surface_compliance,
    vertical_wavenumber,
)

__all__ = [
    "ground_of",
    "GROUNDS",
    "Ground",
    "Substrate",
    "compliance_sq",
    "rayleigh_function",
    "rayleigh_speed",
    "shear_share",
    "surface_compliance",
    "vertical_wavenumber",
]
