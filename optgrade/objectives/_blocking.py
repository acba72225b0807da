"""Goal ``blocking``: surface wave stopped by the array, band mean of the insertion effect
``clip(1 - T_array / T_bare, 0, 1)``.

T_array is the transmitted surface fraction of the trace; T_bare = exp(-2 Im kR L) is what the
bare, damped ground lets through over the same path (row length L, complex Rayleigh wavenumber
kR of the lossy substrate; see ``optgrade.objectives._common.insertion_blocking``). Comparing
with the bare ground keeps soil damping, which attenuates the wave whatever the layout, out of
the score. For a lossless substrate the score is the plain 1 - transmitted fraction. The plain
transmitted fraction stays in the details (``mean_transmitted``, ``mean_blocked_plain``).
"""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register
from optgrade.objectives._common import bare_transmission, insertion_blocking


@register
class SurfaceBlocking(Objective):
    name = "blocking"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        blocked, t = insertion_blocking(trace, layout, study)
        t_bare = bare_transmission(trace, layout, study)
        i = int(np.argmin(blocked))
        return ObjectiveValue(
            float(blocked.mean()),
            {
                "mean_transmitted": float(t.mean()),
                "mean_blocked_plain": float((1.0 - t).mean()),
                "mean_bare_transmitted": float(t_bare.mean()),
                "worst": float(blocked[i]),
                "worst_frequency_hz": float(trace.frequency[i]),
            },
        )
