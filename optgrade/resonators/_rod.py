"""Base dynamic stiffness of surface resonators (docs/physics.md section 4).

Z(w) is the vertical force the resonator applies to the surface per unit vertical base
displacement, both positive into the solid, for time dependence exp(-i w t). A rigid mass gives
Z = M w^2 > 0.

Material damping: complex Young's modulus E (1 - i eta). With exp(-i w t) the power flowing from
the surface into the resonator is (w / 2) |u|^2 Im Z, and this sign convention gives Im Z >= 0
for eta > 0 (energy absorbed; tested in tests/test_resonators.py).

Thin-rod (axial) theory only: valid while the rod diameter is small against the bar wavelength
(flag d > lambda_r / 5); bending modes, which couple to horizontal motion, are not represented.
"""

from __future__ import annotations

import cmath
import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from numba import njit
from numpy.typing import ArrayLike
from scipy.optimize import brentq

from optgrade.resonators._base import RESONATORS, Resonator
from optgrade.units import format_eng as _eng

__all__ = [
    "Rod",
    "oscillator_stiffness",
    "rod_compliance",
    "rod_resonances",
    "rod_stiffness",
    "is_thin_rod",
]


@RESONATORS.register
@dataclass(frozen=True)
class Rod(Resonator):
    """Cylindrical rod (pin, post) standing on the surface, axial motion only, with an optional
    head mass (registered as resonator ``axial_rod``).

    Attributes
    ----------
    youngs_modulus : float
        Young's modulus E (Pa).
    density : float
        Mass density rho_r (kg/m^3).
    diameter : float
        Rod diameter d (m); the contact disc has radius d / 2.
    loss_factor : float
        Loss factor eta of the complex modulus E (1 - i eta), dimensionless.
    """

    name: ClassVar[str] = "axial_rod"
    youngs_modulus: float
    density: float
    diameter: float
    loss_factor: float = 0.0

    def __post_init__(self) -> None:
        for name in ("youngs_modulus", "density", "diameter"):
            if not (getattr(self, name) > 0):
                raise ValueError(f"{name} must be positive, got {getattr(self, name)}")
        if not (0.0 <= self.loss_factor < 1.0):
            raise ValueError(f"loss_factor must be in [0, 1), got {self.loss_factor}")

    @property
    def area(self) -> float:
        """Cross-section area A = pi d^2 / 4 (m^2)."""
        return float(np.pi * self.diameter**2 / 4.0)

    @property
    def bar_speed(self) -> float:
        """Bar (rod) speed c_r = sqrt(E / rho_r) (m/s), lossless."""
        return float(np.sqrt(self.youngs_modulus / self.density))

    @classmethod
    def from_spec(cls, spec: Any) -> Rod:
        """The rod of a study's ``[resonator]`` section (SI)."""
        return cls(
            float(spec.youngs_modulus),
            float(spec.density),
            float(spec.diameter),
            float(spec.loss_factor or 0.0),
        )

    def compliance(self, w: ArrayLike, height: ArrayLike, head_mass: ArrayLike) -> np.ndarray:
        """Base compliance 1/Z (m/N); see :func:`rod_compliance`."""
        return rod_compliance(w, self, height, head_mass)

    def resonances(self, height: float, head_mass: float = 0.0, n_modes: int = 1) -> np.ndarray:
        """Axial resonances with the base held (Hz); see :func:`rod_resonances`."""
        return rod_resonances(
            height, self.diameter, self.youngs_modulus, self.density, head_mass, n_modes
        )

    def validity_notes(self, freq_max: float) -> list[str]:
        """Where thin-rod axial theory is stretched up to ``freq_max`` (Hz): d > lambda_r / 5
        (`is_thin_rod`), and always that bending modes are not represented."""
        out = []
        if not bool(np.all(is_thin_rod(freq_max, self))):
            out.append(
                f"rod diameter {_eng(self.diameter, 'm')} exceeds a fifth of the bar wavelength at "
                f"{_eng(freq_max, 'Hz')}: thin-rod theory is stretched"
            )
        out.append("axial rod motion only: bending modes of the rods are not represented")
        return out

    @property
    def has_compiled_points(self) -> bool:
        return True


