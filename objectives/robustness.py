"""Goal ``robustness``: a low quantile (10 %) of the main weighted score over random machining
errors. Each draw adds an independent error, uniform in +/- the height tolerance, to every rod
height; the draws are seeded from the study seed (common random numbers: every candidate sees
the same errors, so scores are deterministic and comparable) and traced with the same surrogate
through ``context.trace_fn``."""

from __future__ import annotations

import dataclasses

import numpy as np

from objectives import Objective, ObjectiveValue, main_score, register

N_DRAWS = 12
QUANTILE = 0.10


def perturbed(layout, errors: np.ndarray):
    """Copy of ``layout`` with ``errors`` (m) added to the heights (kept > 0)."""
    h = np.maximum(np.asarray(layout.height) + errors, 1e-9)
    return dataclasses.replace(layout, height=h)


@register
class Robustness(Objective):
    name = "robustness"
    direction = "maximize"
    is_composite = True

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        if context.trace_fn is None:
            raise ValueError("robustness needs context.trace_fn to trace perturbed layouts")
        nominal = main_score(trace, layout, study, context)
        rng = np.random.default_rng([int(study.meta.seed), 20260517])
        tol = np.asarray(layout.height_tol, dtype=float)
        unit = rng.uniform(-1.0, 1.0, size=(N_DRAWS, tol.size if tol.size else 1))
        scores = []
        for k in range(N_DRAWS):
            lay = perturbed(layout, unit[k, : tol.size] * tol)
            scores.append(main_score(context.trace_fn(lay), lay, study, context))
        scores = np.asarray(scores)
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
