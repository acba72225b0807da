"""Propagation stage: channel fractions of a layout over frequency.

One small base (:class:`PropagationModel`) and a registry (:data:`PROPAGATION_MODELS`); the
adiabatic (WKB) march through the local Bloch modes (:class:`WKBMarch`, ``"wkb"``) is the first
model. Every model returns a :class:`Trace`.
"""

from __future__ import annotations

from optgrade.channels import CHANNELS, RADIATING
from optgrade.propagation._base import (
    PROPAGATION_MODELS,
    PropagationModel,
    propagation_model,
    study_frequencies,
    trace_layout,
)
from optgrade.propagation._perturb import height_error_traces
from optgrade.propagation._trace import Trace
from optgrade.propagation._wkb import (
    ADIABATIC_LIMIT,
    WKB_PATH,
    WKBMarch,
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
    "WKB_PATH",
    "WKBMarch",
    "height_error_traces",
    "march",
    "propagation_model",
    "study_frequencies",
    "trace",
    "trace_layout",
    "trace_study",
]
