"""Full-wave check of a layout: 2-D plane-strain elastic simulation with the trace.json channels.

The substrate is an elastic half-space cut to a finite box with convolutional perfectly matched
layers (CPML) on the two far sides and the bottom and a free surface on top. The resonators are
the 2-D line variant of the dispersion model (docs/physics.md ss. 5.1 and 7): every row of rods is
smeared along y, each rod is an axial bar with stiffness E A / b, mass rho_r A / b and head mass
M / b per unit length of the row, standing on a strip of width d (its diameter) through which it
presses with uniform traction and whose mean vertical velocity it follows.

Why time domain: a time-domain run with a broadband pulse gives the whole 2:1 band from one
simulation (a Fourier transform of the recorded fields at every study frequency), for the cost
of a few thousand explicit stencil sweeps. A frequency-domain solver would need one sparse
factorisation per frequency of a matrix with 2 N unknowns (N ~ 1e5..1e6 cells), plus complex
frequency-dependent PML coefficients in every one; for 30-60 frequencies that is far slower
on two cores and needs far more memory.

Channel split (per frequency, normalised by a run without resonators, the *reference*):

- A box of receiver lines surrounds the array: a vertical line before it (left), one after it
  (right), both from the surface to depth D, and a horizontal line at depth D (bottom).
- ``transmitted_surface``: forward Rayleigh-mode amplitude of the total field on the right line,
  squared, over the same in the reference run. Mode amplitudes come from the elastodynamic
  reciprocity relation (the non-conjugate bilinear form, which separates forward and backward
  modes; B. A. Auld, *Acoustic Fields and Waves in Solids*, 1973, from memory) with the exact
  Rayleigh mode of the continuum.
- ``reflected_surface``: backward Rayleigh-mode power of the scattered field (run minus
  reference) on the left line, over the incident power.
- Bulk channels: the power flux of the scattered field with its Rayleigh parts removed, through
  the bottom line (split forward/backward by the sign of k_x and shear/compressional by curl and
  divergence in a wavenumber transform along x) and through the side lines below the surface
  (right = forward, left = backward; shear/compressional in proportion of the plane-wave
  intensities rho c^3 |curl u|^2 / 2 and rho c^3 |div u|^2 / 2).
- ``absorbed``: power flowing into the rods, Re(-C conj(v)) at their bases (nonzero only
  with a loss factor).
- The bulk total is 1 - transmitted - reflected - absorbed (power balance, the optical
  theorem); the four bulk channels share it in proportion to their directly measured fluxes.
  The direct fluxes do not sum exactly to that total because the scattered bulk field
  interferes with the source's own bulk radiation on the receiver lines (a cross term the
  reference run cannot remove); their raw sum with the surface channels is ``closure``.
- Energy balance: the net power of the total field leaving the closed box plus the power the
  rods absorb must vanish; ``balance_error`` is its size relative to the incident power.

All quantities inside are SI. Time dependence of the phasors is exp(-i w t) docs/physics.md s. 2.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade.fullwave import _kernel as _k
from optgrade.ground import rayleigh_speed
from optgrade.propagation import CHANNELS
from optgrade.study import SITE_CAUTION

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

BULK = CHANNELS[2:6]


# --------------------------------------------------------------------------------------------
# Physics: small pure functions
# --------------------------------------------------------------------------------------------


def rayleigh_mode(z: np.ndarray, omega: np.ndarray, cl: float, ct: float, rho: float,
                  cr: float) -> dict[str, np.ndarray]:
    """Fields of the forward Rayleigh mode exp(i (k x - w t)) at x = 0, depth ``z``.

    Potentials phi = exp(-q z), psi = B exp(-s z) with B = -2 i k q / (k^2 + s^2) (free
    surface), u = grad phi + curl(psi y) (Achenbach 1973, section 5.11; from memory).

    Parameters
    ----------
    z : ndarray, shape (n_z,)
        Depth (m), >= 0.
    omega : ndarray, shape (n_f,)
        Angular frequency (rad/s).
    cl, ct, cr : float
        Compressional, shear and Rayleigh speeds (m/s).
    rho : float
        Density (kg/m^3).

    Returns
    -------
    dict of ndarray, shape (n_f, n_z)
        ``ux, uz`` (m per unit potential amplitude), ``sxx, szz, sxz`` (Pa), ``div`` and
        ``curl`` (= d ux/dz - d uz/dx) of the displacement, and ``k`` (1/m, shape (n_f, 1)).
    """
    w = np.asarray(omega, float)[:, None]
    z = np.asarray(z, float)[None, :]
    mu = rho * ct**2
    lam = rho * cl**2 - 2 * mu
    k = w / cr
    kl, kt = w / cl, w / ct
    q = np.sqrt(k**2 - kl**2)
    s = np.sqrt(k**2 - kt**2)
    b = -2j * k * q / (k**2 + s**2)
    phi = np.exp(-q * z)
    psi = b * np.exp(-s * z)
    ux = 1j * k * phi + s * psi
    uz = -q * phi + 1j * k * psi
    dux_dx = 1j * k * ux
    dux_dz = -1j * k * q * phi - s**2 * psi
    duz_dz = q**2 * phi - 1j * k * s * psi
    duz_dx = 1j * k * uz
    div = dux_dx + duz_dz
    return {
        "ux": ux,
        "uz": uz,
        "sxx": lam * div + 2 * mu * dux_dx,
        "szz": lam * div + 2 * mu * duz_dz,
        "sxz": mu * (dux_dz + duz_dx),
        "div": div,
        "curl": dux_dz - duz_dx,
        "k": k,
    }


def source_pulse(t: np.ndarray, f_lo: float, f_hi: float) -> np.ndarray:
    """Gaussian-modulated cosine covering the band [f_lo, f_hi] (Hz), unit peak.

    Centre f_c = (f_lo + f_hi)/2, envelope exp(-((t - t0)/tau)^2) with tau = 1.1/(pi df),
    df = (f_hi - f_lo)/2, so the amplitude spectrum at the band edges is exp(-1.21) ~ 0.30 of its
    peak; t0 = 3.5 tau (the pulse starts from rest).
    """
    fc = 0.5 * (f_lo + f_hi)
    tau = 1.1 / (math.pi * 0.5 * (f_hi - f_lo))
    t0 = 3.5 * tau
    return np.cos(2 * math.pi * fc * (t - t0)) * np.exp(-(((t - t0) / tau) ** 2))


def pulse_length(f_lo: float, f_hi: float) -> float:
    """Duration (s) after which :func:`source_pulse` is negligible (2 t0 = 7 tau)."""
    return 7.0 * 1.1 / (math.pi * 0.5 * (f_hi - f_lo))


def substrate_tau(medium: Medium, band: tuple[float, float]) -> float:
    """Kelvin-Voigt time constant tau = eta / w_c (s) of the substrate, w_c = pi (f_lo + f_hi):
    the loss factor is exact at the band centre and grows in proportion to frequency (a
    common simplification of a constant-loss solid; from memory)."""
    return float(medium.loss_factor) / (math.pi * (band[0] + band[1]))


def cpml_profile(dist: np.ndarray, thickness: float, c_max: float, dt: float, f_c: float,
                 r0: float = 1e-4) -> tuple[np.ndarray, np.ndarray]:
    """CPML recursion coefficients (a, b) at distance ``dist`` (m) into a layer.

    d = d0 (x/L)^2, d0 = -3 c_max ln(R0) / (2 L); alpha = pi f_c (1 - x/L); kappa = 1;
    b = exp(-(d + alpha) dt), a = d (b - 1)/(d + alpha) (Komatitsch and Martin 2007, from
    memory). ``a = 0`` outside the layer (dist <= 0).
    """
    x = np.clip(np.asarray(dist, float) / thickness, 0.0, 1.0)
    inside = np.asarray(dist, float) > 0
    d0 = -3.0 * c_max * math.log(r0) / (2.0 * thickness)
    d = d0 * x**2
    alpha = math.pi * f_c * (1.0 - x)
    b = np.exp(-(d + alpha) * dt)
    with np.errstate(invalid="ignore", divide="ignore"):
        a = np.where(d + alpha > 0, d * (b - 1.0) / (d + alpha), 0.0)
    return np.where(inside, a, 0.0), np.where(inside, b, 1.0)


def sponge_profile(grid: Grid, edge: float = 0.92) -> np.ndarray:
    """Per-column damping factors of a block's side layers (``grid.n_pml`` columns each side):
    G = edge^(((n - d) / n)^2) at d cells from the outer edge, 1 inside (a Gaussian taper in
    the manner of C. Cerjan, D. Kosloff, R. Kosloff and M. Reshef, Geophysics 50, 705, 1985;
    from memory). Used instead of the CPML in a block: a CPML in a plate with two free faces
    grew without bound (backward guided modes; measured on the bare block, energy x 1e6 in
    0.3 ms), a sponge only ever removes energy."""
    n = grid.n_pml
    g = np.ones(grid.nx)
    d = np.arange(n)
    ramp = edge ** (((n - d) / n) ** 2)
    g[:n] = ramp
    g[grid.nx - n:] = ramp[::-1]
    return g


STABILITY_SAFETY = 0.95  # omega_max dt <= 2 x 0.95 for the coupled system (margin)


def substrate_eigen_bound(cl: float, h: float) -> float:
    """Largest eigenvalue (1/s^2) of M^-1 K of the staggered elastic grid: 8 cL^2 / h^2.

    Interior value of the 2-D second-order staggered scheme (its CFL limit cL dt / h <=
    1/sqrt(2) is dt^2 lambda <= 4; Virieux 1986, from memory); the free-surface rows do not
    raise it (measured by power iteration on the kernels: tests/test_fullwave_stability.py).
    """
    return 8.0 * cl**2 / h**2


def rod_eigenvalue(n_seg: int, length: float, ea: float, mass_per_length: float,
                   tip_mass: float, footprint_mass: float) -> float:
    """Largest eigenvalue (1/s^2) of M^-1 K of one discretised rod standing on its footprint.

    Chain of ``n_seg`` springs ea / ds (ds = length / n_seg) between the footprint (one degree
    of freedom: the mean vertical displacement of its nodes, mass ``footprint_mass``) and
    nodes of mass ``mass_per_length * ds`` (the tip node: half of that plus ``tip_mass``). All
    per unit length of the row: ``ea`` (N per m of row), ``mass_per_length`` (kg per m of
    rod per m of row), ``tip_mass`` and ``footprint_mass`` (kg per m of row). Symmetrically
    scaled tridiagonal eigenproblem (scipy.linalg.eigh_tridiagonal).
    """
    from scipy.linalg import eigh_tridiagonal

    n = int(n_seg)
    ds = length / n
    k = ea / ds
    m = mass_per_length * ds
    masses = np.full(n + 1, m)
    masses[0] = footprint_mass
    masses[-1] = 0.5 * m + tip_mass
    diag = np.full(n + 1, 2.0 * k)
    diag[0] = diag[-1] = k
    off = -k / np.sqrt(masses[:-1] * masses[1:])
    lam = eigh_tridiagonal(diag / masses, off, eigvals_only=True, select="i",
                           select_range=(n, n))
    return float(lam[0])


def rod_segments(length: float, ea: float, mass_per_length: float, tip_mass: float,
                 footprint_mass: float, dt: float, tau: float, budget: float,
                 n_max: int = 400) -> int:
    """Most segments (<= ``n_max``) a rod can have at time step ``dt`` (s) with Kelvin-Voigt
    time constant ``tau`` (s) while lambda_rod (dt^2 + 2 tau dt) <= ``budget``; 0 when even
    one segment is too stiff (the time step must shrink). See :func:`rod_eigenvalue`."""
    c = math.sqrt(ea / mass_per_length)
    eff = math.sqrt(dt**2 + 2.0 * tau * dt)
    # chain estimate lambda ~ 4 c^2 / ds^2, then step down to the first that fits
    n = min(n_max, int(length * math.sqrt(max(budget, 0.0)) / (2.0 * c * eff)) + 2)
    while n >= 1:
        lam = rod_eigenvalue(n, length, ea, mass_per_length, tip_mass, footprint_mass)
        if lam * eff**2 <= budget:
            return n
        n -= 1
    return 0


def coupled_time_step(lam_s: float, tau_s: float, lam_r: float, tau_r: float,
                      safety: float = STABILITY_SAFETY) -> float:
    """Longest time step (s) with dt^2 (lam_s + lam_r) + 2 dt (lam_s tau_s + lam_r tau_r)
    <= 4 safety^2: leapfrog of M u'' + D u' + K u = 0 with the damping taken at the previous
    half step is stable when dt^2 lambda_max(M^-1 (K + 2 D / dt)) <= 4 (the energy method;
    for one mode Belytschko's w dt <= 2 (sqrt(1 + xi^2) - xi); from memory), and
    lambda_max of a sum of positive semi-definite parts is at most the sum of theirs (Weyl).
    """
    a = lam_s + lam_r
    b = lam_s * tau_s + lam_r * tau_r
    return (-b + math.sqrt(b * b + 4.0 * safety**2 * a)) / a


def _footprint_cells(diameter: np.ndarray, h: float) -> np.ndarray:
    return np.maximum(1, np.round(np.asarray(diameter, float) / h)).astype(np.int64)


def _rod_lines(rods: RodRow, h: float, rho_s: float) -> tuple:
    """Rod constants per unit length of the row: ea (N/m), mass per length of rod (kg/m^2),
    tip mass (kg/m) and footprint mass (kg/m; fp cells x rho h^2) of each rod."""
    area = math.pi * np.asarray(rods.diameter, float) ** 2 / 4
    b = rods.row_pitch
    ea = rods.youngs_modulus * area / b
    mlin = rods.density * area / b
    tip = np.asarray(rods.head_mass, float) / b
    m_fp = _footprint_cells(rods.diameter, h) * rho_s * h**2
    return ea, mlin, tip, m_fp


def _rod_time_step(rods: RodRow, medium: Medium, band: tuple[float, float], h: float,
                   dt: float) -> float:
    """``dt`` shortened, when needed, until every rod fits with one segment (Weyl budget)."""
    lam_s = substrate_eigen_bound(medium.cl, h)
    tau_s = substrate_tau(medium, band)
    tau_r = rods.loss_factor / (math.pi * (band[0] + band[1]))
    ea, mlin, tip, m_fp = _rod_lines(rods, h, medium.rho)
    out = dt
    seen: dict[tuple, float] = {}
    for i in range(rods.x.size):
        key = (float(rods.height[i]), float(ea[i]), float(tip[i]), float(m_fp[i]))
        if key in seen:
            continue
        lam_r = rod_eigenvalue(1, key[0], key[1], float(mlin[i]), key[2], key[3])
        seen[key] = lam_r
        out = min(out, coupled_time_step(lam_s, tau_s, lam_r, tau_r))
    return out


# --------------------------------------------------------------------------------------------
# Model description
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Medium:
    """Substrate: density (kg/m^3), compressional and shear speeds (m/s), loss factor
    (dimensionless; Kelvin-Voigt damping exact at the band centre, 0 = elastic)."""

    rho: float
    cl: float
    ct: float
    loss_factor: float = 0.0

    @property
    def mu(self) -> float:
        return self.rho * self.ct**2

    @property
    def lam(self) -> float:
        return self.rho * self.cl**2 - 2 * self.mu


@dataclass(frozen=True)
class RodRow:
    """Rods of the layout in the 2-D line model (SI).

    ``x`` positions along the row (m, first at 0), ``height`` (m), ``diameter`` (m),
    ``head_mass`` (kg per rod), ``row_pitch`` b (m), ``youngs_modulus`` (Pa), ``density``
    (kg/m^3), ``loss_factor`` (dimensionless, applied as Kelvin-Voigt damping exact at the band
    centre).
    """

    x: np.ndarray
    height: np.ndarray
    diameter: np.ndarray
    head_mass: np.ndarray
    row_pitch: float
    youngs_modulus: float
    density: float
    loss_factor: float = 0.0

    @property
    def bar_speed(self) -> float:
        return math.sqrt(self.youngs_modulus / self.density)


@dataclass(frozen=True)
class Grid:
    """Finite-difference grid and receiver geometry (indices on the grid; SI lengths)."""

    h: float
    dt: float
    nx: int
    nz: int
    n_pml: int
    n_steps: int
    min_steps: int
    sample_every: int
    i_source: int
    i_left: int
    i_right: int
    j_bottom: int
    j_shallow: int
    x_array: float  # grid x (m) of the layout's x = 0
    #: a block: the last row j = nz - 1 is the free far face (no layer below); the face is
    #: recorded over columns i_far0 .. i_far1 - 1
    free_bottom: bool = False
    i_far0: int = 0
    i_far1: int = 0

    @property
    def n_cells(self) -> int:
        return self.nx * self.nz


#: A block's side sponges are this many times as wide as the CPML of a half-space model.
SPONGE_WIDTH = 4

QUALITY = {"normal": {"ppw": 20.0, "n_pml": 20, "fp_cells": 2, "dur": 12.0},
           "fast": {"ppw": 10.0, "n_pml": 14, "fp_cells": 1, "dur": 10.0}}


def plan_grid(medium: Medium, band: tuple[float, float], length: float, min_diameter: float,
              *, quality: str = "normal", ppw: float | None = None, n_pml: int | None = None,
              duration_factor: float | None = None, courant: float = 0.5,
              rods: RodRow | None = None, block_depth: float | None = None) -> Grid:
    """Choose the grid, time step, box and run length for a band and an array length.

    Spacing h: ``ppw`` points per Rayleigh wavelength at the top of the band, and at least
    ``fp_cells`` cells across the narrowest footprint. Box depth D = 1.5 Rayleigh wavelengths at
    the bottom of the band (the Rayleigh mode has decayed to ~1e-4 there). Source 3 D before
    the left line so that little of its own bulk radiation enters the box. Time step
    ``courant * h / cL`` (stable below 1/sqrt(2)), shortened when a rod of ``rods`` is too
    stiff for it even with one segment (:func:`coupled_time_step`). Duration: at least the
    pulse plus 1.5 Rayleigh transit times from source to the right line, at most the pulse plus
    ``duration_factor`` transit times; in between the run stops once the energy left in the
    model (substrate outside the layers, and rods) is below ``energy_tol`` of its peak.

    With ``block_depth`` H (m) the model is a block: the spacing is trimmed so that H is a whole
    number of cells, the last row is the free far face (no absorbing layer below), and the box
    is widened by H tan(72 deg) (the far-face map's window, docs/physics.md section 14) on
    both sides so that the converted beams reach the far face outside the side layers; the
    far face is recorded over that window (``i_far0 .. i_far1``).
    """
    q = QUALITY[quality]
    ppw = q["ppw"] if ppw is None else ppw
    n_pml = q["n_pml"] if n_pml is None else n_pml
    if block_depth is not None:
        n_pml *= SPONGE_WIDTH
    dur = q["dur"] if duration_factor is None else duration_factor
    f_lo, f_hi = band
    cr = rayleigh_speed(medium.cl, medium.ct)
    lam_lo, lam_hi = cr / f_lo, cr / f_hi
    h = min(lam_hi / ppw, min_diameter / q["fp_cells"])
    if block_depth is not None:
        h = float(block_depth) / math.ceil(float(block_depth) / h)
    depth = 1.5 * lam_lo
    j_bottom = int(math.ceil(depth / h))
    nz = j_bottom + 6 + n_pml
    gap = 0.25 * lam_lo + 3 * h
    i_source = n_pml + int(math.ceil(0.3 * lam_lo / h))
    reach = 0
    if block_depth is not None:
        nz = int(round(float(block_depth) / h)) + 1
        from optgrade.propagation._farface import WINDOW_ANGLE_DEG

        reach = int(math.ceil(float(block_depth) * math.tan(math.radians(WINDOW_ANGLE_DEG))
                              / h)) + 2
        if j_bottom + 6 >= nz:
            raise ValueError(f"block_depth: {block_depth:.4g} m is too thin for the receiver box "
                             f"(1.5 Rayleigh wavelengths, {depth:.4g} m)")
    i_left = i_source + int(math.ceil(3.0 * depth / h))
    x_array = (i_left * h) + gap
    if block_depth is not None:  # the far face before the row lies inside, clear of the layer
        shift = max(0, n_pml + 4 + reach - int(x_array / h))
        i_source, i_left, x_array = i_source + shift, i_left + shift, x_array + shift * h
    i_right = int(math.ceil((x_array + length + gap) / h))
    nx = i_right + int(math.ceil(0.3 * lam_lo / h)) + n_pml
    i_far0 = i_far1 = 0
    if block_depth is not None:
        i_far0 = int(x_array / h) - reach
        i_far1 = int(math.ceil((x_array + length) / h)) + reach
        nx = max(nx, i_far1 + 4 + n_pml)
    # Kelvin-Voigt substrate (tau = eta / w_centre): stable for dt^2 + 2 tau dt <= dt0^2
    tau = substrate_tau(medium, band)
    dt0 = courant * h / medium.cl
    dt = -tau + math.sqrt(tau**2 + dt0**2)
    if rods is not None and rods.x.size:
        dt = _rod_time_step(rods, medium, band, h, dt)
    t_end = pulse_length(f_lo, f_hi) + dur * (i_right - i_source) * h / cr
    n_steps = int(math.ceil(t_end / dt))
    t_min = pulse_length(f_lo, f_hi) + 1.5 * (i_right - i_source) * h / cr
    min_steps = min(n_steps, int(math.ceil(t_min / dt)))
    sample_every = max(1, int(1.0 / (dt * 6.0 * f_hi)))
    j_shallow = max(2, int(round(0.05 * lam_lo / h)))
    return Grid(h=h, dt=dt, nx=nx, nz=nz, n_pml=n_pml, n_steps=n_steps, min_steps=min_steps,
                sample_every=sample_every, i_source=i_source, i_left=i_left, i_right=i_right,
                j_bottom=j_bottom, j_shallow=j_shallow, x_array=x_array,
                free_bottom=block_depth is not None, i_far0=i_far0, i_far1=i_far1)


# --------------------------------------------------------------------------------------------
# Time stepping
# --------------------------------------------------------------------------------------------


@dataclass
class RunRecord:
    """Fourier transforms (phasors, exp(-i w t)) of the recorded fields of one run.

    ``blocks[part][name]``: complex (n_f, nxb, nzb) for vx, vz, sxx, szz, sxz on the grid
    columns ``i0 .. i0 + nxb - 1`` and rows ``j0 .. j0 + nzb - 1`` with ``(i0, j0) =
    offsets[part]``; parts are the receiver strips ``left``, ``right`` (vertical lines),
    ``top`` (surface and shallow rows) and ``bottom`` (see :func:`receiver_blocks`);
    ``rod_c``, ``rod_v``: complex (n_f, n_rods) base force (N/m, compressive) and base
    velocity (m/s). ``snapshots``: uz (m) on the full grid at ``snapshot_times`` (s).
    ``energy_left``: elastic + kinetic energy left in the model at the end over its peak.
    """

    freq: np.ndarray
    offsets: dict[str, tuple[int, int]]
    blocks: dict[str, dict[str, np.ndarray]]
    rod_c: np.ndarray
    rod_v: np.ndarray
    snapshots: np.ndarray
    snapshot_times: np.ndarray
    energy_left: float
    seconds: float
    cell_updates: float
    n_steps: int


def _rod_arrays(rods: RodRow, grid: Grid, medium: Medium, band: tuple[float, float]) -> dict:
    """Discretise the rods: as many segments as the coupled stability budget allows.

    Budget: dt^2 lambda_max(M^-1 (K + 2 D/dt)) <= 4 safety^2 for substrate and rods together,
    bounded by the substrate's part plus each rod's own (:func:`coupled_time_step`); each rod
    gets the most segments whose largest eigenvalue fits in what the substrate leaves.
    """
    h, dt = grid.h, grid.dt
    n_rods = rods.x.size
    w_c = math.pi * (band[0] + band[1])
    tau_r = rods.loss_factor / w_c
    visc = np.full(n_rods, tau_r)
    tau_s = substrate_tau(medium, band)
    budget = (4.0 * STABILITY_SAFETY**2
              - substrate_eigen_bound(medium.cl, h) * (dt**2 + 2.0 * tau_s * dt))
    ea, mlin, tip, m_fp = _rod_lines(rods, h, medium.rho)
    n_seg = np.zeros(n_rods, np.int64)
    seen: dict[tuple, int] = {}
    for i in range(n_rods):
        key = (float(rods.height[i]), float(ea[i]), float(mlin[i]), float(tip[i]),
               float(m_fp[i]))
        if key not in seen:
            seen[key] = rod_segments(key[0], key[1], key[2], key[3], key[4], dt, tau_r, budget)
        n_seg[i] = seen[key]
    if n_rods and n_seg.min() < 1:
        raise ValueError(f"time step {dt:.4g} s is too long for the stiffest rod even with one "
                         "segment; plan the grid with plan_grid(..., rods=...)")
    ds = rods.height / np.maximum(n_seg, 1)
    m_node = mlin * ds
    n_fp = _footprint_cells(rods.diameter, h)
    centre = (grid.x_array + rods.x) / h
    fp_start = np.round(centre - (n_fp - 1) / 2).astype(np.int64)
    n_max = int(n_seg.max()) if n_seg.size else 1
    return {
        "rod_v": np.zeros((n_rods, n_max + 1)),
        "rod_c": np.zeros((n_rods, n_max)),
        "rod_e": np.zeros((n_rods, n_max)),
        "n_seg": n_seg, "ds": ds, "m_node": m_node, "m_tip": tip.astype(float),
        "ea": ea.astype(float), "visc": visc, "fp_start": fp_start, "fp_count": n_fp,
    }


def _pml_profiles(grid: Grid, medium: Medium, band: tuple[float, float]) -> tuple:
    """C-PML coefficients (a, b) on the integer and half grid points along x and z:
    (ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h), the order of the kernel's arguments."""
    h, dt = grid.h, grid.dt
    f_c = 0.5 * (band[0] + band[1])
    thick = grid.n_pml * h
    xi = np.arange(grid.nx) * h
    xh = xi + 0.5 * h
    zi = np.arange(grid.nz) * h
    zh = zi + 0.5 * h
    x_max = (grid.nx - 1) * h
    z_max = (grid.nz - 1) * h

    def dist_x(x: np.ndarray) -> np.ndarray:
        return np.maximum(thick - x, x - (x_max - thick))

    if grid.free_bottom:  # a block: side sponges instead (see sponge_profile)
        zero, one = np.zeros(grid.nx), np.ones(grid.nx)
        zz, oz = np.zeros(grid.nz), np.ones(grid.nz)
        return zero, one, zero.copy(), one.copy(), zz, oz, zz.copy(), oz.copy()
    ax_i, bx_i = cpml_profile(dist_x(xi), thick, medium.cl, dt, f_c)
    ax_h, bx_h = cpml_profile(dist_x(xh), thick, medium.cl, dt, f_c)
    # a block's far face is free: no layer below (distance into it never positive)
    z_layer = (z_max + thick) if grid.free_bottom else (z_max - thick)
    az_i, bz_i = cpml_profile(zi - z_layer, thick, medium.cl, dt, f_c)
    az_h, bz_h = cpml_profile(zh - z_layer, thick, medium.cl, dt, f_c)
    return ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h


class _Recorder:
    """Running Fourier transform of the receiver strips and the rods' base force and velocity.

    One buffer row per sample: vx, vz, sxx, szz, sxz on the strips, then rod force and base
    velocity; one real matrix product per chunk of samples gives the DFT's real and imaginary
    parts (exp(+i w t): phasors in the exp(-i w t) convention).
    """

    CHUNK = 128

    def __init__(self, blocks: dict[str, tuple[int, int, int, int]], nz: int, n_rods: int,
                 freq: np.ndarray, sample_dt: float) -> None:
        flat = []
        self.shapes = {}
        for name, (b_i0, b_i1, b_j0, b_j1) in blocks.items():
            ii, jj = np.meshgrid(np.arange(b_i0, b_i1), np.arange(b_j0, b_j1), indexing="ij")
            flat.append((ii * nz + jj).ravel())
            self.shapes[name] = (b_i1 - b_i0, b_j1 - b_j0)
        self.idx = np.concatenate(flat)
        self.n_val = self.idx.size
        self.n_rods = n_rods
        self.n_r = max(n_rods, 1)
        self.freq = freq
        self.omega = 2 * math.pi * freq
        self.sample_dt = sample_dt
        n_all = 5 * self.n_val + 2 * self.n_r
        self.acc = np.zeros((2 * freq.size, n_all))
        self.buf = np.zeros((self.CHUNK, n_all))
        self.buf_t = np.zeros(self.CHUNK)
        self.n_buf = 0

    def record(self, fields: tuple, ra: dict | None, t: float) -> bool:
        """Store one sample; False when it holds a non-finite value."""
        n_val, n_rods, n_r = self.n_val, self.n_rods, self.n_r
        row = self.buf[self.n_buf]
        for q, fld in enumerate(fields):
            np.take(fld, self.idx, out=row[q * n_val:(q + 1) * n_val])
        if ra is not None:
            row[5 * n_val:5 * n_val + n_rods] = ra["rod_c"][:, 0]
            row[5 * n_val + n_r:5 * n_val + n_r + n_rods] = ra["rod_v"][:, 0]
        self.buf_t[self.n_buf] = t
        self.n_buf += 1
        finite = bool(np.isfinite(row).all())
        if finite and self.n_buf == self.CHUNK:
            self.flush()
        return finite

    def flush(self) -> None:
        if self.n_buf == 0:
            return
        phase = self.omega[:, None] * self.buf_t[None, :self.n_buf]
        e = np.concatenate([np.cos(phase), np.sin(phase)]) * self.sample_dt
        self.acc[:] += e @ self.buf[:self.n_buf]
        self.n_buf = 0

    def spectra(self, dt: float) -> tuple[dict, np.ndarray, np.ndarray]:
        """Per strip the phasor blocks (n_f, nxb, nzb) of each field, and the rods' base force
        and velocity phasors (n_f, n_rods)."""
        n_val, n_rods, n_r, nf = self.n_val, self.n_rods, self.n_r, self.freq.size
        spec = self.acc[:nf] + 1j * self.acc[nf:]
        # velocities (and the rod base velocity) live half a step before the sample time
        shift = np.exp(-0.5j * self.omega * dt)[:, None]
        parts = {"vx": spec[:, :n_val] * shift, "vz": spec[:, n_val:2 * n_val] * shift,
                 "sxx": spec[:, 2 * n_val:3 * n_val], "szz": spec[:, 3 * n_val:4 * n_val],
                 "sxz": spec[:, 4 * n_val:5 * n_val]}
        rod_c = spec[:, 5 * n_val:5 * n_val + n_rods]
        rod_v = spec[:, 5 * n_val + n_r:5 * n_val + n_r + n_rods] * shift
        out_blocks: dict[str, dict[str, np.ndarray]] = {}
        start = 0
        for name, (nxb, nzb) in self.shapes.items():
            stop = start + nxb * nzb
            out_blocks[name] = {k: v[:, start:stop].reshape(-1, nxb, nzb)
                                for k, v in parts.items()}
            start = stop
        return out_blocks, rod_c, rod_v


def simulate(medium: Medium, grid: Grid, band: tuple[float, float], freq: np.ndarray,
             rods: RodRow | None = None, *, n_snapshots: int = 0,
             blocks: dict[str, tuple[int, int, int, int]] | None = None, energy_tol: float = 1e-6,
             progress: Callable[[int, int], None] | None = None) -> RunRecord:
    """Run the time-domain simulation and Fourier-transform the recorded fields.

    Parameters
    ----------
    medium, grid : Medium, Grid
        Substrate and grid (see :func:`plan_grid`).
    band : (float, float)
        Source band (Hz).
    freq : ndarray
        Frequencies (Hz) at which the fields are transformed.
    rods : RodRow, optional
        Resonators; ``None`` for the reference run on the bare substrate.
    n_snapshots : int
        Number of full-grid uz snapshots to keep (for figures and the animation).
    blocks : dict of (i0, i1, j0, j1), optional
        Recorded strips (columns i0..i1-1, rows j0..j1-1); default :func:`receiver_blocks`.
    energy_tol : float
        Stop after ``grid.min_steps`` once the energy left is below this fraction of its peak.
    progress : callable(step, n_steps), optional
        Called now and then.
    """
    h, dt = grid.h, grid.dt
    nx, nz = grid.nx, grid.nz
    lam, mu, rho = medium.lam, medium.mu, medium.rho
    ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h = _pml_profiles(grid, medium, band)

    vx, vz, sxx, szz, sxz = (np.zeros((nx, nz)) for _ in range(5))
    uz = np.zeros((nx, nz))
    tz_new = np.zeros(nx)

    if rods is not None:
        ra = _rod_arrays(rods, grid, medium, band)
        n_rods = rods.x.size
    else:
        ra = None
        n_rods = 0

    if blocks is None:
        blocks = receiver_blocks(grid)
    freq = np.asarray(freq, float)
    rec = _Recorder(blocks, nz, n_rods, freq, grid.sample_every * dt)

    snap_every = max(1, int(1.3 * grid.min_steps) // n_snapshots) if n_snapshots else 0
    snaps = []
    snap_t = []
    amp_src = 1.0 / h  # line force 1 N/m peak spread over one surface cell
    e_peak = 0.0
    e_source = [0.0, False]  # largest energy up to the first check after the pulse; pulse over
    t_pulse = pulse_length(*band)
    t_start = time.perf_counter()
    energy_every = max(1, grid.min_steps // 40)
    n_done = (grid.n_steps // grid.sample_every) * grid.sample_every
    m = grid.sample_every
    n_total = (grid.n_steps // m) * m
    src = amp_src * source_pulse((np.arange(n_total) + 1) * dt, *band)
    if ra is None:
        ra_k = _rod_arrays(RodRow(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0), 1.0,
                                  1.0, 1.0), grid, medium, band)
    else:
        ra_k = ra
    psi_k = np.zeros((8, nx, nz))
    sponge = sponge_profile(grid) if grid.free_bottom else np.zeros(0)
    tau = substrate_tau(medium, band)
    sel = np.zeros((3, nx, nz)) if tau > 0 else np.zeros((3, 1, 1))
    snap_every = m * max(1, snap_every // m) if snap_every else 0
    energy_every = m * max(1, energy_every // m)
    for n0 in range(0, n_total, m):
        n1 = n0 + m
        _k.advance(n0, n1, vx, vz, sxx, szz, sxz, uz, bool(snap_every), rho, lam, mu, dt, h,
                   ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h, psi_k, src, grid.i_source,
                   tz_new, ra_k["rod_v"], ra_k["rod_c"], ra_k["rod_e"], ra_k["n_seg"],
                   ra_k["ds"], ra_k["m_node"], ra_k["m_tip"], ra_k["ea"], ra_k["visc"],
                   ra_k["fp_start"], ra_k["fp_count"], sel, tau, grid.free_bottom, sponge)
        t_new = n1 * dt
        if snap_every and n1 % snap_every == 0 and len(snaps) < n_snapshots:
            snaps.append(uz.astype(np.float32))
            snap_t.append(t_new)
        if not rec.record((vx, vz, sxx, szz, sxz), ra, t_new):
            raise UnstableRun("non-finite field values (the time stepping is unstable)",
                              n1, t_new)
        if n1 % energy_every == 0 or n1 == n_total:
            e_now = _grid_energy(vx, vz, sxx, szz, sxz, medium, grid) + _rod_energy(ra)
            e_peak = max(e_peak, e_now)
            e_source = _energy_growth_check(e_now, e_source, t_new, t_pulse, n1)
            if progress is not None:
                progress(n1, n_total)
            if n1 >= grid.min_steps and e_now < energy_tol * e_peak:
                n_done = n1
                if progress is not None:
                    progress(n_total, n_total)
                break
    rec.flush()
    seconds = time.perf_counter() - t_start
    e_end = _grid_energy(vx, vz, sxx, szz, sxz, medium, grid) + _rod_energy(ra)
    out_blocks, rod_c, rod_v = rec.spectra(dt)
    return RunRecord(
        freq=freq, offsets={k: (v[0], v[2]) for k, v in blocks.items()}, blocks=out_blocks,
        rod_c=rod_c, rod_v=rod_v,
        snapshots=np.array(snaps, dtype=np.float32).reshape(-1, nx, nz),
        snapshot_times=np.array(snap_t), energy_left=e_end / e_peak if e_peak > 0 else 0.0,
        seconds=seconds, cell_updates=float(n_done) * nx * nz, n_steps=n_done,
    )


ENERGY_GROWTH_BOUND = 2.0  # energy after the source stopped / its level when it stopped


class UnstableRun(RuntimeError):
    """A run stopped because its fields became non-finite or its energy grew after the source
    had stopped (an unstable time stepping); ``step`` and ``time`` (s) where it was caught."""

    def __init__(self, reason: str, step: int, time_s: float) -> None:
        super().__init__(f"{reason} at step {step} (t = {time_s:.4g} s)")
        self.reason = reason
        self.step = step
        self.time = time_s


def _energy_growth_check(e_now: float, state: list, t: float, t_pulse: float,
                         step: int) -> list:
    """Energy watch of a run: once the source pulse is over the energy in the model
    (substrate outside the absorbing layers, and rods) can only fall (the layers absorb, the
    body is passive); above ``ENERGY_GROWTH_BOUND`` times its level at the end of the pulse the
    run is unstable. ``state`` = [largest energy up to the end of the pulse, pulse over]."""
    if not math.isfinite(e_now):
        raise UnstableRun("non-finite field energy (the time stepping is unstable)", step, t)
    if not state[1]:
        state[0] = max(state[0], e_now)
        state[1] = t > t_pulse
    elif e_now > ENERGY_GROWTH_BOUND * state[0]:
        raise UnstableRun(f"field energy grew to {e_now / state[0]:.3g} x its level at the end "
                          f"of the source pulse (bound {ENERGY_GROWTH_BOUND:g} x: the time "
                          "stepping is unstable)", step, t)
    return state


def receiver_blocks(grid: Grid) -> dict[str, tuple[int, int, int, int]]:
    """Strips of the grid recorded for the analysis, as (i0, i1, j0, j1) (end exclusive).

    ``left``/``right``: three columns around each vertical receiver line, surface to one row
    below the box; ``top``: the box width, surface to one row below the shallow line;
    ``bottom``: the box width, three rows around the bottom line. One extra column/row on each
    side is what the interpolation to common nodes needs.
    """
    il, ir, jb, js = grid.i_left, grid.i_right, grid.j_bottom, grid.j_shallow
    out = {
        "left": (il - 1, il + 2, 0, jb + 2),
        "right": (ir - 1, ir + 2, 0, jb + 2),
        "top": (il - 1, ir + 2, 0, js + 2),
        "bottom": (il - 1, ir + 2, jb - 1, jb + 2),
    }
    if grid.free_bottom:  # a block: the far face and the rows just above it
        out["far"] = (grid.i_far0 - 1, grid.i_far1 + 1, grid.nz - 6, grid.nz)
    return out


def _rod_energy(ra: dict | None) -> float:
    """Kinetic + strain energy (J/m) of the rods (per unit length of the row)."""
    if ra is None:
        return 0.0
    kin = 0.5 * np.sum(ra["m_node"][:, None] * ra["rod_v"][:, 1:] ** 2)
    kin += 0.5 * np.sum(ra["m_tip"] * ra["rod_v"][np.arange(ra["n_seg"].size), ra["n_seg"]] ** 2)
    strain = 0.5 * np.sum(ra["rod_c"] ** 2 / ra["ea"][:, None] * ra["ds"][:, None])
    return float(kin + strain)


def _grid_energy(vx, vz, sxx, szz, sxz, medium: Medium, grid: Grid) -> float:
    """Kinetic + strain energy (J/m) in the physical part of the grid (outside the CPML)."""
    p = grid.n_pml
    sl = (slice(p, grid.nx - p), slice(0, grid.nz - (0 if grid.free_bottom else p)))
    mu, lam = medium.mu, medium.lam
    kin = 0.5 * medium.rho * (np.sum(vx[sl] ** 2) + np.sum(vz[sl] ** 2))
    a, c, s = sxx[sl], szz[sl], sxz[sl]
    # plane strain compliance: e_xx = ((l+2m) sxx - l szz) / (4 m (l+m)) etc.
    strain = (((lam + 2 * mu) * (a**2 + c**2) - 2 * lam * a * c) / (8 * mu * (lam + mu))
              + s**2 / (2 * mu))
    return float((kin + np.sum(strain)) * grid.h**2)


# --------------------------------------------------------------------------------------------
# Analysis of the recorded fields
# --------------------------------------------------------------------------------------------


def node_fields(rec: RunRecord, part: str, medium: Medium, h: float) -> dict[str, np.ndarray]:
    """Fields of a recorded strip interpolated to the integer nodes (sxx positions), phasors.

    Returns velocities ``vx, vz`` (m/s), stresses ``sxx, szz, sxz`` (Pa), displacement
    divergence ``div`` and rotation ``curl`` (d ux/dz - d uz/dx), shape (n_f, nxb - 2, n_rows),
    on the strip's columns ``1 .. nxb-2`` (grid i = i0 + 1 ...) and rows ``0 .. nzb - 2`` for a
    strip starting at the surface (j0 = 0), ``1 .. nzb - 2`` otherwise (grid j = j0 + row).
    """
    b = rec.blocks[part]
    is_surface = rec.offsets[part][1] == 0
    w = 2 * math.pi * rec.freq[:, None, None]
    vx = 0.5 * (b["vx"][:, :-2, :-1] + b["vx"][:, 1:-1, :-1])
    vz_raw = b["vz"][:, 1:-1, :]
    vz = np.empty_like(vx)
    vz[:, :, 1:] = 0.5 * (vz_raw[:, :, :-2] + vz_raw[:, :, 1:-1])
    vz[:, :, 0] = 1.5 * vz_raw[:, :, 0] - 0.5 * vz_raw[:, :, 1]
    s = b["sxz"]
    quad = 0.25 * (s[:, :-2, :] + s[:, 1:-1, :])  # average over i-1/2, i+1/2 at rows j+1/2
    sxz = np.empty_like(vx)
    sxz[:, :, 1:] = quad[:, :, :-2] + quad[:, :, 1:-1]
    sxz[:, :, 0] = 0.0  # free surface (imaged shear stress)
    sxx = b["sxx"][:, 1:-1, :-1]
    szz = b["szz"][:, 1:-1, :-1]
    div = (sxx + szz) / (2 * (medium.lam + medium.mu))
    # rotation at the sxz nodes from the velocities, then to integer nodes
    rot_v = ((b["vx"][:, :-1, 1:] - b["vx"][:, :-1, :-1])
             - (b["vz"][:, 1:, :-1] - b["vz"][:, :-1, :-1])) / h
    rot = rot_v / (-1j * w)
    rq = 0.25 * (rot[:, :-1, :] + rot[:, 1:, :])
    curl = np.empty_like(vx)
    curl[:, :, 1:] = rq[:, :, :-1] + rq[:, :, 1:]
    curl[:, :, 0] = 2 * rq[:, :, 0]
    out = {"vx": vx, "vz": vz, "sxx": sxx, "szz": szz, "sxz": sxz, "div": div, "curl": curl}
    if not is_surface:
        out = {k: v[:, :, 1:] for k, v in out.items()}
    return out


def _diff(a: dict, b: dict) -> dict:
    return {k: a[k] - b[k] for k in a}


def _trap(n: int) -> np.ndarray:
    w = np.ones(n)
    w[0] = w[-1] = 0.5
    return w


def _line(f: dict, col: int, j_end: int) -> dict:
    """Fields on a vertical line (column index into the node arrays), rows 0..j_end."""
    return {k: v[:, col, : j_end + 1] for k, v in f.items()}


def _flux_x(line: dict, h: float) -> np.ndarray:
    """Power through a vertical line towards +x per frequency (W/m-type spectral units)."""
    p = -np.real(line["sxx"] * np.conj(line["vx"]) + line["sxz"] * np.conj(line["vz"]))
    return np.sum(p * _trap(p.shape[-1]), axis=-1) * h


def _mode_line(medium: Medium, freq: np.ndarray, z: np.ndarray, cr: float,
               sign: int) -> dict[str, np.ndarray]:
    """Rayleigh mode (forward sign=+1, backward sign=-1) on a vertical line as node fields."""
    m = rayleigh_mode(z, 2 * math.pi * freq, medium.cl, medium.ct, medium.rho, cr)
    w = 2 * math.pi * freq[:, None]
    ux, uz = sign * m["ux"], m["uz"]
    return {"vx": -1j * w * ux, "vz": -1j * w * uz, "sxx": m["sxx"], "szz": m["szz"],
            "sxz": sign * m["sxz"], "div": m["div"], "curl": sign * m["curl"]}


def _reciprocity(f: dict, g: dict, w: np.ndarray, h: float) -> np.ndarray:
    """Non-conjugate reciprocity form int (u_f . t_g - u_g . t_f) dz on a vertical line."""
    uf_x, uf_z = f["vx"] / (-1j * w), f["vz"] / (-1j * w)
    ug_x, ug_z = g["vx"] / (-1j * w), g["vz"] / (-1j * w)
    p = uf_x * g["sxx"] + uf_z * g["sxz"] - ug_x * f["sxx"] - ug_z * f["sxz"]
    return np.sum(p * _trap(p.shape[-1]), axis=-1) * h


def mode_amplitudes(line: dict, plus: dict, minus: dict, freq: np.ndarray,
                    h: float) -> tuple[np.ndarray, np.ndarray]:
    """Forward and backward Rayleigh amplitudes of a field on a vertical line.

    a+ = B(F, R-) / B(R+, R-), a- = B(F, R+) / B(R-, R+), with B the reciprocity form (modes
    with k1 + k2 != 0 give B = 0; Auld 1973, from memory).
    """
    w = 2 * math.pi * freq[:, None]
    ap = _reciprocity(line, minus, w, h) / _reciprocity(plus, minus, w, h)
    am = _reciprocity(line, plus, w, h) / _reciprocity(minus, plus, w, h)
    return ap, am


def _sub_modes(line: dict, plus: dict, minus: dict, ap: np.ndarray, am: np.ndarray) -> dict:
    return {k: line[k] - ap[:, None] * plus[k] - am[:, None] * minus[k] for k in line}


def _ps_side(line: dict, medium: Medium) -> tuple[np.ndarray, np.ndarray]:
    """Shear and compressional shares of a bulk field on a side line (plane-wave weights)."""
    wp = medium.cl**3 * np.sum(np.abs(line["div"]) ** 2, axis=-1)
    ws = medium.ct**3 * np.sum(np.abs(line["curl"]) ** 2, axis=-1)
    tot = wp + ws
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, ws / tot, 0.5), np.where(tot > 0, wp / tot, 0.5)


def tukey_window(n: int, alpha: float = 0.1) -> np.ndarray:
    """Tukey (tapered-cosine) window of ``n`` points: flat over the middle 1 - alpha of the
    line, a half cosine over alpha/2 at each end (alpha = 1: Hann; alpha = 0: rectangular;
    F. J. Harris, Proc. IEEE 66, 51, 1978, from memory). Dimensionless."""
    if n < 2 or alpha <= 0:
        return np.ones(max(n, 0))
    x = np.arange(n) / (n - 1)
    a = min(float(alpha), 1.0)
    w = np.ones(n)
    lo = x < a / 2
    hi = x > 1 - a / 2
    w[lo] = 0.5 * (1 + np.cos(np.pi * (2 * x[lo] / a - 1)))
    w[hi] = 0.5 * (1 + np.cos(np.pi * (2 * x[hi] / a - 2 / a + 1)))
    return w


def _fk_split(div: np.ndarray, curl: np.ndarray, freq: np.ndarray, medium: Medium,
              h: float, taper: float = 0.1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Shares of [forward_shear, forward_compressional, backward_shear, backward_compressional],
    power-weighted angles (deg) and mean crossing positions (m from the line's first node) of
    a downgoing field on a horizontal line.

    Wavenumber transform along x (zero-padded, flat-top: :func:`tukey_window`, 5 % cosine
    taper at each end, so that beams crossing anywhere but the last few per cent of the line
    keep their full weight; a Hann taper over the whole line weighted beams near its ends by
    w^2 ~ 0 and biased the split, issue 14); plane-wave flux through the line
    per wavenumber: rho w^2 c k_z |D|^2 / (2 k^3) with D the transformed divergence (P) or
    rotation (S) and k = kL or kT (Achenbach 1973; from memory). Crossing positions: each
    channel's part of the spectrum (sign of k_x, propagating k_x only; untapered) transformed
    back to x, weighted by its squared magnitude.
    """
    n = div.shape[-1]
    n_pad = 1 << int(math.ceil(math.log2(4 * n)))
    win = tukey_window(n, taper)
    kx = 2 * math.pi * np.fft.fftfreq(n_pad, h)
    d_hat = np.fft.fft(div * win, n_pad, axis=-1)
    r_hat = np.fft.fft(curl * win, n_pad, axis=-1)
    w = 2 * math.pi * freq[:, None]
    out = []
    angles = []
    for c, spec in ((medium.ct, r_hat), (medium.cl, d_hat)):
        k = w / c
        kz2 = k**2 - kx[None, :] ** 2
        kz = np.sqrt(np.maximum(kz2, 0.0))
        flux = c * kz * np.abs(spec) ** 2 / k**3
        ang = np.degrees(np.arcsin(np.clip(kx[None, :] / k, -1, 1)))
        out.append((np.sum(np.where(kx > 0, flux, 0), -1), np.sum(np.where(kx < 0, flux, 0), -1)))
        angles.append((ang, flux))
    fs, bs = out[0]
    fp, bp = out[1]
    tot = fs + fp + bs + bp
    with np.errstate(invalid="ignore", divide="ignore"):
        shares = np.stack([fs, fp, bs, bp]) / np.where(tot > 0, tot, 1.0)
        ang_out = []
        for (ang, flux), sel in ((angles[0], kx > 0), (angles[1], kx > 0),
                                 (angles[0], kx < 0), (angles[1], kx < 0)):
            wgt = np.where(sel, flux, 0.0)
            ang_out.append(np.sum(wgt * ang, -1) / np.sum(wgt, -1))
    x = np.arange(n) * h
    x_out = []
    d_raw = np.fft.fft(div, n_pad, axis=-1)
    r_raw = np.fft.fft(curl, n_pad, axis=-1)
    for c, spec, sel in ((medium.ct, r_raw, kx > 0), (medium.cl, d_raw, kx > 0),
                         (medium.ct, r_raw, kx < 0), (medium.cl, d_raw, kx < 0)):
        keep = sel[None, :] & (np.abs(kx)[None, :] < w / c)
        part = np.abs(np.fft.ifft(np.where(keep, spec, 0.0), axis=-1)[:, :n]) ** 2
        with np.errstate(invalid="ignore", divide="ignore"):
            x_out.append(np.sum(part * x, -1) / np.sum(part, -1))
    return shares, np.array(ang_out), np.array(x_out)


def force_radiation(freq: np.ndarray, x_nodes: np.ndarray, weights: np.ndarray,
                    force: np.ndarray, medium: Medium, n_quad: int = 4001) -> np.ndarray:
    """Bulk power radiated into an elastic half-space by vertical surface line forces.

    The scattered field of a run is the bare half-space's response to the rods' base
    tractions, so its bulk radiation follows from the rod forces alone (no receiver line).
    Plane strain, potentials phi = A exp(i xi x - alpha z), psi = B exp(i xi x - beta z) with
    the outgoing branches alpha = -i sqrt(kL^2 - xi^2), beta = -i sqrt(kT^2 - xi^2) inside the
    cones (docs/physics.md section 2), free of shear traction and with szz(0) = -T(xi)
    (Achenbach 1973, Lamb's problem; from memory). The downward flux -Re(sxz vx* + szz vz*) of
    the compressional (phi) and the shear (psi) part, each on its own, is integrated over its
    cone, (1/2 pi) int d xi (Parseval), with xi = k sin(t) (removes the cone-edge square roots).

    Parameters
    ----------
    freq : ndarray, shape (n_f,)
        Frequencies (Hz).
    x_nodes : ndarray, shape (n_nodes,)
        Surface positions (m) of the loaded nodes.
    weights : ndarray, shape (n_rods, n_nodes)
        Share of each rod's force carried by each node (rows sum to 1).
    force : ndarray, shape (n_f, n_rods)
        Force phasors (N/m, positive into the solid), any common scale.
    medium : Medium
        Substrate (lossless).

    Returns
    -------
    ndarray, shape (4, n_f)
        Power (units of |force|^2 / (rho c)) into forward shear, forward compressional,
        backward shear, backward compressional (forward = +x).
    """
    out = np.zeros((4, len(freq)))
    t = np.linspace(-0.5 * np.pi, 0.5 * np.pi, n_quad)
    wq = np.full(n_quad, t[1] - t[0])
    wq[0] = wq[-1] = 0.5 * wq[0]
    lam, mu = medium.lam, medium.mu
    for f_i, f in enumerate(np.asarray(freq, float)):
        w = 2 * np.pi * f
        kl, kt = w / medium.cl, w / medium.ct
        node_force = np.asarray(force[f_i]) @ np.asarray(weights)
        for c_i, k in ((0, kt), (1, kl)):
            xi = k * np.sin(t)
            jac = k * np.cos(t)
            tq = np.exp(-1j * np.outer(xi, x_nodes)) @ node_force  # T(xi)
            al = np.sqrt((xi**2 - kl**2).astype(complex))
            al = np.where(np.abs(xi) < kl, -1j * np.sqrt(np.maximum(kl**2 - xi**2, 0.0)), al)
            be = np.sqrt((xi**2 - kt**2).astype(complex))
            be = np.where(np.abs(xi) < kt, -1j * np.sqrt(np.maximum(kt**2 - xi**2, 0.0)), be)
            # sxz(0) = 0 and szz(0) = -T: A = -T (2 xi^2 - kT^2) / (mu R), B = 2 i xi alpha T
            # / (mu R), R = (2 xi^2 - kT^2)^2 - 4 xi^2 alpha beta (Rayleigh function, no root
            # inside the cones)
            r2 = 2 * xi**2 - kt**2
            rf = r2**2 - 4 * xi**2 * al * be
            a = -tq * r2 / (mu * rf)
            if c_i == 1:  # compressional part alone
                ux, uz = 1j * xi * a, -al * a
                sxz = mu * (-2j * xi * al) * a
                szz = (lam * (al**2 - xi**2) + 2 * mu * al**2) * a
            else:  # shear part alone
                b = 2j * xi * al * tq / (mu * rf)
                ux, uz = be * b, 1j * xi * b
                sxz = -mu * (be**2 + xi**2) * b
                szz = -2j * mu * xi * be * b
            flux = -np.real(sxz * np.conj(-1j * w * ux) + szz * np.conj(-1j * w * uz))
            dens = flux * jac * wq / (2 * np.pi)
            out[c_i, f_i] = np.sum(dens[xi > 0])
            out[2 + c_i, f_i] = np.sum(dens[xi < 0])
    return out


def rod_force_radiation(run: RunRecord, rods: RodRow, grid: Grid,
                        medium: Medium) -> np.ndarray:
    """:func:`force_radiation` of a run's own rod base forces on their footprint nodes
    (shape (4, n_f), same units as the run's power fluxes)."""
    h = grid.h
    n_fp = _footprint_cells(rods.diameter, h)
    centre = (grid.x_array + rods.x) / h
    fp_start = np.round(centre - (n_fp - 1) / 2).astype(np.int64)
    nodes = np.unique(np.concatenate([np.arange(a, a + n) for a, n in zip(fp_start, n_fp,
                                                                             strict=True)]))
    weights = np.zeros((rods.x.size, nodes.size))
    for r in range(rods.x.size):
        cols = np.searchsorted(nodes, np.arange(fp_start[r], fp_start[r] + n_fp[r]))
        weights[r, cols] += 1.0 / n_fp[r]
    return force_radiation(run.freq, nodes * h, weights, run.rod_c, medium)


@dataclass
class ChannelSplit:
    """Result of :func:`split_channels` (fractions of the incident Rayleigh power)."""

    frequency: np.ndarray
    fractions: dict[str, np.ndarray]
    raw: dict[str, np.ndarray]
    position: dict[str, np.ndarray]
    angle: dict[str, np.ndarray]
    closure: np.ndarray
    balance_error: np.ndarray
    reference_balance_error: np.ndarray
    incident_power: np.ndarray
    surface_ratio: np.ndarray
    surface_x: np.ndarray
    downward_flux: np.ndarray


def split_channels(run: RunRecord, ref: RunRecord, medium: Medium, grid: Grid,
                   layout_length: float, rod_x: np.ndarray | None = None,
                   rods: RodRow | None = None) -> ChannelSplit:
    """Split the outgoing power of ``run`` into the seven channels, normalised by ``ref``.

    See the module docstring for the definitions. ``layout_length`` (m) places the
    transmitted channel; positions are measured along the row from its first resonator.
    ``rod_x`` (m, the rods' positions) locates where the surface wave is stopped: the last rod
    whose base force spectrum is at least 10 % (in power) of the largest one; without it the
    drop of the surface motion below 10 % of the reference is used.

    On a lossy substrate the scattered bulk waves lose power between the surface and the
    receiver lines, which the box would book as absorbed; with ``rods`` given, the bulk
    channels are then the radiation of the run's own rod base forces
    (:func:`rod_force_radiation`: the power the row radiates into the ground, as the exact row
    model reports it) and ``absorbed`` the remainder; the receiver-line figures stay in
    ``raw`` under ``line_*`` keys as a diagnostic.
    """
    h = grid.h
    freq = run.freq
    fields = _receiver_fields(run, ref, medium, h)
    sw = _surface_waves(fields, medium, grid, freq)
    bottom, shares, angles, x_origin = _bottom_line(fields, medium, grid, freq, sw["p_inc"])
    if run.rod_c.shape[1]:
        absorbed = np.sum(np.real(-run.rod_c * np.conj(run.rod_v)), axis=1) / sw["p_inc"]
    else:
        absorbed = np.zeros_like(sw["transmitted"])
    box_out = (_box_out(fields, 0, grid), _box_out(fields, 1, grid))
    if medium.loss_factor > 0:
        sw, bottom, absorbed = _lossy_ground(sw, bottom, box_out, grid, layout_length)
        balance = np.full(freq.size, np.nan)
        ref_balance = np.full(freq.size, np.nan)
    else:
        balance = (box_out[0] + absorbed * sw["p_inc"]) / sw["p_inc"]
        ref_balance = box_out[1] / sw["p_inc"]
    raw = {
        "transmitted_surface": sw["transmitted"],
        "reflected_surface": sw["reflected"],
        "forward_shear": shares[0] * bottom + sw["s_r"] * sw["side_fwd"],
        "forward_compressional": shares[1] * bottom + sw["p_r"] * sw["side_fwd"],
        "backward_shear": shares[2] * bottom + sw["s_l"] * sw["side_back"],
        "backward_compressional": shares[3] * bottom + sw["p_l"] * sw["side_back"],
        "absorbed": absorbed,
    }
    closure = np.sum([raw[c] for c in CHANNELS], axis=0)
    if medium.loss_factor > 0 and rods is not None and rods.x.size:
        rad = rod_force_radiation(run, rods, grid, medium) / sw["p_inc"][None, :]
        for i, c in enumerate(BULK):
            raw["line_" + c] = raw[c]
            raw[c] = rad[i]
        raw["line_absorbed"] = raw["absorbed"]
        raw["absorbed"] = 1.0 - sw["transmitted"] - sw["reflected"] - rad.sum(axis=0)
    fractions = _balanced_fractions(raw)
    position, angle, extra = _positions(run, fields, grid, medium, fractions, x_origin, angles,
                                        layout_length, rod_x)
    return ChannelSplit(
        frequency=freq, fractions=fractions, raw=raw, position=position, angle=angle,
        closure=closure, balance_error=balance, reference_balance_error=ref_balance,
        incident_power=sw["p_inc"], **extra,
    )


def _receiver_fields(run: RunRecord, ref: RunRecord, medium: Medium, h: float) -> dict:
    """Per receiver strip: (with rods, bare reference, scattered = difference) node fields."""
    fields = {}
    for part in ("left", "right", "top", "bottom"):
        t_ = node_fields(run, part, medium, h)
        r_ = node_fields(ref, part, medium, h)
        fields[part] = (t_, r_, _diff(t_, r_))
    return fields


def _vline(fields: dict, part: str, which: int, grid: Grid) -> dict:
    return _line(fields[part][which], 0, grid.j_bottom)


def _box_out(fields: dict, which: int, grid: Grid) -> np.ndarray:
    """Power leaving the closed receiver box (total field; 0 with rods, 1 bare reference)."""
    h = grid.h
    right = _flux_x(_vline(fields, "right", which, grid), h)
    left = -_flux_x(_vline(fields, "left", which, grid), h)
    b_ = {k: v[:, :, 0] for k, v in fields["bottom"][which].items()}
    pzz = -np.real(b_["sxz"] * np.conj(b_["vx"]) + b_["szz"] * np.conj(b_["vz"]))
    return right + left + np.sum(pzz * _trap(pzz.shape[-1]), -1) * h


def _surface_waves(fields: dict, medium: Medium, grid: Grid, freq: np.ndarray) -> dict:
    """Rayleigh-mode amplitudes on the side lines: incident power, transmitted and reflected
    fractions, and the bulk flux left on each side line after the modes are taken out (its
    shear / compressional shares)."""
    h = grid.h
    cr = rayleigh_speed(medium.cl, medium.ct)
    z = np.arange(grid.j_bottom + 1) * h
    plus = _mode_line(medium, freq, z, cr, +1)
    minus = _mode_line(medium, freq, z, cr, -1)
    ap_ref_l, _ = mode_amplitudes(_vline(fields, "left", 1, grid), plus, minus, freq, h)
    ap_ref_r, _ = mode_amplitudes(_vline(fields, "right", 1, grid), plus, minus, freq, h)
    ap_tot_r, _ = mode_amplitudes(_vline(fields, "right", 0, grid), plus, minus, freq, h)
    sl_l = _vline(fields, "left", 2, grid)
    sl_r = _vline(fields, "right", 2, grid)
    ap_sl, am_sl = mode_amplitudes(sl_l, plus, minus, freq, h)
    ap_sr, am_sr = mode_amplitudes(sl_r, plus, minus, freq, h)
    p_inc = np.abs(ap_ref_l) ** 2 * _flux_x(plus, h)
    bulk_l = _sub_modes(sl_l, plus, minus, ap_sl, am_sl)
    bulk_r = _sub_modes(sl_r, plus, minus, ap_sr, am_sr)
    s_l, p_l = _ps_side(bulk_l, medium)
    s_r, p_r = _ps_side(bulk_r, medium)
    return {
        "p_inc": p_inc,
        "decay": np.abs(ap_ref_r) ** 2 / np.abs(ap_ref_l) ** 2,
        "transmitted": np.abs(ap_tot_r) ** 2 / np.abs(ap_ref_r) ** 2,
        "reflected": np.abs(am_sl) ** 2 / np.abs(ap_ref_l) ** 2,
        "side_back": -_flux_x(bulk_l, h) / p_inc, "side_fwd": _flux_x(bulk_r, h) / p_inc,
        "s_l": s_l, "p_l": p_l, "s_r": s_r, "p_r": p_r,
    }


def _bottom_line(fields: dict, medium: Medium, grid: Grid, freq: np.ndarray,
                 p_inc: np.ndarray) -> tuple:
    """Scattered flux through the bottom line over the incident power, its four-way split
    (:func:`_fk_split`), the channels' mean angles and where their mean rays left the surface
    (m along the row)."""
    h = grid.h
    bot = {k: v[:, :, 0] for k, v in fields["bottom"][2].items()}
    pz = -np.real(bot["sxz"] * np.conj(bot["vx"]) + bot["szz"] * np.conj(bot["vz"]))
    bottom = np.sum(pz * _trap(pz.shape[-1]), -1) * h / p_inc
    shares, angles, x_cross = _fk_split(bot["div"], bot["curl"], freq, medium, h)
    # back along each channel's mean ray to the surface: where the row sent it
    depth = grid.j_bottom * h
    x_origin = (grid.i_left * h - grid.x_array) + x_cross - depth * np.tan(np.radians(angles))
    return bottom, shares, angles, x_origin


def _lossy_ground(sw: dict, bottom: np.ndarray, box_out: tuple, grid: Grid,
                  layout_length: float) -> tuple[dict, np.ndarray, np.ndarray]:
    """Lossy substrate: the box balance measures the absorption instead of checking it.

    Every fraction is of the power reaching the row's entry x = 0 (the exact row model's and
    the WKB march's convention), not of the power at the left line: the bare wave decays over
    the gaps between the lines and the row as well. Transmitted includes the bare decay over
    the row's length; absorbed is all power lost inside the box, minus what the source's own
    bulk waves lose there (reference loss minus the bare Rayleigh loss) and minus the bare
    Rayleigh loss of the incident, reflected and transmitted waves over the gaps.
    """
    h = grid.h
    p_inc, decay = sw["p_inc"], sw["decay"]
    box_len = (grid.i_right - grid.i_left) * h
    gap_l = grid.x_array - grid.i_left * h
    gap_r = max(0.0, grid.i_right * h - grid.x_array - layout_length)
    d_l, d_r = decay ** (gap_l / box_len), decay ** (gap_r / box_len)
    out = dict(sw)
    out["transmitted"] = sw["transmitted"] * decay ** (min(1.0, layout_length / box_len))
    out["reflected"] = sw["reflected"] / d_l**2
    source_bulk_loss = -box_out[1] / p_inc - (1.0 - decay)
    lost = (-box_out[0] / p_inc - source_bulk_loss - (1.0 - d_l)
            - d_l * (out["reflected"] * (1.0 - d_l) + out["transmitted"] * (1.0 - d_r)))
    out["p_inc"] = p_inc * d_l
    out["side_back"], out["side_fwd"] = sw["side_back"] / d_l, sw["side_fwd"] / d_l
    return out, bottom / d_l, lost / d_l


def _balanced_fractions(raw: dict) -> dict:
    """The seven fractions from the raw figures, summing to 1.

    Bulk total from the power balance (exact when the box balance holds): the direct flux of
    the scattered bulk field also contains its interference with the source's own bulk
    radiation, which the reference run cannot remove; it only sets the split.
    """
    fractions = {c: np.clip(raw[c], 0.0, None) for c in ("transmitted_surface",
                                                         "reflected_surface", "absorbed")}
    surface = fractions["transmitted_surface"] + fractions["reflected_surface"]
    bulk_total = np.clip(1.0 - surface - fractions["absorbed"], 0.0, None)
    measured = np.array([np.clip(raw[c], 0.0, None) for c in BULK])
    m_sum = measured.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(m_sum > 0, measured / np.where(m_sum > 0, m_sum, 1.0), 0.25)
    for i, c in enumerate(BULK):
        fractions[c] = bulk_total * share[i]
    s = np.sum([fractions[c] for c in CHANNELS], axis=0)
    for c in CHANNELS:
        fractions[c] = fractions[c] / s
    return fractions


def _positions(run: RunRecord, fields: dict, grid: Grid, medium: Medium, fractions: dict,
               x_origin: np.ndarray, angles: np.ndarray, layout_length: float,
               rod_x: np.ndarray | None) -> tuple[dict, dict, dict]:
    """Positions (m along the row) and angles (deg) per channel, and the surface diagnostics
    (``surface_ratio``, ``surface_x``, ``downward_flux``) of :class:`ChannelSplit`."""
    h = grid.h
    freq = run.freq
    cr = rayleigh_speed(medium.cl, medium.ct)
    # positions along the row (m from the first resonator)
    tot, ref_f, _ = fields["top"]
    x_nodes = (run.offsets["top"][0] + 1 + np.arange(tot["vz"].shape[1])) * h - grid.x_array
    in_row = (x_nodes >= -0.5 * h) & (x_nodes <= layout_length)
    js = grid.j_shallow
    pz_t = -np.real(tot["sxz"][:, :, js] * np.conj(tot["vx"][:, :, js])
                    + tot["szz"][:, :, js] * np.conj(tot["vz"][:, :, js]))
    pz_r = -np.real(ref_f["sxz"][:, :, js] * np.conj(ref_f["vx"][:, :, js])
                    + ref_f["szz"][:, :, js] * np.conj(ref_f["vz"][:, :, js]))
    down = np.where(in_row, np.clip(pz_t - pz_r, 0.0, None), 0.0)
    ratio = np.abs(tot["vz"][:, :, 0]) ** 2 / np.abs(ref_f["vz"][:, :, 0]) ** 2
    if rod_x is not None and run.rod_c.shape[1] == np.size(rod_x):
        power = np.abs(run.rod_c) ** 2
        strong = power >= 0.1 * power.max(axis=1, keepdims=True)
        last = strong.shape[1] - 1 - np.argmax(strong[:, ::-1], axis=1)
        x_stop = np.asarray(rod_x, float)[last]
    else:
        x_stop = _stop_position(ratio, x_nodes, in_row, cr / freq, h)

    position = {c: np.full(freq.size, np.nan) for c in CHANNELS}
    angle = {c: np.full(freq.size, np.nan) for c in CHANNELS}
    for i, c in enumerate(BULK):
        position[c] = np.where(fractions[c] > 0.01,
                               np.clip(x_origin[i], 0.0, layout_length), np.nan)
        angle[c] = np.where(fractions[c] > 0.01, angles[i], np.nan)
    position["transmitted_surface"] = np.where(fractions["transmitted_surface"] > 0.01,
                                               layout_length, np.nan)
    position["reflected_surface"] = np.where(fractions["reflected_surface"] > 0.01,
                                             x_stop, np.nan)
    angle["transmitted_surface"] = np.where(fractions["transmitted_surface"] > 0.01, 90.0,
                                            np.nan)
    angle["reflected_surface"] = np.where(fractions["reflected_surface"] > 0.01, -90.0, np.nan)
    extra = {"surface_ratio": ratio, "surface_x": x_nodes, "downward_flux": down}
    return position, angle, extra


def _stop_position(ratio: np.ndarray, x: np.ndarray, in_row: np.ndarray, lam: np.ndarray,
                   h: float) -> np.ndarray:
    """Where the surface wave is stopped: first x in the row after which the vertical surface
    power, smoothed over one Rayleigh wavelength, stays below 10 % of the reference."""
    out = np.full(ratio.shape[0], np.nan)
    for f in range(ratio.shape[0]):  # one smoothing kernel per frequency (lengths differ)
        n = max(1, int(round(lam[f] / h)))
        sm = np.convolve(ratio[f], np.ones(n) / n, mode="same")
        low = (sm < 0.1) & in_row
        xs = x[in_row]
        lows = low[in_row]
        if lows.any() and lows[-1]:
            # last index where it was high, then the next x
            high = np.nonzero(~lows)[0]
            out[f] = xs[high[-1] + 1] if high.size else xs[0]
    return out


# --------------------------------------------------------------------------------------------
# Public entry points
# --------------------------------------------------------------------------------------------


@dataclass
class Verification:
    """Full-wave channel fractions of a layout, compared with the exact row model and the
    WKB trace of the same 2-D line layout.

    ``frequency`` (Hz), ``fractions``/``position`` (m)/``angle`` (deg) per channel like
    :class:`optgrade.propagation.Trace`; ``closure`` (raw channel sum before normalisation),
    ``balance_error`` (box energy balance, fraction of the incident power), ``agreement``
    (per channel mean absolute difference and conversion-position difference in cells against
    the exact row model, line variant; ``None`` when it is unavailable), ``exact`` (its Trace
    or ``None``), ``agreement_wkb`` and ``surrogate`` (the same against the WKB trace of the
    surrogate's line model, and that Trace), ``info`` (grid, timing, run diagnostics),
    ``split`` and runs for the figures.
    """

    frequency: np.ndarray
    fractions: dict[str, np.ndarray]
    position: dict[str, np.ndarray]
    angle: dict[str, np.ndarray]
    closure: np.ndarray
    balance_error: np.ndarray
    agreement: dict[str, Any] | None
    surrogate: Any
    info: dict[str, Any]
    split: ChannelSplit | None = None
    grid: Grid | None = None
    run: RunRecord | None = field(default=None, repr=False)
    reference: RunRecord | None = field(default=None, repr=False)
    status: str = "ok"
    reason: str | None = None
    exact: Any = None
    agreement_wkb: dict[str, Any] | None = None

    def total(self) -> np.ndarray:
        return np.sum([self.fractions[c] for c in CHANNELS], axis=0)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: the trace.json channel keys plus ``agreement`` (against the exact
        row model), ``agreement_wkb`` (against the WKB trace), ``exact`` and ``wkb`` (their
        trace.json content, line model), ``energy`` and ``fullwave`` (grid, timing)."""

        def clean(a) -> list:
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, float)]

        return {
            "status": self.status,
            "reason": self.reason,
            "frequency_hz": clean(self.frequency),
            "fractions": {c: clean(self.fractions[c]) for c in CHANNELS},
            "position_m": {c: clean(self.position[c]) for c in CHANNELS},
            "angle_deg": {c: clean(self.angle[c]) for c in CHANNELS},
            "agreement": self.agreement,
            "agreement_wkb": self.agreement_wkb,
            "exact": None if self.exact is None else self.exact.to_dict(),
            "wkb": None if self.surrogate is None else self.surrogate.to_dict(),
            "energy": {"closure": clean(self.closure),
                       "balance_error": clean(self.balance_error)},
            "fullwave": self.info,
        }


# Self-check bounds (fractions of the incident power). Measured on 2026-12-02 (docs/fullwave.md):
# box balance 0.4-1.1 % (normal) and 1.4-3.6 % (fast) on stable runs, closure 0.95-1.12,
# lossless rods < 0.05 %; the unstable runs of issue 14 read 1e4 % .. 1e243 %.
CHECK_BOUNDS = {
    "normal": {"balance": 0.02, "closure": 0.3, "absorbed_lossless": 0.01, "energy_left": 0.01},
    "fast": {"balance": 0.05, "closure": 0.3, "absorbed_lossless": 0.01, "energy_left": 0.01},
}


def self_checks(split: ChannelSplit, run: RunRecord, medium: Medium, rods: RodRow,
                quality: str) -> tuple[dict[str, Any], list[str]]:
    """The run's own checks against ``CHECK_BOUNDS[quality]``: figures and failure reasons.

    - box energy balance (total field leaving the closed box plus the rods' power, lossless
      substrate only) and the same for the reference run: ``max |.| <= balance``;
    - direct-flux closure (raw sum of the measured channels): ``max |closure - 1| <= closure``;
    - power into the rods: ``max |absorbed| <= absorbed_lossless`` on a lossless body, no power
      created (``absorbed >= -absorbed_lossless``) with lossy rods on a lossless substrate;
    - energy left in the model at the end over its peak ``<= energy_left`` (else the Fourier
      transforms are truncated);
    - every fraction finite.
    Returns (figures, reasons); an empty ``reasons`` means the run passed.
    """
    b = CHECK_BOUNDS[quality]
    freq = split.frequency
    figures: dict[str, Any] = {"bounds": dict(b), "quality": quality}
    reasons: list[str] = []

    def worst(values: np.ndarray, what: str, bound: float, unit_pct: bool = True) -> None:
        v = np.asarray(values, float)
        if not np.isfinite(v).all():
            figures[what] = None
            reasons.append(f"{what} is not finite (bound {100 * bound:g} % of the incident "
                           "power)")
            return
        i = int(np.argmax(np.abs(v)))
        figures[what] = float(np.abs(v[i]))
        if abs(v[i]) > bound:
            reasons.append(f"{what} {100 * abs(v[i]):.3g} % of the incident power at "
                           f"{freq[i] / 1e3:.4g} kHz exceeds the bound {100 * bound:g} % "
                           f"({quality} grid)")

    if medium.loss_factor == 0:
        worst(split.balance_error, "energy balance", b["balance"])
        worst(split.reference_balance_error, "reference energy balance", b["balance"])
    worst(split.closure - 1.0, "closure error", b["closure"])
    absorbed = np.asarray(split.raw["absorbed"], float)
    if medium.loss_factor == 0 and rods.loss_factor == 0:
        worst(absorbed, "power absorbed by lossless rods", b["absorbed_lossless"])
    elif medium.loss_factor == 0:
        worst(np.minimum(absorbed, 0.0), "power created by lossy rods", b["absorbed_lossless"])
    figures["energy_left_at_end"] = float(run.energy_left)
    if not run.energy_left <= b["energy_left"]:
        reasons.append(f"energy left in the model at the end {run.energy_left:.3g} of its peak "
                       f"exceeds the bound {b['energy_left']:g} (truncated run)")
    if not all(np.isfinite(split.fractions[c]).all() for c in CHANNELS):
        reasons.append("channel fractions are not finite")
    return figures, reasons


def medium_of(study: Study) -> Medium:
    """Substrate of a study as a :class:`Medium`."""
    s = study.substrate
    return Medium(rho=float(s.density), cl=float(s.cl), ct=float(s.ct),
                  loss_factor=float(s.loss_factor or 0.0))


def rods_of(study: Study, layout: Layout) -> RodRow:
    """Rods of a layout with the study's resonator material, as a :class:`RodRow`."""
    r = study.resonator
    n = layout.x.size
    return RodRow(
        x=np.asarray(layout.x, float), height=np.asarray(layout.height, float),
        diameter=np.broadcast_to(np.asarray(layout.diameter, float), (n,)).copy(),
        head_mass=np.broadcast_to(np.asarray(layout.head_mass, float), (n,)).copy(),
        row_pitch=float(r.row_pitch), youngs_modulus=float(r.youngs_modulus),
        density=float(r.density), loss_factor=float(r.loss_factor or 0.0),
    )


def run_pair(medium: Medium, rods: RodRow, band: tuple[float, float], freq: np.ndarray,
             length: float, *, quality: str = "normal", n_snapshots: int = 0,
             progress: Callable[[str, int, int], None] | None = None,
             **grid_options: Any) -> tuple[Grid, RunRecord, RunRecord, ChannelSplit]:
    """Plan the grid, run with resonators and without, and split the channels."""
    grid = plan_grid(medium, band, length, float(np.min(rods.diameter)), quality=quality,
                     rods=rods, **grid_options)

    def cb(label: str) -> Callable[[int, int], None] | None:
        if progress is None:
            return None
        return lambda i, n: progress(label, i, n)

    run = simulate(medium, grid, band, freq, rods, n_snapshots=n_snapshots,
                   progress=cb("with resonators"))
    ref = simulate(medium, grid, band, freq, None, progress=cb("reference (bare)"))
    split = split_channels(run, ref, medium, grid, length, rods.x, rods)
    return grid, run, ref, split


def compare(split_fractions: dict, split_position: dict, trace: Any,
            spacing: float) -> dict[str, Any]:
    """Agreement between full-wave and a model's trace (exact row model or WKB): fractions
    and positions.

    Per channel: ``mean_abs_difference`` over the band, and ``position_difference_cells`` =
    mean |x_fullwave - x_model| / mean spacing over frequencies where both are defined
    (``None`` where never both), and its median (robust to a few frequencies where the two
    book a small fraction at very different places).
    """
    out: dict[str, Any] = {}
    for c in CHANNELS:
        a = np.asarray(split_fractions[c], float)
        b = np.asarray(trace.fractions[c], float)
        pa = np.asarray(split_position[c], float)
        pb = np.asarray(trace.position[c], float)
        both = np.isfinite(pa) & np.isfinite(pb)
        diff = np.abs(a - b)
        ok = np.isfinite(diff)
        out[c] = {
            "mean_abs_difference": float(np.mean(diff[ok])) if ok.any() else None,
            "position_difference_cells": (float(np.mean(np.abs(pa - pb)[both]) / spacing)
                                          if both.any() else None),
            "position_difference_cells_median": (
                float(np.median(np.abs(pa - pb)[both]) / spacing) if both.any() else None),
        }
    return out


def verify(study: Study, layout: Layout, *, quality: str = "normal", progress: bool = True,
           n_snapshots: int = 40, surrogate: Any = None, exact: Any = None) -> Verification:
    """Full-wave check of ``layout`` under ``study`` (2-D line model), compared with the exact
    row model of the same 2-D line layout (primary) and the WKB trace (beside it).

    Parameters
    ----------
    study : Study
        Validated study (SI); substrate, resonator material and the goal band are used.
    layout : Layout
        The graded row.
    quality : "normal" | "fast"
        Grid density (20 or 10 points per shortest Rayleigh wavelength, 2 or 1 cells per
        footprint) and run length.
    progress : bool
        Show a progress bar (rich) on the terminal.
    n_snapshots : int
        Displacement snapshots kept for figures and the animation.
    surrogate : object, optional
        Dispersion surrogate for the WKB trace (default: the study's surrogate with the 2-D
        line model). When the WKB trace fails, ``agreement_wkb`` is None and the reason is in
        ``info["surrogate_error"]``.
    exact : PropagationModel, optional
        Exact row model to compare with (default: ``propagation_model(study, "scattering",
        model="line")``, docs/physics.md section 13). When it fails, ``agreement`` is None and
        the reason is in ``info["exact_error"]``.
    """
    if quality not in QUALITY:
        raise ValueError(f"quality: must be one of {sorted(QUALITY)}, got {quality!r}")
    medium = medium_of(study)
    rods = rods_of(study, layout)
    band = (float(study.goal.band[0]), float(study.goal.band[1]))
    freq = np.linspace(band[0], band[1], int(study.goal.n_frequencies))
    length = float(layout.length)
    t0 = time.perf_counter()
    try:
        grid, run, ref, split = _run_pair_progress(medium, rods, band, freq, length, quality,
                                                   n_snapshots, progress)
    except UnstableRun as exc:
        return _unstable_verification(exc, medium, rods, band, freq, length, quality,
                                      time.perf_counter() - t0, study)
    checks, reasons = self_checks(split, run, medium, rods, quality)
    info = _run_info(run, ref, grid, split, medium, rods, band, quality, checks,
                     time.perf_counter() - t0)
    if getattr(study.meta, "scale", "bench") == "site":
        info["caution"] = SITE_CAUTION
    spacing = float(np.mean(layout.spacing))
    exact_trace, agreement = _compare_exact(study, layout, freq, split, spacing, exact, info)
    wkb_trace, agreement_wkb = _compare_wkb(study, layout, split, spacing, surrogate, info)
    return Verification(
        frequency=freq, fractions=split.fractions, position=split.position, angle=split.angle,
        closure=split.closure, balance_error=split.balance_error, agreement=agreement,
        surrogate=wkb_trace, info=info, split=split, grid=grid, run=run, reference=ref,
        status="failed" if reasons else "ok", reason="; ".join(reasons) if reasons else None,
        exact=exact_trace, agreement_wkb=agreement_wkb,
    )


def _run_info(run: RunRecord, ref: RunRecord, grid: Grid, split: ChannelSplit, medium: Medium,
              rods: RodRow, band: tuple[float, float], quality: str, checks: dict[str, Any],
              seconds: float) -> dict[str, Any]:
    """verify.json's ``fullwave`` block: grid, timing, diagnostics and the self-checks."""
    info: dict[str, Any] = {
        "model": "2-D plane strain, line variant (rows smeared along y), axial rods",
        "quality": quality,
        "grid_spacing_m": grid.h,
        "time_step_s": grid.dt,
        "n_cells": grid.n_cells,
        "n_steps": run.n_steps + ref.n_steps,
        "seconds": seconds,
        "cell_updates_per_second": (run.cell_updates + ref.cell_updates)
        / max(run.seconds + ref.seconds, 1e-9),
        "energy_left_at_end": _finite_or_none(run.energy_left),
        "max_balance_error": checks.get("energy balance"),
        "substrate_loss_factor": medium.loss_factor,
        "mean_abs_closure_error": _finite_or_none(np.mean(np.abs(split.closure - 1.0))),
        "rod_segments": [int(n) for n in _rod_arrays(rods, grid, medium, band)["n_seg"]],
        "checks": checks,
    }
    if medium.loss_factor == 0:
        info["bulk_from_rod_forces"] = _radiation_summary(run, rods, grid, medium, split)
    return info


def _compare_exact(study: Study, layout: Layout, freq: np.ndarray, split: ChannelSplit,
                   spacing: float, exact: Any, info: dict[str, Any]) -> tuple[Any, Any]:
    """The exact row model's trace of the same 2-D line layout and its agreement with the
    full-wave split; (None, None) with ``info["exact_error"]`` when the model fails."""
    try:
        if exact is None:
            from optgrade.propagation import propagation_model

            exact = propagation_model(study, "scattering", model="line")
        tr = exact.trace(layout, freq)
        bal = tr.balance_error
        if bal is not None and np.isfinite(bal).any():
            info["exact_max_balance_error"] = float(np.nanmax(np.abs(bal)))
        return tr, compare(split.fractions, split.position, tr, spacing)
    except Exception as exc:  # e.g. a ground without Green's tables
        info["exact_error"] = f"{type(exc).__name__}: {exc}"
        return None, None


def _compare_wkb(study: Study, layout: Layout, split: ChannelSplit, spacing: float,
                 surrogate: Any, info: dict[str, Any]) -> tuple[Any, Any]:
    """The WKB trace (surrogate, 2-D line model) and its agreement with the full-wave split;
    (None, None) with ``info["surrogate_error"]`` when the surrogate stage fails."""
    try:
        from optgrade.propagation import trace_study

        if surrogate is None:
            from optgrade.dispersion import surrogate_for_study

            surrogate = surrogate_for_study(study, model="line")
        tr = trace_study(study, layout, surrogate)
        return tr, compare(split.fractions, split.position, tr, spacing)
    except Exception as exc:  # the surrogate stage may be missing or fail on this layout
        info["surrogate_error"] = f"{type(exc).__name__}: {exc}"
        return None, None


def _radiation_summary(run: RunRecord, rods: RodRow, grid: Grid, medium: Medium,
                       split: ChannelSplit) -> dict[str, Any]:
    """Cross-check of the bulk channels: the radiation of the run's own rod base forces
    (:func:`rod_force_radiation`, lossless substrate): band means of its total over the
    incident power, of the four bulk fractions (the balance's bulk total split in its
    proportions) and their differences from the receiver-line split."""
    rad = rod_force_radiation(run, rods, grid, medium) / split.incident_power[None, :]
    tot = rad.sum(axis=0)
    bulk = np.sum([split.fractions[c] for c in BULK], axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(tot > 0, rad / np.where(tot > 0, tot, 1.0), 0.25)
    out: dict[str, Any] = {"total_band_mean": _finite_or_none(np.mean(tot)), "fractions": {},
                           "mean_abs_difference": {}}
    for i, c in enumerate(BULK):
        out["fractions"][c] = _finite_or_none(np.mean(bulk * share[i]))
        out["mean_abs_difference"][c] = _finite_or_none(
            np.mean(np.abs(bulk * share[i] - split.fractions[c])))
    return out


def _finite_or_none(value: Any) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def _run_pair_progress(medium: Medium, rods: RodRow, band: tuple[float, float],
                       freq: np.ndarray, length: float, quality: str, n_snapshots: int,
                       progress: bool) -> tuple[Grid, RunRecord, RunRecord, ChannelSplit]:
    """:func:`run_pair` with a progress bar (rich) when ``progress``; when stderr is not a
    terminal (a log, a pipe), plain lines every 10 % of each phase with the elapsed time and
    an estimate of the time left instead (a bar there shows nothing until the end)."""
    if not progress:
        return run_pair(medium, rods, band, freq, length, quality=quality,
                        n_snapshots=n_snapshots)
    if not sys.stderr.isatty():
        return run_pair(medium, rods, band, freq, length, quality=quality,
                        n_snapshots=n_snapshots, progress=_plain_progress())
    from rich.progress import Progress

    with Progress(transient=False) as bar:
        tasks: dict[str, Any] = {}

        def report(label: str, i: int, n: int) -> None:
            if label not in tasks:
                tasks[label] = bar.add_task(f"full-wave: {label}", total=n)
            bar.update(tasks[label], completed=i)

        return run_pair(medium, rods, band, freq, length, quality=quality,
                        n_snapshots=n_snapshots, progress=report)


def _plain_progress() -> Callable[[str, int, int], None]:
    """Progress callback writing one line per 10 % of each phase to stderr."""
    state: dict[str, Any] = {}

    def report(label: str, i: int, n: int) -> None:
        if label not in state:
            state[label] = [time.perf_counter(), -1]
        t0, last = state[label]
        tenth = int(10 * i / max(n, 1))
        if tenth <= last:
            return
        state[label][1] = tenth
        spent = time.perf_counter() - t0
        left = spent * (n - i) / i if i > 0 else float("nan")
        eta = f", about {left:.0f} s left" if 0 < i < n else ""
        sys.stderr.write(f"full-wave: {label} {100 * i / max(n, 1):.0f} % "
                         f"({spent:.0f} s{eta})\n")
        sys.stderr.flush()

    return report


def _unstable_verification(exc: UnstableRun, medium: Medium, rods: RodRow,
                           band: tuple[float, float], freq: np.ndarray, length: float,
                           quality: str, seconds: float, study: Study) -> Verification:
    """A failed :class:`Verification` for a run stopped by :class:`UnstableRun`: no
    fractions (NaN, written as null), the reason and where the run stopped."""
    grid = plan_grid(medium, band, length, float(np.min(rods.diameter)), quality=quality,
                     rods=rods)
    nan = np.full(freq.size, np.nan)
    info: dict[str, Any] = {
        "model": "2-D plane strain, line variant (rows smeared along y), axial rods",
        "quality": quality, "grid_spacing_m": grid.h, "time_step_s": grid.dt,
        "n_cells": grid.n_cells, "seconds": seconds, "stopped_at_step": exc.step,
        "stopped_at_time_s": exc.time, "substrate_loss_factor": medium.loss_factor,
        "checks": {"bounds": dict(CHECK_BOUNDS[quality]), "quality": quality},
    }
    if getattr(study.meta, "scale", "bench") == "site":
        info["caution"] = SITE_CAUTION
    return Verification(
        frequency=freq, fractions={c: nan.copy() for c in CHANNELS},
        position={c: nan.copy() for c in CHANNELS}, angle={c: nan.copy() for c in CHANNELS},
        closure=nan.copy(), balance_error=nan.copy(), agreement=None, surrogate=None,
        info=info, grid=grid, status="failed", reason=f"run stopped: {exc}",
    )
