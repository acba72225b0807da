"""What the dispersion stage hands on: local Bloch modes, the row request, the dispersion protocol.

`LocalModes` holds the local Bloch modes of cells at frequencies, with a per-point status
(exact root, first-order estimate, absent, not solved) in the manner of a root finder's
result flag. `RowPath` is a request a caller may pass to ``local_modes``: the cells are a row in
order from the entry, and per frequency one path is followed, from the entry cell until (and
including) the first cell where neither branch has a root: the first of the caller's
``entry_order`` that has a root at the entry cell, the other branch from a cell where the
followed one has none but the other has. `Dispersion` is what a propagation model
needs from the dispersion stage (the surrogate, or anything else with the same two members).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "ABSENT",
    "Dispersion",
    "FIRST_ORDER",
    "LocalModes",
    "NOT_SOLVED",
    "ROOT",
    "RowPath",
    "status_from",
]

#: status codes of `LocalModes.status` (int8)
NOT_SOLVED = -1  # outside the request (a row request's unvisited points); k is nan
ABSENT = 0  # solved, no root on this branch (local gap, or an overdamped root dropped)
ROOT = 1  # a root of the dispersion relation (Newton converged and accepted, or exact real)
FIRST_ORDER = 2  # first-order estimate K'' = -Im D / Re D' (near a branch point)

#: A row request (and the march) continues on the other branch where the followed one has no
#: root and the other one has. Within this relative change of the last cell's K' it is one
#: physical branch that changes its label (slower / faster than Rayleigh) where it crosses the
#: Rayleigh line at a rod anti-resonance (issue 13 item 2, docs/physics.md section 11.3);
#: beyond it the march treats the cell as a step between two branches (partial transmission,
#: optgrade/propagation/_wkb.py step 4a).
SWITCH_TOL = 0.02


@dataclass(frozen=True)
class LocalModes:
    """Local Bloch modes of cells j at frequencies f (contract in DEVELOPERS.md).

    k : complex (2, n_cells, n_freq) Bloch wavenumber K' + i K'' (1/m); branch 0 = lower
        (surface) branch, branch 1 = upper branch above the rod resonance; nan where absent
        or not solved.
    shares : float (2, 5, n_cells, n_freq) split of K'' over [forward_shear,
        forward_compressional, backward_shear, backward_compressional, absorbed]; sums to 1
        where K'' > 0.
    angle : float (2, 4, n_cells, n_freq) radiation angle from the surface normal (rad) of the
        four radiating channels, negative = pointing back to the source; nan where closed.
    status : int8 (2, n_cells, n_freq) ROOT, FIRST_ORDER, ABSENT or NOT_SOLVED per point;
        k is finite exactly where the status is ROOT or FIRST_ORDER.
    """

    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray
    status: np.ndarray

    @property
    def is_first_order(self) -> np.ndarray:
        """(2, n_cells, n_freq) bool: K is the first-order estimate, not a converged root."""
        return self.status == FIRST_ORDER

    @property
    def is_solved(self) -> np.ndarray:
        """(2, n_cells, n_freq) bool: the point was solved (root, estimate or absent)."""
        return self.status != NOT_SOLVED


def status_from(k: np.ndarray, is_first_order: np.ndarray) -> np.ndarray:
    """Status array (int8) of fully solved points: ROOT where k is finite, FIRST_ORDER where it
    is the first-order estimate, ABSENT where k is nan."""
    finite = np.isfinite(k)
    out = np.where(finite, ROOT, ABSENT).astype(np.int8)
    out[finite & np.asarray(is_first_order, dtype=bool)] = FIRST_ORDER
    return out


@dataclass(frozen=True)
class RowPath:
    """Request for the points along a row: the cells are a row in order from the entry; per
    frequency the branches of ``entry_order`` are tried at the entry cell in turn, the first
    with a root is followed cell by cell (on the other branch from a cell where it has no root
    but the other one has) up to and including the first cell where neither has one.
    Every other point may be left unsolved (status NOT_SOLVED, k nan).

    Attributes
    ----------
    entry_order : tuple of int
        Branch indices (0 lower, 1 upper), distinct, in the order they are tried.
    """

    entry_order: tuple[int, ...] = (0, 1)

    def __post_init__(self) -> None:
        order = tuple(int(b) for b in self.entry_order)
        if not order or len(set(order)) != len(order) or any(b not in (0, 1) for b in order):
            raise ValueError(f"entry_order: distinct branches 0 or 1 needed, got {order}")
        object.__setattr__(self, "entry_order", order)


@runtime_checkable
class Dispersion(Protocol):
    """What a propagation model needs from the dispersion stage."""

    @property
    def cr(self) -> float:
        """Rayleigh speed of the bare ground (m/s)."""
        ...

    def local_modes(
        self,
        height: ArrayLike,
        spacing: ArrayLike,
        head_mass: ArrayLike,
        freq: ArrayLike,
        *,
        path: RowPath | None = None,
    ) -> LocalModes:
        """Local modes of cells (height m, spacing m, head mass kg) at freq (Hz); with ``path``
        at least the points of that row request are solved (more may be)."""
        ...
