"""Goal ``channel``: mean fraction of the incoming power sent into the wanted channel over the
band (study.goal.channel; ``blocking`` means the insertion blocking of objectives/blocking.py),
with the worst frequency in the details."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register
from optgrade.objectives._common import wanted_fraction


@register
class ChannelFraction(Objective):
    name = "channel"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        frac = np.nan_to_num(wanted_fraction(trace, study.goal.channel, layout, study), nan=0.0)
        f = np.asarray(trace.frequency, dtype=float)
        i = int(np.argmin(frac))
        return ObjectiveValue(
            float(frac.mean()),
            {
                "channel": study.goal.channel,
                "mean": float(frac.mean()),
                "worst": float(frac[i]),
                "worst_frequency_hz": float(f[i]),
                "n_frequencies_meeting_required": int(
                    np.sum(frac >= study.goal.required_fraction)
                ),
                "n_frequencies": int(frac.size),
            },
        )
