"""Lattice sums Sigma(K, w) of a periodic resonator array on a ground (docs/physics.md section 5.1).

The array supports a Bloch wave exp(i K x) at angular frequency w when 1/Z(w) = Sigma(K, w),
with Z the base stiffness of one resonator (`optgrade.resonators.Resonator`). The ground enters
through its `optgrade.ground.Ground` interface only (surface compliance G, its static limit,
cone speeds, shear share), so any registered ground works here. Three models:

``"lattice"`` (3-D): rows at x = m a, rods at y = n b, uniform traction on a contact disc of
    radius r, form factor S(xi) = 2 J1(xi r)/(xi r);
    Sigma = (1/(a b)) sum_{m,n} G(xi_mn) S(xi_mn)^2, xi_mn^2 = (K + 2 pi m/a)^2 + (2 pi n/b)^2.
``"line"`` (2-D plane strain): rows smeared along y, strip of width w_s = 2 r (rod diameter),
    S_w(xi) = sin(xi w_s/2)/(xi w_s/2), Z per unit length = Z / b, so that again 1/Z = Sigma with
    Sigma = (1/(a b)) sum_m G(xi_m) S_w(xi_m)^2.
``"homogenised"``: only m = n = 0 and S = 1: Sigma = G(K)/(a b), whose root is the closed-form
    resonant-metasurface relation R(K) = -(alpha kT^2/mu) Z/(a b).

Truncation: the terms decay like |xi|^-4 (3-D) and |xi|^-3 (2-D). We write G = G_s + (G - G_s)
with the static compliance G_s = (1 - nu)/(mu xi) (`Ground.static_compliance_sq`): the dynamic
remainder (G - G_s) decays two
powers faster and is summed over a small box; the static part, which does not depend on w, is
summed over a large box plus a closed-form tail: the form factor squared replaced by its
large-argument mean (4/(pi (xi r)^3) for the disc, with lattice points replaced by their density
ab/(4 pi^2); 1/(2 (xi r)^2) for the strip, summed exactly with Hurwitz zeta functions). The tail
uses Re K (it is a tiny, smooth correction). Both boxes are fixed for a call, so Sigma is
a smooth analytic function of K (needed for Newton steps and tabulated derivatives).

Branches: the ground's compliance is evaluated on its outgoing branches continued analytically
off the real axis (for the half-space, `optgrade.ground.vertical_wavenumber` with the choice made
on Re xi^2; improper sheet for the radiating harmonics): this is what the leaky-root Newton steps
need.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import j1, jv, zeta

from optgrade.ground import Ground

__all__ = [
    "MODELS",
    "lattice_sum",
    "harmonic_term",
    "radiation_parts",
    "form_factor_sq",
    "default_harmonics",
    "main_orders",
]

Model = Literal["lattice", "line", "homogenised"]
MODELS = ("lattice", "line", "homogenised")

#: target |xi| r of the static box and of the dynamic box (dimensionless); chosen by the
#: truncation-convergence test (relative change < 1e-4 when the harmonic count doubles)
_STATIC_XR = 12.0
_DYNAMIC_XR = 6.0
_DYNAMIC_KT = 12.0


def _check_model(model: str) -> None:
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")


def form_factor_sq(xi2: ArrayLike, radius: float, model: Model) -> np.ndarray:
    """Squared contact form factor S(xi)^2 as a function of xi^2 (dimensionless).

    Disc of radius r (``"lattice"``): S = 2 J1(xi r)/(xi r); strip of width 2 r (``"line"``):
    S = sin(xi r)/(xi r); ``"homogenised"``: 1. Both are even entire functions of xi, evaluated
    through xi = sqrt(xi^2) (any root works; complex arguments allowed).
    """
    xi2 = np.asarray(xi2)
    if model == "homogenised":
        return np.ones(xi2.shape)
    x2 = xi2 * radius**2
    if model == "lattice":
        if not np.iscomplexobj(x2):
            x = np.sqrt(np.maximum(x2, 1e-300))
            s = np.where(x2 < 1e-6, 1.0 - x2 / 8.0, 2.0 * j1(x) / x)
        else:
            big = np.abs(x2) > 16.0
            if np.any(big):
                xb = np.sqrt(x2 + 0j)
                s = np.where(big, 2.0 * jv(1, xb) / np.where(big, xb, 1.0), _disc_series(x2))
            else:
                s = _disc_series(x2)
    else:
        x = np.sqrt(x2 + 0j) if np.iscomplexobj(x2) else np.sqrt(np.maximum(x2, 0.0))
        small = np.abs(x2) < 1e-6
        xs = np.where(small, 1.0, x)
        s = np.where(small, 1.0 - x2 / 6.0, np.sin(xs) / xs)
    return s * s


#: Taylor coefficients of 2 J1(x)/x in powers of x^2: (-1)^k / (4^k k! (k+1)!)
_DISC_COEF = np.array(
    [
        (-1.0) ** k
        / (
            4.0**k
            * np.prod(np.arange(1, k + 1, dtype=float))
            * np.prod(np.arange(1, k + 2, dtype=float))
        )
        for k in range(24)
    ]
)


def _disc_series(x2: np.ndarray) -> np.ndarray:
    """2 J1(x)/x from its power series in x^2 (entire; exact to rounding for |x| <= 4)."""
    out = np.full(np.shape(x2), _DISC_COEF[-1], dtype=np.result_type(x2, float))
    for c in _DISC_COEF[-2::-1]:
        out = out * x2 + c
    return out


def default_harmonics(spacing: float, radius: float, model: Model) -> int:
    """Default half-width M of the static harmonic box (m = -M..M), from |xi| r <= 12."""
    if model == "homogenised":
        return 0
    return int(np.ceil(_STATIC_XR / radius * spacing / (2.0 * np.pi)))


def _static_tail(K, substrate: Ground, a, b, r, model, m_hi, n_hi):
    """Static tail outside the box m in [-m_hi, m_hi], n in [-n_hi, n_hi] (closed form)."""
    nu = substrate.poisson
    mu = substrate.complex_mu
    K = np.real(K)
    x2 = 2.0 * np.pi * (m_hi + 0.5) / a + K
    x1 = 2.0 * np.pi * (m_hi + 0.5) / a - K
    if model == "line":
        # (1/(a b)) (1 - nu)/mu sum_{|m| > M} sin^2(x r)/(r^2 |x|^3), sin^2 -> 1/2 (the
        # oscillating half converges one order faster); the smooth sums are Hurwitz zeta values
        q = K * a / (2.0 * np.pi)
        c = (1.0 - nu) / (2.0 * mu * r**2 * a * b) * (a / (2.0 * np.pi)) ** 3
        return c * (zeta(3.0, m_hi + 1 + q) + zeta(3.0, m_hi + 1 - q))
    y = 2.0 * np.pi * (n_hi + 0.5) / b
    # (1/(4 pi^2)) int_{outside rectangle} (1 - nu)/(mu rho) 4/(pi r^3 rho^3) dA
    c = (1.0 - nu) / (mu * np.pi**3 * r**3)

    def quadrant(x):
        t0 = np.arctan2(y, x)
        sc = np.sin(t0) * np.cos(t0)
        return (t0 + sc) / (4.0 * x**2) + (np.pi / 2.0 - t0 + sc) / (4.0 * y**2)

    return c * 2.0 * (quadrant(x1) + quadrant(x2))


def _harmonic_grid(model, m_hi, n_hi):
    m = np.arange(-m_hi, m_hi + 1)
    if model == "lattice":
        n = np.arange(-n_hi, n_hi + 1)
    else:
        n = np.zeros(1, dtype=int)
    mm, nn = np.meshgrid(m, n, indexing="ij")
    return mm.ravel(), nn.ravel()


def harmonic_term(
    K: ArrayLike,
    w: ArrayLike,
    substrate: Ground,
    spacing: float,
    row_pitch: float,
    radius: float,
    m: int = 0,
    model: Model = "lattice",
) -> np.ndarray:
    """One (m, n = 0) term of Sigma: G(K + 2 pi m/a) S^2 / (a b) (m/N).

    Parameters as in `lattice_sum`. These are the terms carrying the Rayleigh pole (m = 0) and
    the backward-radiating branch points (m = -1) in the first Brillouin zone, so the surrogate
    evaluates them exactly and tabulates only the smooth remainder.
    """
    _check_model(model)
    K = np.asarray(K)
    xi = K + 2.0 * np.pi * m / spacing
    xi2 = xi * xi
    s2 = form_factor_sq(xi2, radius, model)
    return substrate.compliance_sq(xi2, w) * s2 / (spacing * row_pitch)


def main_orders(spacing: float, kr_max: float, model: Model = "lattice") -> int:
    """Number J of main harmonic pairs: m = -J .. J-1 (n = 0) are treated in closed form.

    Chosen so that every other harmonic stays away from the Rayleigh pole and the radiation
    cones over the extended zone 0 < K < 2 pi/a: 2 pi J / a > 1.1 kR_max (dimensionless count).
    The set is symmetric under m -> -1 - m, so the rest is symmetric about the zone edge.
    """
    if model == "homogenised":
        return 1
    return max(1, int(np.ceil(1.1 * kr_max * spacing / (2.0 * np.pi))))


def lattice_sum(
    K: ArrayLike,
    w: ArrayLike,
    substrate: Ground,
    spacing: float,
    row_pitch: float,
    radius: float,
    model: Model = "lattice",
    n_harmonics: int | None = None,
    exclude_main: bool | int = False,
) -> np.ndarray:
    """Lattice sum Sigma(K, w) (m/N): the Bloch dispersion relation is 1/Z(w) = Sigma(K, w).

    Parameters
    ----------
    K : array_like
        Bloch wavenumber (1/m), real or complex (Im K > 0 for leaky roots), broadcast with w.
    w : array_like
        Angular frequency (rad/s).
    substrate : Ground
        The ground (the half-space, or any registered ground).
    spacing, row_pitch : float
        Spacing a along x and row pitch b along y (m).
    radius : float
        Contact radius r (m): rod radius (disc, 3-D) or half the strip width (2-D line).
    model : {"lattice", "line", "homogenised"}
        See the module docstring (docs/physics.md section 5.1).
    n_harmonics : int, optional
        Half-width M of the static box in m (n scaled to the same |xi|); default |xi| r <= 12.
    exclude_main : bool or int
        Drop the main harmonics (m, 0) with -J <= m < J, J = int(exclude_main) (True: J = 1,
        i.e. m = 0 and -1); the band solver adds them in closed form (`main_orders`).

    Returns
    -------
    ndarray, complex
        Sigma, shape broadcast(K, w).
    """
    _check_model(model)
    K = np.asarray(K)
    w = np.asarray(w, dtype=float)
    a, b, r = float(spacing), float(row_pitch), float(radius)
    if model == "homogenised":
        if int(exclude_main) > 0:
            return np.zeros(np.broadcast(K, w).shape, dtype=complex)
        return harmonic_term(K, w, substrate, a, b, r, 0, model)
    m_s = default_harmonics(a, r, model) if n_harmonics is None else int(n_harmonics)
    m_s = max(m_s, 2, int(exclude_main) + 1)
    n_s = int(np.ceil(m_s * b / a)) if model == "lattice" else 0
    kt_max = float(np.max(w, initial=0.0)) / substrate.ct
    x_dyn = max(_DYNAMIC_XR / r, _DYNAMIC_KT * kt_max)
    m_d = min(m_s, max(2, int(exclude_main) + 1, int(np.ceil(x_dyn * a / (2.0 * np.pi)))))
    n_d = min(n_s, int(np.ceil(x_dyn * b / (2.0 * np.pi)))) if model == "lattice" else 0

    shape = np.broadcast(K, w).shape
    Kb = np.broadcast_to(K, shape)[..., None]
    wb = np.broadcast_to(w, shape)[..., None]
    scale = 1.0 / (a * b)

    # dynamic remainder (G - G_s) S^2 over the small box
    mm, nn = _harmonic_grid(model, m_d, n_d)
    n_main = int(exclude_main)
    if n_main > 0:
        keep = ~((nn == 0) & (mm >= -n_main) & (mm < n_main))
        mm, nn = mm[keep], nn[keep]
    xi2 = (Kb + 2.0 * np.pi * mm / a) ** 2 + (2.0 * np.pi * nn / b) ** 2
    s2 = form_factor_sq(xi2, r, model)
    g = substrate.compliance_sq(xi2, wb)
    gs = substrate.static_compliance_sq(xi2)
    total = np.sum((g - gs) * s2, axis=-1)

    # static part over the large box (w independent; computed once per K)
    ms, ns = _harmonic_grid(model, m_s, n_s)
    if n_main > 0:
        keep = ~((ns == 0) & (ms >= -n_main) & (ms < n_main))
        ms, ns = ms[keep], ns[keep]
    Ku = np.asarray(K)[..., None]
    xi2s = (Ku + 2.0 * np.pi * ms / a) ** 2 + (2.0 * np.pi * ns / b) ** 2
    static = np.sum(substrate.static_compliance_sq(xi2s) * form_factor_sq(xi2s, r, model), axis=-1)
    static = scale * static + _static_tail(np.asarray(K), substrate, a, b, r, model, m_s, n_s)
    return scale * total + np.broadcast_to(static, shape)


def radiation_parts(
    K: ArrayLike,
    w: ArrayLike,
    substrate: Ground,
    spacing: float,
    row_pitch: float,
    radius: float,
    model: Model = "lattice",
) -> np.ndarray:
    """Split of the radiative Im Sigma at real K' into the four bulk channels (m/N).

    Each harmonic (m, n) with |xi_mn| < kT radiates; its Im G S^2/(a b) (computed for the
    lossless ground) is split into shear and compressional power (`Ground.shear_share`) and booked
    forward if K' + 2 pi m/a > 0, backward otherwise (docs/physics.md section 5.6).

    Returns
    -------
    ndarray, float, shape (4,) + broadcast(K, w).shape
        [forward_shear, forward_compressional, backward_shear, backward_compressional].
    """
    _check_model(model)
    K = np.real(np.asarray(K))
    w = np.asarray(w, dtype=float)
    a, b = float(spacing), float(row_pitch)
    shape = np.broadcast(K, w).shape
    kt_max = float(np.max(w, initial=0.0)) / substrate.ct
    m_hi = int(np.ceil(kt_max * a / (2.0 * np.pi))) + 1
    if model == "homogenised":
        m_hi = 0
    n_hi = int(np.ceil(kt_max * b / (2.0 * np.pi))) if model == "lattice" else 0
    mm, nn = _harmonic_grid("lattice" if model == "lattice" else "line", m_hi, n_hi)
    Kb = np.broadcast_to(K, shape)[..., None]
    wb = np.broadcast_to(w, shape)[..., None]
    kx = Kb + 2.0 * np.pi * mm / a
    xi2 = kx**2 + (2.0 * np.pi * nn / b) ** 2
    kt2 = (wb / substrate.ct) ** 2
    lossless = substrate.lossless()
    im = np.where(
        xi2 < kt2,
        (lossless.compliance_sq(xi2, wb) * form_factor_sq(xi2, radius, model)).imag,
        0.0,
    ) / (a * b)
    shear = substrate.shear_share(xi2, wb)
    fwd = kx > 0
    out = np.empty((4,) + shape)
    out[0] = np.sum(np.where(fwd, im * shear, 0.0), axis=-1)
    out[1] = np.sum(np.where(fwd, im * (1.0 - shear), 0.0), axis=-1)
    out[2] = np.sum(np.where(fwd, 0.0, im * shear), axis=-1)
    out[3] = np.sum(np.where(fwd, 0.0, im * (1.0 - shear)), axis=-1)
    return out