def rod_constants(rod: Rod) -> tuple[complex, complex]:
    """(A sqrt(E rho), sqrt(rho / E)) of a rod with complex modulus E (1 - i eta): the
    constants `rod_parts_at` takes (kg/s, s/m)."""
    e_c = rod.youngs_modulus * complex(1.0, -rod.loss_factor)
    return rod.area * cmath.sqrt(e_c * rod.density), cmath.sqrt(rod.density / e_c)


@njit(cache=True)
def rod_parts_at(w, height, head_mass, a_root, slowness):
    """Numerator and denominator of Z = E A k_r (sin + q cos) / (cos - q sin) at one point:
    angular frequency w (rad/s), rod height (m), head mass (kg) and the rod's constants from
    `rod_constants`. Compiled, so that the surrogate's kernel evaluates the rod only where it
    solves; `rod_stiffness` and `rod_compliance` use the same function."""
    # E A k_r = A sqrt(E rho) w  (impedance-like factor, N/m)
    eak = a_root * w
    phase = w * slowness * height
    # sin and cos of the complex phase from one real sin and cos and one expm1 (cosh and sinh
    # of y from em = e^|y| - 1 without cancellation: sinh |y| = em (2 + em) / (2 (1 + em)),
    # cosh y = 1 + em^2 / (2 (1 + em)))
    x = phase.real
    y = phase.imag
    sx, cx = math.sin(x), math.cos(x)
    em = math.expm1(abs(y))
    half = 0.5 / (1.0 + em)
    sh = math.copysign(em * ((2.0 + em) * half), y)
    ch = 1.0 + em * (em * half)
    s = complex(sx * ch, cx * sh)
    c = complex(cx * ch, -sx * sh)
    # q = M w^2 / (E A k_r) = M w / (A sqrt(E rho)), finite at w = 0
    qq = head_mass * w / a_root
    return eak * (s + qq * c), c - qq * s


@njit(cache=True)
def _rod_parts_flat(w, height, head_mass, a_root, slowness, num, den):
    for i in range(w.size):
        num[i], den[i] = rod_parts_at(w[i], height[i], head_mass[i], a_root, slowness)


def _rod_parts(w, rod: Rod, height, head_mass):
    """Return numerator and denominator of Z = EAk (sin + q cos) / (cos - q sin), arrays
    broadcast together."""
    w, height, head_mass = np.broadcast_arrays(
        np.asarray(w, dtype=float),
        np.asarray(height, dtype=float),
        np.asarray(head_mass, dtype=float),
    )
    num = np.empty(w.shape, dtype=complex)
    den = np.empty(w.shape, dtype=complex)
    _rod_parts_flat(
        np.ravel(w),
        np.ravel(height),
        np.ravel(head_mass),
        *rod_constants(rod),
        num.reshape(-1),
        den.reshape(-1),
    )
    return num, den


def rod_stiffness(
    w: ArrayLike, rod: Rod, height: ArrayLike, head_mass: ArrayLike = 0.0
) -> np.ndarray:
    """Base dynamic stiffness Z(w) of an axial rod with an optional head mass (N/m).

    Z = E A k_r (tan(k_r L) + q) / (1 - q tan(k_r L)), q = M w^2 / (E A k_r), k_r = w / c_r
    (thin-rod theory, docs/physics.md section 4.1; written with sin/cos to stay finite).

    Parameters
    ----------
    w : array_like
        Angular frequency (rad/s).
    rod : Rod
        Rod material and diameter.
    height : array_like
        Rod height L (m), broadcast against w and head_mass.
    head_mass : array_like
        Head (tip) mass M (kg), default 0.

    Returns
    -------
    ndarray, complex
        Z in N/m; -> (m_rod + M) w^2 at low frequency; infinite at the resonances.
    """
    num, den = _rod_parts(w, rod, height, head_mass)
    with np.errstate(divide="ignore", invalid="ignore"):
        return num / den


