"""Goal ``far_face``: band-mean share of the converted power that arrives inside the far-face
zone of a block (``[goal.far_face] mode = "target"``) or outside it (``mode = "avoid"``).

The share per frequency is the zone integral of the far-face flux of the four bulk channels
over their whole bulk fraction (`optgrade.propagation._farface.zone_fraction`; power beyond the
mapped window counts as outside). With the WKB march (no forces, no map) each channel counts
inside when its ray estimate, position + H tan(angle), lands in the zone. Where nothing is
converted (below 1e-9 of the incident power) nothing arrives: 0 for a target, 1 for an avoided
zone. The study validation requires ``substrate.thickness`` and ``[goal.far_face]``."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register


@register
class FarFace(Objective):
    name = "far_face"
    direction = "maximize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        from optgrade.propagation._farface import zone_fraction

        zone = study.goal.far_face
        face = getattr(trace, "far_face", None)
        if zone is None or face is None:
            raise ValueError("goal far_face: needs substrate.thickness and [goal.far_face] "
                             "(the trace has no far-face record)")
        inside = zone_fraction(face, trace.fractions, zone.x_range)
        if zone.mode == "target":
            per_f = np.nan_to_num(inside, nan=0.0)
        else:
            per_f = 1.0 - np.nan_to_num(inside, nan=0.0)
        return ObjectiveValue(float(np.mean(per_f)), {
            "mode": zone.mode,
            "zone_m": [float(v) for v in zone.x_range],
            "method": face.method,
            "mean_inside_share": float(np.nanmean(inside)) if np.isfinite(inside).any()
            else None,
        })
