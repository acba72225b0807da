"""Fast local dispersion from tabulated lattice sums (surrogate) -> LocalModes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["LocalModes"]


@dataclass(frozen=True)
class LocalModes:
    """Local Bloch modes of cells j at frequencies f (contract in DEVELOPERS.md).

    k : complex (2, n_cells, n_freq) Bloch wavenumber K' + i K'' (1/m); branch 0 = lower
        (surface) branch, branch 1 = upper branch above the rod resonance; nan where absent.
    shares : float (2, 5, n_cells, n_freq) split of K'' over [forward_shear,
        forward_compressional, backward_shear, backward_compressional, absorbed]; sums to 1
        where K'' > 0.
    angle : float (2, 4, n_cells, n_freq) radiation angle from the surface normal (rad) of the
        four radiating channels, negative = pointing back to the source; nan where closed.
    """

    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray
