"""The propagation stage's output: where the power of an incident Rayleigh wave goes.

Every propagation model returns a :class:`Trace` (contract in DEVELOPERS.md); the score, the
exports and the full-wave comparison read nothing else.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade.channels import CHANNELS

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

__all__ = ["Trace"]


@dataclass(frozen=True)
class Trace:
    """Where the power of a Rayleigh wave entering a layout goes, frequency by frequency.

    Attributes
    ----------
    frequency : ndarray, shape (n_freq,)
        Frequency (Hz).
    fractions : dict[str, ndarray]
        Power fraction per channel (dimensionless, 0..1); the seven sum to 1 per frequency.
    position : dict[str, ndarray]
        Power-weighted position (m) along the row where each channel receives its power; nan
        where it gets nothing. ``transmitted_surface`` leaves at ``layout.length``;
        ``reflected_surface`` is weighted between the entry step (0) and the turning point.
    angle : dict[str, ndarray]
        Power-weighted mean angle from the surface normal (deg), negative = pointing back to
        the source; nan where the channel gets nothing. Surface channels are +90 (transmitted)
        and -90 (reflected); ``absorbed`` is always nan.
    eps_max : ndarray
        Largest adiabaticity parameter on the forward path (dimensionless).
    is_adiabatic : ndarray of bool
        ``eps_max <= 0.1``.
    branch : ndarray of int
        Branch followed (0 lower, 1 upper, -1 none: entry cell in a gap).
    turning_position : ndarray
        Position of the turning point (m), nan where the wave is not turned back.
    entry_reflection : ndarray
        Part of the reflected power due to the entry impedance step.
    phase : ndarray
        Accumulated phase sum K'_j a_j of the transmitted wave (rad); nan where nothing is
        transmitted.
    propagation : str
        Name of the propagation model that made the trace (``"wkb"``, ``"scattering"``, ...).
    balance_error : ndarray or None
        Independent energy-balance residual per frequency, 1 - sum of the seven fractions
        computed without booking a remainder (dimensionless); None (null in trace.json) for
        models that close the balance by construction (the WKB march books what is left to the
        channels it follows) and for lossy substrates (no independent balance).
    far_face : FarFaceMap or None
        Where the converted waves reach the far face of a block (`optgrade.propagation.
        _farface`; the study has ``substrate.thickness``): the map from the exact model's
        forces, or the ray estimate only from a model without forces; None for a half-space.
    """

    frequency: np.ndarray
    fractions: dict[str, np.ndarray]
    position: dict[str, np.ndarray]
    angle: dict[str, np.ndarray]
    eps_max: np.ndarray
    is_adiabatic: np.ndarray
    branch: np.ndarray
    turning_position: np.ndarray
    entry_reflection: np.ndarray
    phase: np.ndarray
    propagation: str = "wkb"
    balance_error: np.ndarray | None = None
    far_face: Any = None

    def total(self) -> np.ndarray:
        """Sum of all channel fractions per frequency (1 up to rounding)."""
        return np.sum([self.fractions[c] for c in CHANNELS], axis=0)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (lists, ``None`` for nan) with the trace.json keys."""

        def clean(a: np.ndarray) -> list:
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, float)]

        return {
            "frequency_hz": clean(self.frequency),
            "fractions": {c: clean(self.fractions[c]) for c in CHANNELS},
            "position_m": {c: clean(self.position[c]) for c in CHANNELS},
            "angle_deg": {c: clean(self.angle[c]) for c in CHANNELS},
            "eps_max": clean(self.eps_max),
            "is_adiabatic": [bool(v) for v in self.is_adiabatic],
            "branch": [int(v) for v in self.branch],
            "turning_position_m": clean(self.turning_position),
            "entry_reflection": clean(self.entry_reflection),
            "propagation": self.propagation,
            "balance_error": (None if self.balance_error is None
                              or not np.isfinite(self.balance_error).any()
                              else clean(self.balance_error)),
            **({} if self.far_face is None else {"far_face": self.far_face.to_dict()}),
        }

    def to_frame(self) -> pd.DataFrame:
        """The trace as a pandas DataFrame, one row per frequency (index ``frequency_hz``).

        Columns: ``<channel>_fraction`` (-), ``<channel>_position_m`` (m), ``<channel>_angle_deg``
        (deg) for each channel in :data:`optgrade.channels.CHANNELS`, then ``eps_max`` (-),
        ``is_adiabatic``, ``branch``, ``turning_position_m`` (m), ``entry_reflection`` (-) and
        ``phase_rad`` (rad), and ``balance_error`` (-) when the model gives one. Values are
        copies; nan stays nan.

        Raises
        ------
        ImportError
            pandas is not installed (``pip install "optgrade[frames]"``).
        """
        try:
            import pandas as pd
        except ImportError:
            raise ImportError('Trace.to_frame needs pandas: pip install "optgrade[frames]" '
                              "(or pip install pandas)") from None
        columns: dict[str, np.ndarray] = {}
        for c in CHANNELS:
            columns[f"{c}_fraction"] = np.array(self.fractions[c], dtype=float)
            columns[f"{c}_position_m"] = np.array(self.position[c], dtype=float)
            columns[f"{c}_angle_deg"] = np.array(self.angle[c], dtype=float)
        columns["eps_max"] = np.array(self.eps_max, dtype=float)
        columns["is_adiabatic"] = np.array(self.is_adiabatic, dtype=bool)
        columns["branch"] = np.array(self.branch, dtype=int)
        columns["turning_position_m"] = np.array(self.turning_position, dtype=float)
        columns["entry_reflection"] = np.array(self.entry_reflection, dtype=float)
        columns["phase_rad"] = np.array(self.phase, dtype=float)
        if self.balance_error is not None:
            columns["balance_error"] = np.array(self.balance_error, dtype=float)
        index = pd.Index(np.array(self.frequency, dtype=float), name="frequency_hz")
        return pd.DataFrame(columns, index=index)
