"""Helpers shared by the goal modules (private)."""

from __future__ import annotations

from typing import Any

import numpy as np

CONVERTED = ("forward_shear", "forward_compressional", "backward_shear", "backward_compressional")


def wanted_fraction(trace: Any, channel: str) -> np.ndarray:
    """Fraction of the incoming power in the wanted channel per frequency (``blocking`` =
    1 - transmitted surface power)."""
    if channel == "blocking":
        return 1.0 - np.asarray(trace.fractions["transmitted_surface"], dtype=float)
    return np.asarray(trace.fractions[channel], dtype=float)
