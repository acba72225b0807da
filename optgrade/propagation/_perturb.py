"""Traces of a layout under machining errors of its rod heights (for the robustness goal).

:func:`height_error_traces` is what the evaluation context offers the goals: one trace per row
of height errors, with the study's propagation model. Any model can trace each perturbed layout
in full (:meth:`PropagationModel.trace_height_errors`); the WKB march has a faster path here:
the local modes of every cell are computed once at h, h + tol and h - tol, and the modes of each
draw are interpolated linearly between them (nearest sample where a branch appears or vanishes
inside the interval), then marched. That is three local-mode evaluations instead of one per
draw; tests/test_objectives.py compares it with full traces.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from optgrade.propagation._wkb import WKBMarch, march

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation._base import PropagationModel
    from optgrade.propagation._trace import Trace

__all__ = ["height_error_traces", "interpolated_wkb_traces"]


@dataclass(frozen=True)
class _BlendedModes:
    """Local-mode arrays (the LocalModes contract) of one perturbed row."""

    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray


def _blend(m0: np.ndarray, ms: np.ndarray, t: np.ndarray) -> np.ndarray:
    """m0 + t (ms - m0) where both are finite, else the nearer sample (t in [0, 1])."""
    both = np.isfinite(m0) & np.isfinite(ms)
    with np.errstate(invalid="ignore"):
        lin = m0 + t * (ms - m0)
    return np.where(both, lin, np.where(t < 0.5, m0, ms))


def interpolated_wkb_traces(model: WKBMarch, layout: Layout, errors: np.ndarray) -> list[Trace]:
    """WKB traces of ``layout`` with each row of ``errors`` (m) added to the heights, from local
    modes interpolated between h - tol, h, h + tol (``tol = layout.height_tol``)."""
    sur = model.dispersion
    freq = model.frequencies(None)
    cr = float(model.study.substrate.cr)
    h = np.asarray(layout.height, dtype=float)
    tol = np.asarray(layout.height_tol, dtype=float)
    a, m = layout.spacing, layout.head_mass
    m0 = sur.local_modes(h, a, m, freq)
    m_up = sur.local_modes(h + tol, a, m, freq)
    m_dn = sur.local_modes(np.maximum(h - tol, 1e-9), a, m, freq)
    out = []
    for e in errors:
        t = np.divide(e, tol, out=np.zeros_like(e), where=tol > 0)
        is_up = t >= 0
        fields = {}
        for name in ("k", "shares", "angle"):
            v0 = getattr(m0, name)
            cells = (None,) * (v0.ndim - 2) + (slice(None), None)
            side = np.where(is_up[cells], getattr(m_up, name), getattr(m_dn, name))
            tt = np.abs(t)[cells]
            if np.iscomplexobj(v0):
                fields[name] = _blend(v0.real, side.real, tt) + 1j * _blend(v0.imag, side.imag, tt)
            else:
                fields[name] = _blend(v0, side, tt)
        out.append(march(_BlendedModes(**fields), layout.x, layout.spacing, freq, cr))
    return out


def height_error_traces(
    model: PropagationModel, layout: Layout, errors: np.ndarray
) -> list[Trace]:
    """One trace of ``layout`` per row of ``errors`` (m, shape (n_draws, n_resonators)) added to
    its rod heights, with ``model``: interpolated local modes for the WKB march, a full trace of
    each perturbed layout for any other model."""
    if isinstance(model, WKBMarch):
        return interpolated_wkb_traces(model, layout, errors)
    return model.trace_height_errors(layout, errors)
