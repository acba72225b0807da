"""Ground stage: the elastic body the resonators stand on (the homogeneous half-space now)."""

from __future__ import annotations

from optgrade.ground._halfspace import (  # noqa: F401
    Substrate,
    compliance_sq,
    rayleigh_function,
    rayleigh_speed,
    surface_compliance,
    vertical_wavenumber,
)

__all__ = [
    "Substrate",
    "compliance_sq",
    "rayleigh_function",
    "rayleigh_speed",
    "surface_compliance",
    "vertical_wavenumber",
]
