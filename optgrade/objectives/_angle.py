"""Goal ``angle``: share of the incoming power converted into bulk waves that leave inside the
angle window ``study.goal.angle_window_deg`` (degrees from the surface normal, negative = back
towards the source), band mean. Counts only the wanted channel if it is a converted channel,
otherwise all four converted channels. Without a window every converted wave counts."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register
from optgrade.objectives._common import CONVERTED


@register
class AngleWindow(Objective):
    name = "angle"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        chans = (study.goal.channel,) if study.goal.channel in CONVERTED else CONVERTED
        window = study.goal.angle_window_deg
        total = np.zeros_like(np.asarray(trace.frequency, dtype=float))
        converted = np.zeros_like(total)
        for c in chans:
            frac = np.nan_to_num(np.asarray(trace.fractions[c], float), nan=0.0)
            converted += frac
            if window is None:
                total += frac
                continue
            ang = np.asarray(trace.angle[c], dtype=float)
            lo, hi = min(window), max(window)
            is_in = np.isfinite(ang) & (ang >= lo) & (ang <= hi)
            total += np.where(is_in, frac, 0.0)
        share = np.divide(total.sum(), converted.sum()) if converted.sum() > 0 else 0.0
        return ObjectiveValue(
            float(total.mean()),
            {
                "window_deg": list(window) if window is not None else None,
                "channels": list(chans),
                "mean_converted": float(converted.mean()),
                "share_of_converted_in_window": float(share),
            },
        )
