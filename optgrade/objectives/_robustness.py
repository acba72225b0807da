"""Goal ``robustness``: a low quantile (10 %) of the main weighted score over random machining
errors. Each draw adds an independent error, uniform in +/- the height tolerance, to every rod
height; the draws are seeded from the study seed (common random numbers: every candidate sees
the same errors, so scores are deterministic and comparable).

The perturbed layouts are traced through the evaluation context with the study's propagation
model (``context.trace_height_errors``, which for the WKB march interpolates local modes between
h - tol, h, h + tol: ``optgrade.propagation.height_error_traces``); a context without it traces
each draw with ``context.trace_fn``. The goal itself never calls the dispersion or propagation
stages.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from optgrade.layout import with_height_errors
from optgrade.objectives import EvalContext, Objective, ObjectiveValue, main_score, register
from optgrade.objectives._common import wanted_fraction

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation import Trace
    from optgrade.study import Study

N_DRAWS = 12
QUANTILE = 0.10


def height_errors(layout: Layout, seed: int) -> np.ndarray:
    """The machining errors (m) of the draws, shape (N_DRAWS, n_resonators): uniform in
    +/- ``layout.height_tol``, the same for every candidate of a study (seeded by ``seed``)."""
    rng = np.random.default_rng([int(seed), 20260517])
    tol = np.asarray(layout.height_tol, dtype=float)
    unit = rng.uniform(-1.0, 1.0, size=(N_DRAWS, tol.size if tol.size else 1))
    return unit[:, : tol.size] * tol


@register
class Robustness(Objective):
    name = "robustness"
    direction = "maximize"
    is_composite = True

    def evaluate(
        self, trace: Trace, layout: Layout, study: Study, context: EvalContext
    ) -> ObjectiveValue:
        nominal = main_score(trace, layout, study, context)
        errors = height_errors(layout, study.meta.seed)
        lays = [with_height_errors(layout, e) for e in errors]
        if context.trace_height_errors is not None:
            traces = context.trace_height_errors(layout, errors)
        elif context.trace_fn is not None:
            traces = [context.trace_fn(lay) for lay in lays]
        else:
            raise ValueError("robustness needs context.trace_fn or context.trace_height_errors "
                             "to trace perturbed layouts")
        scores = np.asarray([main_score(tr, lay, study, context)
                             for tr, lay in zip(traces, lays, strict=True)])
        # the wanted fraction per frequency over the draws: its 10-90 % spread is the
        # tolerance band of the fractions plot
        wanted = np.asarray([np.nan_to_num(wanted_fraction(tr, study.goal.channel, lay, study))
                             for tr, lay in zip(traces, lays, strict=True)])
        return ObjectiveValue(
            float(np.quantile(scores, QUANTILE)),
            {
                "nominal": float(nominal),
                "quantile": QUANTILE,
                "n_draws": N_DRAWS,
                "mean": float(scores.mean()),
                "min": float(scores.min()),
                "wanted_p10": np.quantile(wanted, 0.1, axis=0).tolist(),
                "wanted_p90": np.quantile(wanted, 0.9, axis=0).tolist(),
            },
        )
