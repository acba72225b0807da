"""Goal ``blocking``: surface wave stopped, 1 - transmitted surface fraction, band mean."""

from __future__ import annotations

import numpy as np

from objectives import Objective, ObjectiveValue, register


@register
class SurfaceBlocking(Objective):
    name = "blocking"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        t = np.nan_to_num(np.asarray(trace.fractions["transmitted_surface"], float), nan=1.0)
        blocked = 1.0 - t
        i = int(np.argmin(blocked))
        return ObjectiveValue(
            float(blocked.mean()),
            {
                "mean_transmitted": float(t.mean()),
                "worst": float(blocked[i]),
                "worst_frequency_hz": float(trace.frequency[i]),
            },
        )