def rod_compliance(
    w: ArrayLike, rod: Rod, height: ArrayLike, head_mass: ArrayLike = 0.0
) -> np.ndarray:
    """Inverse base stiffness 1/Z(w) of a rod with head mass (m/N); zero at the resonances.

    Same model as `rod_stiffness`; this is the quantity the Bloch dispersion relation
    1/Z = Sigma needs (docs/physics.md section 5.1), finite at the rod resonances.
    """
    num, den = _rod_parts(w, rod, height, head_mass)
    with np.errstate(divide="ignore", invalid="ignore"):
        return den / num


def oscillator_stiffness(
    w: ArrayLike, mass: ArrayLike, w0: ArrayLike, loss_factor: float = 0.0
) -> np.ndarray:
    """Base stiffness of a lumped mass-spring oscillator (N/m).

    Z = M w^2 w0^2 (1 - i eta) / (w0^2 (1 - i eta) - w^2) (docs/physics.md section 4.4; the spring
    carries the complex stiffness k (1 - i eta)).

    Parameters
    ----------
    w : array_like
        Angular frequency (rad/s).
    mass : array_like
        Oscillating mass M (kg).
    w0 : array_like
        Natural angular frequency sqrt(k / M) (rad/s).
    loss_factor : float
        Loss factor eta of the spring.
    """
    w = np.asarray(w, dtype=float)
    w02 = np.asarray(w0, dtype=float) ** 2 * complex(1.0, -loss_factor)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(mass) * w**2 * w02 / (w02 - w**2)


def rod_resonances(
    height: float,
    diameter: float,
    youngs_modulus: float,
    density: float,
    head_mass: float = 0.0,
    n_modes: int = 1,
) -> np.ndarray:
    """Axial resonance frequencies of a base-excited rod with a free (or mass-loaded) top (Hz).

    The base is held (the surface displacement is the input), so the resonances are the poles of
    Z: without head mass f_n = (2n - 1) c_r / (4 L); with head mass M the roots of
    (k L) tan(k L) = m_rod / M (axial bar with tip mass, R. D. Blevins, *Formulas for Natural
    Frequency and Mode Shape*, 1979).

    Parameters
    ----------
    height, diameter : float
        Rod height L and diameter d (m).
    youngs_modulus, density : float
        Rod modulus E (Pa) and density (kg/m^3).
    head_mass : float
        Tip mass M (kg), default 0.
    n_modes : int
        Number of modes returned.

    Returns
    -------
    ndarray
        The first n_modes resonance frequencies (Hz), increasing.
    """
    if not (height > 0 and diameter > 0 and youngs_modulus > 0 and density > 0):
        raise ValueError("height, diameter, youngs_modulus and density must be positive")
    if head_mass < 0:
        raise ValueError("head_mass must be >= 0")
    c = float(np.sqrt(youngs_modulus / density))
    n = np.arange(1, int(n_modes) + 1)
    if head_mass == 0.0:
        x = (2 * n - 1) * np.pi / 2.0
    else:
        m_rod = density * np.pi * diameter**2 / 4.0 * height
        ratio = m_rod / head_mass
        # one root of x tan x = ratio in each ((n-1) pi, (n-1) pi + pi/2)
        x = np.array(
            [
                brentq(
                    lambda t: t * np.sin(t) - ratio * np.cos(t),
                    (k - 1) * np.pi + 1e-300,
                    (k - 1) * np.pi + np.pi / 2.0,
                    xtol=1e-14,
                )
                for k in n
            ]
        )
    return x * c / (2.0 * np.pi * height)


def is_thin_rod(freq: ArrayLike, rod: Rod) -> np.ndarray:
    """Whether thin-rod theory holds: d <= lambda_r / 5 with lambda_r = c_r / f (bool array).

    Rule of thumb (common practice, stated in docs/physics.md section 4.5).
    """
    freq = np.asarray(freq, dtype=float)
    return rod.diameter <= rod.bar_speed / np.maximum(freq, 1e-300) / 5.0
