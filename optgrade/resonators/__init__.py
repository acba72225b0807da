"""Resonator stage: base dynamic stiffness of the resonators standing on the ground.

One small base (:class:`Resonator`) and a registry (:data:`RESONATORS`); the axial rod with an
optional head mass (:class:`Rod`, ``kind = "axial_rod"``) is the one type the study can pick so
far; :func:`oscillator_stiffness` is the lumped mass-spring limit used by the checks.
"""

from __future__ import annotations

from optgrade.resonators._base import RESONATORS, Resonator, resonator_of
from optgrade.resonators._rod import (
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
    "resonator_of",
    "RESONATORS",
    "Resonator",
    "Rod",
    "is_thin_rod",
    "oscillator_stiffness",
    "rod_compliance",
    "rod_constants",
    "rod_parts_at",
    "rod_resonances",
    "rod_stiffness",
]
