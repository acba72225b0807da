"""Propagation stage: channel fractions of a layout over frequency (the WKB march now)."""

from __future__ import annotations

from optgrade.propagation._wkb import (  # noqa: F401
    ADIABATIC_LIMIT,
    CHANNELS,
    RADIATING,
    Trace,
    accepts_path_only,
    march,
    study_frequencies,
    trace,
    trace_study,
)

__all__ = [
    "ADIABATIC_LIMIT",
    "CHANNELS",
    "RADIATING",
    "Trace",
    "accepts_path_only",
    "march",
    "study_frequencies",
    "trace",
    "trace_study",
]
