"""Goal ``worst``: the wanted-channel fraction at the worst frequency of the band (``blocking``:
the insertion blocking of objectives/blocking.py)."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register
from optgrade.objectives._common import wanted_fraction


@register
class WorstChannelFraction(Objective):
    name = "worst"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        frac = np.nan_to_num(wanted_fraction(trace, study.goal.channel, layout, study), nan=0.0)
        i = int(np.argmin(frac))
        return ObjectiveValue(
            float(frac[i]),
            {"channel": study.goal.channel, "worst_frequency_hz": float(trace.frequency[i])},
        )
