"""The elastic half-space: Rayleigh function, Rayleigh root and vertical surface compliance.

Conventions (docs/physics.md s. 2): time dependence exp(-i w t), z into the solid, vertical load
and displacement positive into the solid, SI units throughout.

Outgoing branch (docs/physics.md s. 3.2): alpha = sqrt(xi^2 - kL^2) with Re alpha >= 0, taken as
-i sqrt(kL^2 - xi^2) (principal root) inside the cone. The choice between the two forms is made on
Re xi^2 against Re kL^2 (resp. kT^2), so the same expression continues analytically when a
complex Bloch wavenumber moves off the real axis (leaky modes live on the improper sheet of the
radiating harmonics; see `optgrade.dispersion._lattice`).

Material damping of the substrate: both Lame moduli carry the factor (1 - i eta), so the complex
speeds are c (1 - i eta)^(1/2); with exp(-i w t) this makes Im k > 0 (decay): energy is absorbed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property
from typing import Any, ClassVar

import numpy as np
from numba import njit
from numpy.typing import ArrayLike
from scipy.optimize import brentq

from optgrade.ground._base import GROUNDS, Ground

__all__ = [
    "Substrate",
    "compliance_at",
    "compliance_im_at",
    "compliance_re_at",
    "compliance_slope_at",
    "rayleigh_at",
    "rayleigh_product_at",
    "rayleigh_slope_at",
    "shear_share_at",
    "vertical_wavenumber_at",
    "rayleigh_function",
    "rayleigh_speed",
    "shear_share",
    "surface_compliance",
    "vertical_wavenumber",
]


def rayleigh_speed(cl: float, ct: float) -> float:
    """Exact Rayleigh-wave speed cR (m/s) of an isotropic elastic half-space.

    Solves the Rayleigh equation (2 - x)^2 = 4 sqrt(1 - x) sqrt(1 - x ct^2/cl^2), x = cR^2/ct^2,
    on 0 < x < 1 with a bracketing root finder (Lord Rayleigh 1885; J. D. Achenbach, *Wave
    Propagation in Elastic Solids*, 1973, section 5.11).

    Parameters
    ----------
    cl, ct : float
        Compressional and shear speed (m/s), cl > ct > 0.

    Returns
    -------
    float
        cR in m/s, 0 < cR < ct.
    """
    cl = float(cl)
    ct = float(ct)
    if not (ct > 0 and cl > ct):
        raise ValueError(f"need cl > ct > 0, got cl={cl}, ct={ct}")
    s = (ct / cl) ** 2

    def f(x: float) -> float:
        return (2.0 - x) ** 2 - 4.0 * np.sqrt(1.0 - x) * np.sqrt(1.0 - s * x)

    x = brentq(f, 1e-6, 1.0, xtol=1e-15, rtol=1e-15, maxiter=200)
    return ct * float(np.sqrt(x))


@GROUNDS.register
@dataclass(frozen=True)
class Substrate(Ground):
    """Isotropic elastic half-space (registered as ground ``halfspace``).

    Attributes
    ----------
    density : float
        Mass density rho (kg/m^3).
    cl, ct : float
        Compressional and shear wave speeds (m/s).
    loss_factor : float
        Loss factor eta of both Lame moduli (complex modulus M (1 - i eta)), dimensionless.
    """

    name: ClassVar[str] = "halfspace"
    density: float
    cl: float
    ct: float
    loss_factor: float = 0.0

    def __post_init__(self) -> None:
        if not (self.density > 0):
            raise ValueError(f"density must be positive, got {self.density}")
        if not (self.ct > 0 and self.cl > self.ct):
            raise ValueError(f"need cl > ct > 0, got cl={self.cl}, ct={self.ct}")
        if not (0.0 <= self.loss_factor < 1.0):
            raise ValueError(f"loss_factor must be in [0, 1), got {self.loss_factor}")

    @classmethod
    def from_spec(cls, spec: Any) -> Substrate:
        """The half-space of a study's ``[substrate]`` section (SI)."""
        return cls(
            float(spec.density), float(spec.cl), float(spec.ct), float(spec.loss_factor or 0.0)
        )

    @cached_property
    def cr(self) -> float:
        """Rayleigh speed (m/s), exact root of the Rayleigh equation (lossless speeds)."""
        return rayleigh_speed(self.cl, self.ct)

    def compliance_sq(self, xi2: ArrayLike, w: ArrayLike) -> np.ndarray:
        """Surface compliance G(xi^2, w); see :func:`compliance_sq`."""
        return compliance_sq(xi2, w, self)

    def pole_function(self, xi: ArrayLike, w: ArrayLike) -> np.ndarray:
        """The Rayleigh function at the complex speeds; see :func:`rayleigh_function`."""
        cl, ct = self.complex_speeds
        return rayleigh_function(xi, w, cl, ct)

    def shear_share(self, xi2: ArrayLike, w: ArrayLike) -> np.ndarray:
        """Shear share of the radiated power at real xi (lossless speeds); see
        :func:`shear_share`."""
        w = np.asarray(w, dtype=float)
        return shear_share(xi2, (w / self.cl) ** 2, (w / self.ct) ** 2)

    def lossless(self) -> Substrate:
        """The same half-space without material loss."""
        return Substrate(self.density, self.cl, self.ct)

    def with_loss(self, loss_factor: float) -> Substrate:
        """The same half-space with loss factor ``loss_factor``."""
        return Substrate(self.density, self.cl, self.ct, float(loss_factor))

    @property
    def has_compiled_points(self) -> bool:
        return True


def vertical_wavenumber(xi2: ArrayLike, k2: ArrayLike) -> np.ndarray:
    """Vertical wavenumber sqrt(xi^2 - k^2) on the outgoing branch (1/m).

    Parameters
    ----------
    xi2 : array_like, complex
        Squared horizontal wavenumber xi^2 (1/m^2).
    k2 : array_like, complex
        Squared bulk wavenumber kL^2 or kT^2 (1/m^2), Im k2 >= 0 for a lossy solid.

    Returns
    -------
    ndarray, complex
        sqrt(xi^2 - k^2) where Re xi^2 >= Re k^2, and -i sqrt(k^2 - xi^2) (principal roots) inside
        the cone (docs/physics.md s. 3.2). On the real xi axis Re >= 0 (decaying or downgoing); off
        the axis the same expression is the analytic continuation used for leaky roots.
    """
    xi2 = np.asarray(xi2, dtype=complex)
    k2 = np.asarray(k2, dtype=complex)
    d = xi2 - k2
    inside = d.real < 0.0
    return np.where(inside, -1j * np.sqrt(-d), np.sqrt(d))


def _rayleigh_q(xi2: np.ndarray, kl2: np.ndarray, kt2: np.ndarray) -> tuple:
    """R(xi^2) and alpha on arrays. The array form keeps numpy's powers (xi2**3, kt2**4), which
    differ in the last bits from the repeated products of `rayleigh_product_at` (numpy's complex
    power of 3 differs from x*x*x at 53 % of random arguments, of 4 at 81 %): the surrogate's
    tables are built from this form, so it stays as it is (bit-identical tables)."""
    alpha = vertical_wavenumber(xi2, kl2)
    beta = vertical_wavenumber(xi2, kt2)
    a = (2.0 * xi2 - kt2) ** 2
    b = 4.0 * xi2 * alpha * beta
    direct = a - b
    # Rationalised form (a^2 - b^2)/(a + b) with the exact polynomial a^2 - b^2: used where the
    # direct difference cancels (xi >> k), so the static limit keeps full precision.
    num = (
        16.0 * xi2**3 * (kl2 - kt2)
        + 8.0 * xi2**2 * kt2 * (3.0 * kt2 - 2.0 * kl2)
        - 8.0 * xi2 * kt2**3
        + kt2**4
    )
    den = a + b
    use_rational = np.abs(den) >= np.abs(a)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(use_rational, num / np.where(use_rational, den, 1.0), direct)
    return r, alpha


