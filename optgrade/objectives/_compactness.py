"""Goal ``compactness`` (minimised): mean of three ratios to their allowed maxima: row length /
max_length, count / largest count, added mass (rods + head masses) / the mass of the largest
allowed row of the tallest, heaviest resonators."""

from __future__ import annotations

import numpy as np

from optgrade.objectives import Objective, ObjectiveValue, register


@register
class Compactness(Objective):
    name = "compactness"
    direction = "minimize"

    def evaluate(self, trace, layout, study, context) -> ObjectiveValue:
        h = np.asarray(layout.height, dtype=float)
        d = np.asarray(layout.diameter, dtype=float)
        m_head = np.asarray(layout.head_mass, dtype=float)
        rho = study.resonator.density
        rod_mass = rho * np.pi * d**2 / 4 * h
        added = float(rod_mass.sum() + m_head.sum())
        n_max = study.layout.count[1]
        d0 = study.resonator.diameter
        rod_max = rho * np.pi * d0**2 / 4 * study.layout.height[1]
        m_max = n_max * (rod_max + study.resonator.head_mass[1])
        x = np.asarray(layout.x, dtype=float)
        length = float(x[-1] + (x[-1] - x[-2]))
        max_len = study.layout.max_length or length
        ratios = np.array([length / max_len, h.size / n_max, added / m_max])
        return ObjectiveValue(
            float(ratios.mean()),
            {"length_m": length, "n_resonators": int(h.size), "added_mass_kg": added},
        )
