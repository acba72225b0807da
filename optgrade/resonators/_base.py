"""The small base every resonator type implements.

The dispersion and propagation stages need from a resonator: its footprint (contact diameter),
its base compliance 1/Z(w) for a given height and head mass (m/N; finite at the resonances, zero
there), and its resonance frequencies. A new resonator type is one module with one subclass
registered with :data:`RESONATORS`; the study names it in ``[resonator] kind``.

The direct band solver (`optgrade.dispersion._direct`) uses this interface only, so any registered
type runs through it; the compiled surrogate knows the axial rod's point function only
(:attr:`Resonator.has_compiled_points`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import TYPE_CHECKING, ClassVar

import numpy as np
from numpy.typing import ArrayLike

from optgrade._registry import Registry

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.study import ResonatorSpec, Study


class Resonator(ABC):
    """A resonator type of one material and diameter; height and head mass vary per cell.

    Implementations are frozen dataclasses with at least ``diameter`` (m) and ``loss_factor``.
    """

    name: ClassVar[str] = ""
    diameter: float
    loss_factor: float

    @classmethod
    @abstractmethod
    def from_spec(cls, spec: ResonatorSpec) -> Resonator:
        """The resonator type a study's ``[resonator]`` section describes (SI)."""

    @property
    def radius(self) -> float:
        """Contact radius d / 2 (m)."""
        return 0.5 * self.diameter

    @abstractmethod
    def compliance(self, w: ArrayLike, height: ArrayLike, head_mass: ArrayLike) -> np.ndarray:
        """Base compliance 1/Z (m/N) at angular frequency w (rad/s), arrays broadcast together;
        Z is the force on the surface per unit base displacement (both into the solid)."""

    @abstractmethod
    def resonances(self, height: float, head_mass: float = 0.0, n_modes: int = 1) -> np.ndarray:
        """The first ``n_modes`` resonance frequencies with the base held (Hz), increasing."""

    def validity_notes(self, freq_max: float) -> list[str]:
        """Plain sentences on where this resonator model is stretched up to ``freq_max`` (Hz);
        the band solver appends them to its own model-validity warnings."""
        return []

    @property
    def has_compiled_points(self) -> bool:
        """True where the compiled dispersion kernel knows this resonator's point function (the
        axial rod); other types are solved by the direct (numpy) band solver."""
        return False


#: Registered resonator types by name (``[resonator] kind``).
RESONATORS: Registry[Resonator] = Registry("resonator", builtin=("optgrade.resonators._rod",))


def resonator_of(study: Study) -> Resonator:
    """The resonator type of a validated study: the registered ``study.resonator.kind``."""
    return RESONATORS.get(study.resonator.kind).from_spec(study.resonator)
