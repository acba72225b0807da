"""The small base every ground (the elastic body under the resonators) implements.

The dispersion stage needs from a ground: its bulk speeds (the shear and compressional cone
edges), density and loss factor, its Rayleigh speed, the vertical surface compliance G(xi^2, w)
(docs/physics.md section 3), the surface-wave pole function whose zero is the Rayleigh pole, and
the split of radiated power between shear and compressional waves. A new ground is one module with
one subclass registered with :data:`GROUNDS`; the study names it in ``[substrate] kind``.

The direct band solver (`optgrade.dispersion._lattice`, `optgrade.dispersion._direct`) uses this
interface only, so any registered ground runs through it; the compiled surrogate knows the
half-space's point functions only (:attr:`Ground.has_compiled_points`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import TYPE_CHECKING, ClassVar

import numpy as np
from numpy.typing import ArrayLike

from optgrade._registry import Registry

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.study import Study, SubstrateSpec


class Ground(ABC):
    """An elastic body seen from its free surface (SI units).

    Implementations are frozen dataclasses with at least ``density`` (kg/m^3), ``cl``, ``ct``
    (m/s) and ``loss_factor`` (dimensionless).
    """

    name: ClassVar[str] = ""
    density: float
    cl: float
    ct: float
    loss_factor: float

    @classmethod
    @abstractmethod
    def from_spec(cls, spec: SubstrateSpec) -> Ground:
        """The ground a study's ``[substrate]`` section describes (SI)."""

    @property
    @abstractmethod
    def cr(self) -> float:
        """Surface-wave (Rayleigh) speed of the lossless ground (m/s)."""

    @abstractmethod
    def compliance_sq(self, xi2: ArrayLike, w: ArrayLike) -> np.ndarray:
        """Vertical surface compliance G as a function of xi^2 (complex; docs/physics.md s. 3.1)."""

    @abstractmethod
    def pole_function(self, xi: ArrayLike, w: ArrayLike) -> np.ndarray:
        """A function of xi whose zeros are the surface-wave poles of G (the Rayleigh function
        for the half-space); the band solver multiplies D by it to remove the pole."""

    @abstractmethod
    def shear_share(self, xi2: ArrayLike, w: ArrayLike) -> np.ndarray:
        """Share of the power radiated by a surface load at real xi that goes into shear waves
        (the rest is compressional), dimensionless 0..1."""

    @abstractmethod
    def lossless(self) -> Ground:
        """The same ground without material loss."""

    @abstractmethod
    def with_loss(self, loss_factor: float) -> Ground:
        """The same ground with another loss factor."""

    @property
    def mu(self) -> float:
        """Shear modulus rho cT^2 (Pa), real part."""
        return self.density * self.ct**2

    @property
    def poisson(self) -> float:
        """Poisson ratio (cL^2 - 2 cT^2) / (2 (cL^2 - cT^2)), dimensionless."""
        return (self.cl**2 - 2.0 * self.ct**2) / (2.0 * (self.cl**2 - self.ct**2))

    def static_compliance_sq(self, xi2: ArrayLike) -> np.ndarray:
        """Static (large-|xi|) limit of the surface compliance, (1 - nu) / (mu |xi|) (m/Pa per
        unit wavenumber, complex through mu (1 - i eta); xi2 in 1/m^2).

        The lattice sums subtract it from G and sum it in closed form (`optgrade.dispersion.
        _lattice`), with the same :attr:`poisson` and :attr:`complex_mu` in the tail, so a
        ground must report a (poisson, complex_mu) pair that gives the large-|xi| limit of its
        own :meth:`compliance_sq` (Flamant / Boussinesq for the half-space; K. L. Johnson,
        *Contact Mechanics*, 1985).
        """
        return (1.0 - self.poisson) / (self.complex_mu * np.sqrt(np.asarray(xi2) + 0j))

    @property
    def complex_factor(self) -> complex:
        """Modulus factor (1 - i eta) of the complex moduli (dimensionless)."""
        return complex(1.0, -self.loss_factor)

    @property
    def complex_speeds(self) -> tuple[complex, complex]:
        """Complex speeds (cL, cT) (1 - i eta)^(1/2) (m/s)."""
        f = np.sqrt(self.complex_factor)
        return complex(self.cl * f), complex(self.ct * f)

    @property
    def complex_mu(self) -> complex:
        """Complex shear modulus mu (1 - i eta) (Pa)."""
        return self.mu * self.complex_factor

    @property
    def has_compiled_points(self) -> bool:
        """True where the compiled dispersion kernel knows this ground's point functions (the
        half-space); other grounds are solved by the direct (numpy) band solver."""
        return False


#: Registered grounds by name (``[substrate] kind``).
GROUNDS: Registry[Ground] = Registry("ground", builtin=("optgrade.ground._halfspace",))


def ground_of(study: Study) -> Ground:
    """The ground of a validated study: the registered kind ``study.substrate.kind``."""
    return GROUNDS.get(study.substrate.kind).from_spec(study.substrate)
