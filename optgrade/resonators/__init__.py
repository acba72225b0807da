"""Resonator stage: base dynamic stiffness of the resonators (axial rod with head mass, lumped oscillator)."""

from __future__ import annotations

from optgrade.resonators._rod import (  # noqa: F401
    Rod,
    is_thin_rod,
    oscillator_stiffness,
    rod_compliance,
    rod_constants,
    rod_parts_at,
    rod_resonances,
    rod_stiffness,
)

__all__ = [
    "Rod",
    "is_thin_rod",
    "oscillator_stiffness",
    "rod_compliance",
    "rod_constants",
    "rod_parts_at",
    "rod_resonances",
    "rod_stiffness",
]
