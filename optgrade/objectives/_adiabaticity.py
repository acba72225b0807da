"""Goal ``adiabaticity`` (minimised penalty): how far the grading leaves the validity of the
adiabatic (WKB) march, mean over the band of max(0, eps_max / 0.1 - 1), where eps_max is the
largest adiabaticity parameter |K_{j+1} - K_j| / (a_j K_j^2) on the path (docs/physics.md s. 6.6:
results with eps above about 0.1 are outside the model's validity)."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register

EPS_LIMIT = 0.1


@register
class AdiabaticityPenalty(Objective):
    name = "adiabaticity"
    direction = "minimize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        eps = np.nan_to_num(np.asarray(trace.eps_max, dtype=float), nan=0.0, posinf=1e3)
        penalty = np.maximum(0.0, eps / EPS_LIMIT - 1.0)
        return ObjectiveValue(
            float(penalty.mean()),
            {
                "eps_max": float(eps.max()) if eps.size else 0.0,
                "n_non_adiabatic": int(np.sum(eps > EPS_LIMIT)),
                "eps_limit": EPS_LIMIT,
            },
        )
