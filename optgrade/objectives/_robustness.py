"""Goal ``robustness``: a low quantile (10 %) of the main weighted score over random machining
errors. Each draw adds an independent error, uniform in +/- the height tolerance, to every rod
height; the draws are seeded from the study seed (common random numbers: every candidate sees
the same errors, so scores are deterministic and comparable) and traced with the same surrogate
through ``context.trace_fn``.

Speed-up (used when the context has a surrogate with ``local_modes``): the local modes of every
cell are computed once at h, h + tol and h - tol, and the modes of each draw are interpolated
linearly between them (nearest sample where a branch appears or vanishes inside the interval),
then marched with :func:`optgrade.propagation._wkb.march`. That is three local-mode evaluations
instead of ``N_DRAWS + 1``; tests/test_objectives.py compares it with full traces."""

from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, main_score, register

N_DRAWS = 12
QUANTILE = 0.10


def perturbed(layout, errors: np.ndarray):
    """Copy of ``layout`` with ``errors`` (m) added to the heights (kept > 0)."""
    h = np.maximum(np.asarray(layout.height) + errors, 1e-9)
    return dataclasses.replace(layout, height=h)


def _blend(m0: np.ndarray, ms: np.ndarray, t: np.ndarray) -> np.ndarray:
    """m0 + t (ms - m0) where both are finite, else the nearer sample (t in [0, 1])."""
    both = np.isfinite(m0) & np.isfinite(ms)
    with np.errstate(invalid="ignore"):
        lin = m0 + t * (ms - m0)
    return np.where(both, lin, np.where(t < 0.5, m0, ms))


def interpolated_traces(layout, study, context, errors: np.ndarray) -> list:
    """Traces of ``layout`` with each row of ``errors`` (m) added to the heights, from modes
    interpolated between h - tol, h, h + tol (see module docstring)."""
    from optgrade import propagation

    sur = context.surrogate
    freq = propagation.study_frequencies(study)
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
            side = np.where(is_up[(None,) * (v0.ndim - 2) + (slice(None), None)],
                            getattr(m_up, name), getattr(m_dn, name))
            tt = np.abs(t)[(None,) * (v0.ndim - 2) + (slice(None), None)]
            if np.iscomplexobj(v0):
                fields[name] = _blend(v0.real, side.real, tt) + 1j * _blend(v0.imag, side.imag, tt)
            else:
                fields[name] = _blend(v0, side, tt)
        modes = SimpleNamespace(**fields)
        out.append(propagation.march(modes, layout.x, layout.spacing, freq,
                                     float(study.substrate.cr)))
    return out


@register
class Robustness(Objective):
    name = "robustness"
    direction = "maximize"
    is_composite = True
    #: interpolate local modes between h -/+ tol (True) or trace every draw in full (False)
    is_interpolated = True

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        if context.trace_fn is None:
            raise ValueError("robustness needs context.trace_fn to trace perturbed layouts")
        nominal = main_score(trace, layout, study, context)
        rng = np.random.default_rng([int(study.meta.seed), 20260517])
        tol = np.asarray(layout.height_tol, dtype=float)
        unit = rng.uniform(-1.0, 1.0, size=(N_DRAWS, tol.size if tol.size else 1))
        errors = unit[:, : tol.size] * tol
        lays = [perturbed(layout, e) for e in errors]
        if self.is_interpolated and hasattr(context.surrogate, "local_modes"):
            traces = interpolated_traces(layout, study, context, errors)
        else:
            traces = [context.trace_fn(lay) for lay in lays]
        scores = np.asarray([main_score(tr, lay, study, context)
                             for tr, lay in zip(traces, lays, strict=True)])
        return ObjectiveValue(
            float(np.quantile(scores, QUANTILE)),
            {
                "nominal": float(nominal),
                "quantile": QUANTILE,
                "n_draws": N_DRAWS,
                "mean": float(scores.mean()),
                "min": float(scores.min()),
            },
        )
