"""Which dispersion engine a study gets: the compiled surrogate or the direct band solver.

Both give the same `local_modes(height, spacing, head_mass, freq) -> LocalModes` (the contract in
DEVELOPERS.md). The surrogate (`optgrade.dispersion._surrogate`) is fast but knows the compiled
point functions of the half-space and the axial rod only; every other registered ground or
resonator type is solved by the direct band solver (`optgrade.dispersion._direct`), which uses the
`Ground` and `Resonator` interfaces only. A new ground or resonator type therefore needs no change
here: it is one module plus its registration.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from optgrade.dispersion._direct import direct_local_modes, validity_warnings
from optgrade.dispersion._lattice import MODELS
from optgrade.dispersion._modes import Dispersion, RowPath
from optgrade.dispersion._surrogate import surrogate_for_study
from optgrade.ground import Ground, ground_of
from optgrade.resonators import Resonator, resonator_of

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.dispersion._surrogate import LocalModes
    from optgrade.study import Study

__all__ = ["DirectDispersion", "dispersion_for_study"]


@dataclass(frozen=True)
class DirectDispersion:
    """Local modes by direct root solves (lattice summed exactly, no tables, no cache).

    Works for any registered ground and resonator type; much slower per point than the
    surrogate, so meant for new kinds of part, checks and short rows.

    Attributes
    ----------
    substrate : Ground
        The ground (the attribute name matches `Surrogate.substrate`).
    rod : Resonator
        The resonator type (the attribute name matches `Surrogate.rod`).
    row_pitch : float
        Pitch b between resonators across the row (m).
    model : {"lattice", "line", "homogenised"}
        Lattice-sum variant (`optgrade.dispersion._lattice`).
    warnings : tuple of str
        Model-validity notes for the study's spacing range and band (plain sentences).
    """

    substrate: Ground
    rod: Resonator
    row_pitch: float
    model: str = "lattice"
    warnings: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.model not in MODELS:
            raise ValueError(f"model must be one of {MODELS}, got {self.model!r}")
        if not (self.row_pitch > 0):
            raise ValueError(f"row_pitch must be positive (m), got {self.row_pitch}")

    @classmethod
    def from_study(cls, study: Study, model: str | None = None) -> DirectDispersion:
        """The direct solver for a validated study's ground, resonator type and row pitch;
        ``model`` defaults to ``study.goal.model``."""
        ground = ground_of(study)
        resonator = resonator_of(study)
        model = model or study.goal.model
        row_pitch = float(study.resonator.row_pitch)
        notes = validity_warnings(
            ground,
            resonator,
            float(study.layout.spacing[1]),
            row_pitch,
            float(study.goal.band[1]),
            model,
        )
        return cls(ground, resonator, row_pitch, model, tuple(notes))

    @property
    def cr(self) -> float:
        """Rayleigh speed of the bare ground (m/s)."""
        return float(self.substrate.cr)

    def local_modes(
        self,
        height: ArrayLike,
        spacing: ArrayLike,
        head_mass: ArrayLike,
        freq: ArrayLike,
        *,
        path: RowPath | None = None,
    ) -> LocalModes:
        """Local Bloch modes of cells (arrays broadcast together: height m, spacing m, head
        mass kg) at frequencies ``freq`` (Hz); see `direct_local_modes`. Every point is solved,
        whatever the row request ``path``."""
        return direct_local_modes(
            self.substrate,
            self.rod,
            self.row_pitch,
            height,
            spacing,
            head_mass,
            np.atleast_1d(np.asarray(freq, dtype=float)),
            self.model,
        )


def dispersion_for_study(
    study: Study, model: str | None = None, cache_dir=None
) -> Dispersion:
    """The dispersion engine for a validated study.

    The compiled surrogate (`Surrogate.from_study`, tables cached in ``cache_dir``) where both
    the study's ground and resonator type have compiled point functions
    (``has_compiled_points``), otherwise a :class:`DirectDispersion`. ``model`` (lattice-sum
    variant) defaults to ``study.goal.model``.
    """
    if ground_of(study).has_compiled_points and resonator_of(study).has_compiled_points:
        return surrogate_for_study(study, model=model, cache_dir=cache_dir)
    return DirectDispersion.from_study(study, model=model)