def rayleigh_function(xi: ArrayLike, w: ArrayLike, cl: complex, ct: complex) -> np.ndarray:
    """Rayleigh function R(xi) = (2 xi^2 - kT^2)^2 - 4 xi^2 alpha beta (1/m^4).

    Parameters
    ----------
    xi : array_like
        Horizontal wavenumber (1/m); real or complex.
    w : array_like
        Angular frequency (rad/s); broadcast against xi.
    cl, ct : float or complex
        Compressional and shear speeds (m/s); complex for a lossy solid.

    Returns
    -------
    ndarray, complex
        R on the outgoing branch. Its real zero at xi = w / cR is the Rayleigh equation
        (Achenbach 1973, section 5.11).
    """
    xi = np.asarray(xi)
    w = np.asarray(w)
    kl2 = (w / cl) ** 2
    kt2 = (w / ct) ** 2
    r, _ = _rayleigh_q(np.asarray(xi * xi, dtype=complex), kl2, kt2)
    return r


def compliance_sq(xi2: ArrayLike, w: ArrayLike, substrate: Substrate) -> np.ndarray:
    """Surface compliance G as a function of xi^2 (m/Pa per unit wavenumber area); see below."""
    cl, ct = substrate.complex_speeds
    w = np.asarray(w, dtype=float)
    kl2 = (w / cl) ** 2
    kt2 = (w / ct) ** 2
    xi2 = np.asarray(xi2, dtype=complex)
    r, alpha = _rayleigh_q(xi2, kl2, kt2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return -alpha * kt2 / (substrate.complex_mu * r)


def surface_compliance(xi: ArrayLike, w: ArrayLike, substrate: Substrate) -> np.ndarray:
    """Vertical surface compliance G(xi, w) of the half-space, outgoing branch.

    G = - alpha kT^2 / (mu R(xi)) relates the vertical surface displacement to the vertical
    surface traction in the wavenumber domain (docs/physics.md s. 3.1). The same expression serves
    a 2-D line load (xi = horizontal wavenumber) and a 3-D point load (xi = |2-D wavevector|).

    Parameters
    ----------
    xi : array_like
        Horizontal wavenumber (1/m), real or complex, broadcast against w.
    w : array_like
        Angular frequency (rad/s).
    substrate : Substrate
        The half-space; its loss factor makes the moduli complex.

    Returns
    -------
    ndarray, complex
        G in m/Pa x (1/m^2 or 1/m) i.e. displacement per unit transformed traction. Static limit
        (w -> 0 or xi -> inf): (1 - nu)/(mu |xi|) (Flamant / Boussinesq; K. L. Johnson, *Contact
        Mechanics*, 1985). Im G >= 0 where the load radiates (power flows into the solid).
    """
    xi = np.asarray(xi)
    return compliance_sq(xi * xi, w, substrate)


def shear_share(xi2: ArrayLike, kl2: ArrayLike, kt2: ArrayLike) -> np.ndarray:
    """Fraction of a radiating surface load's power at real xi carried by shear (the rest
    compressional), dimensionless; xi2, kl2, kt2 real squared wavenumbers (1/m^2).

    Fraction of a radiating harmonic's power carried by shear (the rest compressional).

    From the plane-strain potentials of a surface load (derived from the free-surface conditions,
    cf. Achenbach 1973, section 5.x): P_T / P_L = 4 xi^2 p q / (2 xi^2 - kT^2)^2 with
    p = sqrt(kL^2 - xi^2), q = sqrt(kT^2 - xi^2) (p = 0 outside the compressional cone).
    """
    p = np.sqrt(np.clip(kl2 - xi2, 0.0, None))
    q = np.sqrt(np.clip(kt2 - xi2, 0.0, None))
    ratio = 4.0 * xi2 * p * q / (2.0 * xi2 - kt2) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        shear = np.where(p > 0, ratio / (1.0 + ratio), 1.0)
    return np.where(q > 0, shear, 0.0)


# ---------------------------------------------------------------------------------------------
# Compiled point functions: one point at a time, scalars in and out (q = xi^2 and the squared
# bulk wavenumbers kl2, kt2 in 1/m^2, mu in Pa). The dispersion kernel
# (`optgrade.dispersion._kernel`) calls these; the array functions above are the numpy API.
# ---------------------------------------------------------------------------------------------


@njit(cache=True, inline="always")
def _sqrt_right(z):
    """Principal square root of z with Re z >= 0 (the only half-plane `vertical_wavenumber_at`
    needs): two real roots and a division, half the time of cmath.sqrt in compiled code."""
    x = z.real
    y = z.imag
    t = math.sqrt(0.5 * (math.sqrt(x * x + y * y) + x))
    if t == 0.0:
        return 0j
    return complex(t, 0.5 * y / t)


@njit(cache=True, inline="always")
def vertical_wavenumber_at(q, k2):
    """Vertical wavenumber sqrt(xi^2 - k^2) on the outgoing branch at one point (1/m), the
    branch of :func:`vertical_wavenumber` (choice on Re xi^2 against Re k^2); q, k2 complex."""
    d = q - k2
    if d.real < 0.0:
        return -1j * _sqrt_right(-d)
    return _sqrt_right(d)


@njit(cache=True, inline="always")
def rayleigh_product_at(q, kl2, kt2):
    """Numerator N = (2q - kT^2)^4 - 16 q^2 alpha^2 beta^2 (1/m^8) of the rationalised Rayleigh
    function R = N / ((2q - kT^2)^2 + 4 q alpha beta), as the exact polynomial in q, kL^2, kT^2:
    no square roots, so it keeps full precision where the direct difference cancels (xi >> k,
    the static limit). Repeated products, for complex or real arguments."""
    return (
        16.0 * q * q * q * (kl2 - kt2)
        + 8.0 * q * q * kt2 * (3.0 * kt2 - 2.0 * kl2)
        - 8.0 * q * kt2 * kt2 * kt2
        + kt2 * kt2 * kt2 * kt2
    )


@njit(cache=True)
def rayleigh_at(q, kl2, kt2):
    """Rayleigh function R = (2q - kT^2)^2 - 4 q alpha beta at one point q = xi^2 (1/m^4),
    direct form, outgoing branch (Achenbach 1973, section 5.11; see :func:`rayleigh_function`)."""
    alpha = vertical_wavenumber_at(q, kl2)
    beta = vertical_wavenumber_at(q, kt2)
    a = (2.0 * q - kt2) * (2.0 * q - kt2)
    b = 4.0 * q * alpha * beta
    return a - b


@njit(cache=True, inline="always")
def rayleigh_slope_at(q, kl2, kt2):
    """Rayleigh function R(q) of `rayleigh_at`, dR/dq (1/m^2) and alpha (the m = 0 vertical
    wavenumber, 1/m): R' = 4 (2q - kT^2) - 4 alpha beta - 2 q (2q - kL^2 - kT^2)/(alpha beta)
    (alpha' = 1/(2 alpha))."""
    alpha = vertical_wavenumber_at(q, kl2)
    beta = vertical_wavenumber_at(q, kt2)
    c = 2.0 * q - kt2
    ab = alpha * beta
    rr = c * c - 4.0 * q * ab
    drr = 4.0 * c - 4.0 * ab - 2.0 * q * (2.0 * q - kl2 - kt2) / ab
    return rr, drr, alpha


@njit(cache=True)
def compliance_at(q, kl2, kt2, mu):
    """Surface compliance G = -alpha kT^2 / (mu R) at one point q = xi^2 (complex; the point
    form of :func:`compliance_sq`, with R rationalised where that is better conditioned)."""
    alpha = vertical_wavenumber_at(q, kl2)
    beta = vertical_wavenumber_at(q, kt2)
    a = (2.0 * q - kt2) * (2.0 * q - kt2)
    b = 4.0 * q * alpha * beta
    den = a + b
    if abs(den) >= abs(a):
        r = rayleigh_product_at(q, kl2, kt2) / den
    else:
        r = a - b
    return -alpha * kt2 / (mu * r)


@njit(cache=True, inline="always")
def compliance_slope_at(q, kl2, kt2, mu):
    """G(q) of `compliance_at` and dG/dq: G'/G = 1/(2 alpha^2) - R'/R with R' of
    `rayleigh_slope_at`, where beta/alpha + alpha/beta = (2q - kL^2 - kT^2)/(alpha beta). With
    R = N / M (the rationalised form N = `rayleigh_product_at`, M = its denominator where it
    is the better conditioned one, else N = R, M = 1), G = -alpha kT^2 M / (mu N) and
    G'/G = (N ab - 2 dR_ab al2 M) / (2 al2 N ab): one complex division in all."""
    alpha = vertical_wavenumber_at(q, kl2)
    beta = vertical_wavenumber_at(q, kt2)
    c = 2.0 * q - kt2
    a = c * c
    ab = alpha * beta
    b = 4.0 * q * ab
    den = a + b
    # |den| >= |a|, compared squared (no hypot)
    if den.real * den.real + den.imag * den.imag >= a.real * a.real + a.imag * a.imag:
        rn = rayleigh_product_at(q, kl2, kt2)
        rm = den
    else:
        rn = a - b
        rm = 1.0 + 0j
    al2 = q - kl2
    # dR times alpha beta
    dr_ab = (4.0 * c - 4.0 * ab) * ab - 2.0 * q * (2.0 * q - kl2 - kt2)
    nab = rn * ab
    two_al2_nab = 2.0 * al2 * nab
    scale = -alpha * kt2 * rm / (mu * rn * two_al2_nab)
    return scale * two_al2_nab, scale * (nab - 2.0 * dr_ab * al2 * rm)


@njit(cache=True, inline="always")
def compliance_re_at(q, kl2, kt2, mu):
    """Re G at real q = xi^2 for a lossless solid, in real arithmetic (same branches as
    `vertical_wavenumber_at`; 0 inside the compressional cone, where G is imaginary).

    The polynomial N keeps compiled real powers here (q**3, kt2**4): the repeated products of
    `rayleigh_product_at` differ from them in the last bits (at 1.8 % of 300 000 random real
    points, up to 1.1e-12 relative in G through the cancellation in N), which would move the
    surrogate's real-axis roots; kept for bit-identical local modes."""
    c = (2.0 * q - kt2) ** 2
    if q >= kt2:
        al = math.sqrt(q - kl2)
        be = math.sqrt(q - kt2)
        r = c - 4.0 * q * al * be
        if abs(c + 4.0 * q * al * be) >= abs(c):
            num = (
                16.0 * q**3 * (kl2 - kt2)
                + 8.0 * q**2 * kt2 * (3.0 * kt2 - 2.0 * kl2)
                - 8.0 * q * kt2**3
                + kt2**4
            )
            r = num / (c + 4.0 * q * al * be)
        return -al * kt2 / (mu * r)
    if q > kl2:
        al = math.sqrt(q - kl2)
        bb = 4.0 * q * al * math.sqrt(kt2 - q)  # R = c + i bb
        return -al * kt2 * c / (mu * (c * c + bb * bb))
    return 0.0


@njit(cache=True)
def compliance_im_at(q, kl2, kt2, mu):
    """Im G at real q = xi^2 below kT^2 for a lossless solid, in real arithmetic (the radiating
    harmonics of the channel split): with p = sqrt(kL^2 - q), s = sqrt(kT^2 - q), c = 2q - kT^2,
    Im G = p kT^2 / (mu (c^2 + 4 q p s)) below kL^2, and with p = sqrt(q - kL^2) above it
    Im G = 4 q p^2 s kT^2 / (mu (c^4 + 16 q^2 p^2 s^2)) (same branches as
    `vertical_wavenumber_at`)."""
    c = 2.0 * q - kt2
    s = math.sqrt(max(kt2 - q, 0.0))
    if q < kl2:
        p = math.sqrt(kl2 - q)
        return p * kt2 / (mu * (c * c + 4.0 * q * p * s))
    p2 = q - kl2
    return 4.0 * q * p2 * s * kt2 / (mu * (c * c * c * c + 16.0 * q * q * p2 * s * s))


@njit(cache=True)
def shear_share_at(xi2, kl2, kt2):
    """Shear share of a radiating surface load's power at one real point (the point form of
    :func:`shear_share`, same formula; real squared wavenumbers in 1/m^2)."""
    p = math.sqrt(max(kl2 - xi2, 0.0))
    q = math.sqrt(max(kt2 - xi2, 0.0))
    if q <= 0.0:
        return 0.0
    if p <= 0.0:
        return 1.0
    ratio = 4.0 * xi2 * p * q / (2.0 * xi2 - kt2) ** 2
    return ratio / (1.0 + ratio)
