"""Propagation stage: channel fractions of a layout over frequency.

One small base (:class:`PropagationModel`) and a registry (:data:`PROPAGATION_MODELS`); the
adiabatic (WKB) march through the local Bloch modes (:class:`WKBMarch`, ``"wkb"``) is the first
model. Every model returns a :class:`Trace`.
"""

from __future__ import annotations

from optgrade.channels import CHANNELS, RADIATING
from optgrade.propagation._base import PROPAGATION_MODELS, PropagationModel, study_frequencies
from optgrade.propagation._trace import Trace
from optgrade.propagation._wkb import (
    ADIABATIC_LIMIT,
    WKBMarch,
    accepts_path_only,
    march,
    trace,
    trace_study,
)

__all__ = [
    "ADIABATIC_LIMIT",
    "CHANNELS",
    "PROPAGATION_MODELS",
    "RADIATING",
    "PropagationModel",
    "Trace",
    "WKBMarch",
    "accepts_path_only",
    "march",
    "study_frequencies",
    "trace",
    "trace_study",
]
