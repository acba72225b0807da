"""Finite-element Bloch cell: an independent check of the 2-D line dispersion model.

Test-time code only (scikit-fem is a test extra, not a runtime dependency of optgrade).

The model is ONE plane-strain cell of the periodic array, built with the general-purpose
finite-element library scikit-fem (T. Gustafsson, G. D. McBain, "scikit-fem: A Python package
for finite element assembly", J. Open Source Softw. 5(52), 2369, 2020):

- substrate: a strip 0 <= x <= a (a = spacing), -H <= y <= 0 (y points UP here, so the depth
  is z = -y), isotropic linear elastic, plane strain, quadratic (P2) triangles;
- bottom y = -H clamped (u = 0);
- sides: Bloch-periodic, u(a, y) = u(0, y) exp(i K a). Implemented by a transformation
  u_full = T u_reduced in which every right-side degree of freedom is the matching left-side
  one times the phase; the reduced matrices T^H K T and T^H M T are complex Hermitian;
- top y = 0: traction-free, except for the resonator row;
- resonator row: a 1-D axial bar standing on the surface (the 2-D "line" idealisation of a row
  of rods with row pitch b): axial stiffness per unit out-of-plane length E A / b, mass per unit
  length rho_r A / b, optional tip mass M / b. P2 line elements along the bar.
- coupling by UNIFORM TRACTION over the footprint strip |x - a/2| <= d/2 (d = rod diameter):
  the bar's base displacement is constrained to the MEAN vertical surface displacement over the
  strip, u_base = (1/d) int_strip u_y dx = c^T u. The constraint is built into the same
  transformation T (u_base is not an unknown, its row of T is c^T T_bloch). By the principle of
  virtual work the bar's base force F then enters the substrate's equations as F c, i.e. as the
  consistent nodal load of a traction F/d spread uniformly over the strip. This is exactly the
  contact the analytic strip factor sin(xi d/2)/(xi d/2) of the line model assumes. The mesh has
  nodes at both strip edges, so c^T u is integrated exactly for the P2 field.

All quantities are SI. Frequencies come from the generalised Hermitian eigenproblem
K_r x = w^2 M_r x solved by scipy.sparse.linalg.eigsh in shift-invert mode.

Mode identification. For a real Bloch wavenumber K with K > kT = w/cT, every bulk wave with
horizontal wavenumber K is evanescent in depth, so a deep enough clamped strip has no "box"
modes below the shear line w = cT K: the modes found there are surface modes (the lower bound
branch, and above the rod resonance possibly the upper branch). Box modes exist only above the
shear line. We keep modes with w < cT K and report for each its kinetic-energy share within one
Bloch wavelength of the surface (surface fraction) and in the bar (bar fraction). The tests also
check that the frequency does not move when the strip is made deeper.
"""

from __future__ import annotations

import contextlib
import ctypes
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import eigsh
from skfem import (
    Basis,
    BilinearForm,
    ElementLineP2,
    ElementTriP2,
    ElementVector,
    FacetBasis,
    LinearForm,
    MeshLine,
    MeshTri,
    asm,
)
from skfem.helpers import dot
from skfem.models.elasticity import linear_elasticity

__all__ = [
    "CellModel",
    "CellModes",
    "bloch_transform",
    "build_cell",
    "graded_depth_nodes",
    "rayleigh_speed_ratio",
    "single_thread_blas",
    "solve_cell",
]


@dataclass(frozen=True)
class CellModel:
    """Assembled (real, K-independent) matrices of one cell and the data to apply Bloch phases.

    Attributes
    ----------
    stiffness, mass : scipy.sparse.csr_matrix
        Real symmetric matrices of the free substrate (all P2 vector DOFs) followed by the bar
        DOFs (N/m per unit out-of-plane length, kg per unit length).
    n_substrate : int
        Number of substrate DOFs (the bar DOFs follow).
    master : ndarray of int
        Substrate DOFs kept as unknowns (not clamped, not on the right side).
    right, right_partner : ndarray of int
        Right-side DOFs and the left-side DOF each one copies (same depth, same component).
    bar_base : int
        Global index of the bar's base DOF (eliminated through the coupling constraint).
    bar_free : ndarray of int
        Global indices of the other bar DOFs (unknowns).
    coupling : ndarray of float
        Vector c with u_base = c^T u_substrate (mean vertical displacement over the footprint).
    depth_of_dof : ndarray of float
        Depth z = -y (m) of every DOF (bar DOFs get 0).
    spacing, depth, cl, ct : float
        Cell length a (m), strip depth H (m), substrate wave speeds (m/s).
    """

    stiffness: sp.csr_matrix
    mass: sp.csr_matrix
    n_substrate: int
    master: np.ndarray
    right: np.ndarray
    right_partner: np.ndarray
    bar_base: int
    bar_free: np.ndarray
    coupling: np.ndarray
    depth_of_dof: np.ndarray
    spacing: float
    depth: float
    cl: float
    ct: float

    @property
    def has_bar(self) -> bool:
        """Is a resonator bar attached to this cell?"""
        return self.bar_base >= 0


@dataclass(frozen=True)
class CellModes:
    """Modes of the cell below the shear line for a set of Bloch wavenumbers.

    Attributes
    ----------
    bloch_k : ndarray, shape (n_k,)
        Bloch wavenumbers K (1/m).
    frequency : ndarray, shape (n_k, n_modes)
        Eigenfrequencies f (Hz), ascending; nan where fewer modes lie below the shear line.
    surface_fraction : ndarray, shape (n_k, n_modes)
        Kinetic-energy share within one Bloch wavelength 2 pi / K of the surface, bar included.
    bar_fraction : ndarray, shape (n_k, n_modes)
        Kinetic-energy share of the bar.
    """

    bloch_k: np.ndarray
    frequency: np.ndarray
    surface_fraction: np.ndarray
    bar_fraction: np.ndarray

    @property
    def lower(self) -> np.ndarray:
        """Frequency (Hz) of the lowest surface mode (lower bound branch) for each K."""
        return self.frequency[:, 0]


def rayleigh_speed_ratio(cl: float, ct: float) -> float:
    """Rayleigh-wave speed over shear speed, cR/cT, from the Rayleigh equation.

    Solves (2 - s)^2 = 4 sqrt(1 - s) sqrt(1 - s (cT/cL)^2) for s = (cR/cT)^2 in (0, 1) by
    bisection (scipy.optimize.brentq). Source: Lord Rayleigh, Proc. London Math. Soc. 17 (1885);
    J. D. Achenbach, Wave Propagation in Elastic Solids (1973), section 5.11.

    Parameters
    ----------
    cl, ct : float
        Compressional and shear speeds (m/s), cl > sqrt(2) ct is not required, cl > ct is.

    Returns
    -------
    float
        cR/cT (dimensionless).
    """
    from scipy.optimize import brentq

    g = (ct / cl) ** 2

    def secular(s: float) -> float:
        return (2.0 - s) ** 2 - 4.0 * np.sqrt(1.0 - s) * np.sqrt(1.0 - s * g)

    return float(np.sqrt(brentq(secular, 1e-6, 1.0 - 1e-14, xtol=1e-15)))


def graded_depth_nodes(depth: float, h_surface: float, h_deep: float,
                       growth: float = 1.15, flat: float = 0.0) -> np.ndarray:
    """Node depths from the surface to the bottom, fine at the top and coarser below.

    Parameters
    ----------
    depth : float
        Strip depth H (m).
    h_surface : float
        Element size at the surface (m), kept down to depth `flat`.
    h_deep : float
        Largest element size (m).
    growth : float
        Ratio of neighbouring element sizes in the graded zone.
    flat : float
        Depth (m) over which the surface size is kept.

    Returns
    -------
    ndarray
        y coordinates (m), from -H to 0, increasing.
    """
    z = [0.0]
    h = h_surface
    while z[-1] < depth:
        if z[-1] >= flat:
            h = min(h * growth, h_deep)
        z.append(z[-1] + h)
    z = np.asarray(z)
    z = z * (depth / z[-1])  # stretch the last step to land on H exactly
    return -z[::-1]


def _surface_x_nodes(spacing: float, footprint: float, h_surface: float) -> np.ndarray:
    """x nodes on [0, a] with nodes exactly at the strip edges a/2 -+ d/2 (m)."""
    x0, x1 = 0.5 * (spacing - footprint), 0.5 * (spacing + footprint)
    parts = []
    for lo, hi in ((0.0, x0), (x0, x1), (x1, spacing)):
        if hi - lo <= 0.0:
            continue
        n = max(1, int(np.ceil((hi - lo) / h_surface - 1e-9)))
        parts.append(np.linspace(lo, hi, n + 1)[:-1])
    parts.append(np.array([spacing]))
    return np.unique(np.concatenate(parts))


def build_cell(
    *,
    density: float,
    cl: float,
    ct: float,
    spacing: float,
    depth: float,
    h_surface: float,
    h_deep: float,
    growth: float = 1.15,
    flat: float | None = None,
    rod_modulus: float = 0.0,
    rod_density: float = 0.0,
    rod_diameter: float = 0.0,
    rod_height: float = 0.0,
    row_pitch: float = 1.0,
    head_mass: float = 0.0,
    n_bar_elements: int = 16,
    n_edge_refinements: int = 0,
) -> CellModel:
    """Assemble the real mass and stiffness matrices of one plane-strain cell.

    Parameters
    ----------
    density, cl, ct : float
        Substrate density (kg/m^3) and compressional / shear speeds (m/s).
    spacing : float
        Cell length a (m).
    depth : float
        Strip depth H (m), bottom clamped.
    h_surface, h_deep : float
        Element sizes (m) at the surface and deep in the strip (P2 triangles).
    growth, flat : float
        Grading of the element size with depth (see `graded_depth_nodes`); `flat` defaults to
        one spacing.
    rod_modulus, rod_density, rod_diameter, rod_height : float
        Rod Young's modulus (Pa), density (kg/m^3), diameter d (m) and height L (m). A rod
        height of 0 gives the bare substrate.
    row_pitch : float
        Row pitch b (m): the bar carries E A / b and rho_r A / b per unit out-of-plane length.
    head_mass : float
        Tip mass M (kg) per rod; enters as M / b.
    n_bar_elements : int
        Number of P2 line elements along the bar.
    n_edge_refinements : int
        Local refinements (scikit-fem's conforming triangle refinement) of the elements near
        the two strip edges at the surface, where the uniform traction jumps and the
        displacement gradient is log-singular; refinement radius halves at each pass. Elements
        touching the periodic sides are never marked (the sides must stay matched).

    Returns
    -------
    CellModel
    """
    has_bar = rod_height > 0.0
    footprint = rod_diameter if has_bar else 0.0
    xs = _surface_x_nodes(spacing, footprint, h_surface)
    ys = graded_depth_nodes(depth, h_surface, h_deep, growth,
                            spacing if flat is None else flat)
    mesh = MeshTri.init_tensor(xs, ys)
    edges = np.array([0.5 * (spacing - footprint), 0.5 * (spacing + footprint)])
    for i in range(n_edge_refinements if has_bar else 0):
        centre = mesh.p[:, mesh.t].mean(axis=1)
        dist = np.hypot(centre[0][:, None] - edges[None, :], centre[1][:, None]).min(axis=1)
        x_el = mesh.p[0, mesh.t]
        touches_side = np.any((x_el < 1e-9 * spacing) | (x_el > spacing * (1 - 1e-9)), axis=0)
        mesh = mesh.refined(np.flatnonzero((dist < 2.5 * h_surface / 2**i) & ~touches_side))
    elem = ElementVector(ElementTriP2())
    basis = Basis(mesh, elem, intorder=4)

    mu = density * ct**2
    lam = density * (cl**2 - 2.0 * ct**2)

    @BilinearForm
    def mass_form(u, v, w):
        return density * dot(u, v)

    k_sub = asm(linear_elasticity(lam, mu), basis).tocsr()
    m_sub = asm(mass_form, basis).tocsr()
    n_sub = basis.N

    loc = basis.doflocs
    tol = 1e-9 * spacing
    comp = np.empty(n_sub, dtype=int)
    for c, idx in enumerate(basis.split_indices()):
        comp[idx] = c
    is_bottom = loc[1] < -depth + tol
    is_left = (loc[0] < tol) & ~is_bottom
    is_right = (loc[0] > spacing - tol) & ~is_bottom
    left = np.flatnonzero(is_left)
    right = np.flatnonzero(is_right)
    key_l = np.lexsort((loc[1, left], comp[left]))
    key_r = np.lexsort((loc[1, right], comp[right]))
    left, right = left[key_l], right[key_r]
    if left.size != right.size or not (
        np.allclose(loc[1, left], loc[1, right], atol=tol)
        and np.array_equal(comp[left], comp[right])
    ):
        raise RuntimeError("left and right DOFs of the cell do not match")
    master = np.flatnonzero(~is_bottom & ~is_right)

    depth_of_dof = -loc[1]
    if not has_bar:
        return CellModel(k_sub, m_sub, n_sub, master, right, left, -1, np.zeros(0, int),
                         np.zeros(n_sub), depth_of_dof, spacing, depth, cl, ct)

    # coupling vector: mean vertical displacement over the footprint strip
    x0, x1 = 0.5 * (spacing - footprint), 0.5 * (spacing + footprint)
    strip = mesh.facets_satisfying(
        lambda p: (np.abs(p[1]) < tol) & (p[0] > x0 + tol) & (p[0] < x1 - tol)
    )
    fbasis = FacetBasis(mesh, elem, facets=strip, intorder=6)

    @LinearForm
    def mean_uy(v, w):
        return v[1] / footprint

    coupling = asm(mean_uy, fbasis)
    # a uniform vertical field has mean 1, a horizontal one contributes nothing
    if not (np.isclose(coupling[comp == 1].sum(), 1.0, rtol=1e-12)
            and np.allclose(coupling[comp == 0], 0.0)):
        raise RuntimeError("footprint coupling vector is not a mean of u_y over the strip")

    # bar: axial P2 elements on 0 <= s <= L, per unit out-of-plane length
    area = 0.25 * np.pi * rod_diameter**2
    ea_line = rod_modulus * area / row_pitch
    rho_a_line = rod_density * area / row_pitch
    bar_mesh = MeshLine(np.linspace(0.0, rod_height, n_bar_elements + 1))
    bar_basis = Basis(bar_mesh, ElementLineP2(), intorder=4)

    @BilinearForm
    def bar_k(u, v, w):
        return ea_line * u.grad[0] * v.grad[0]

    @BilinearForm
    def bar_m(u, v, w):
        return rho_a_line * u * v

    k_bar = asm(bar_k, bar_basis).tolil()
    m_bar = asm(bar_m, bar_basis).tolil()
    s = bar_basis.doflocs[0]
    base = int(np.argmin(np.abs(s)))
    tip = int(np.argmin(np.abs(s - rod_height)))
    m_bar[tip, tip] += head_mass / row_pitch
    n_bar = bar_basis.N

    stiffness = sp.block_diag((k_sub, k_bar.tocsr()), format="csr")
    mass = sp.block_diag((m_sub, m_bar.tocsr()), format="csr")
    bar_free = n_sub + np.setdiff1d(np.arange(n_bar), [base])
    depth_all = np.concatenate([depth_of_dof, np.zeros(n_bar)])
    return CellModel(stiffness, mass, n_sub, master, right, left, n_sub + base, bar_free,
                     coupling, depth_all, spacing, depth, cl, ct)


def bloch_transform(model: CellModel, bloch_k: float) -> sp.csr_matrix:
    """Complex transformation T with u_full = T u_reduced for Bloch wavenumber K (1/m).

    Rows: every DOF of the model (substrate then bar). Columns: the master substrate DOFs then
    the free bar DOFs. Right-side rows copy their left partner's column times exp(i K a);
    clamped rows are empty; the bar base row is c^T applied to the substrate rows.
    """
    n_full = model.stiffness.shape[0]
    n_master = model.master.size
    col_of = np.full(model.n_substrate, -1)
    col_of[model.master] = np.arange(n_master)
    phase = np.exp(1j * bloch_k * model.spacing)
    rows = [model.master, model.right]
    cols = [np.arange(n_master), col_of[model.right_partner]]
    vals = [np.ones(n_master, complex), np.full(model.right.size, phase)]
    n_cols = n_master + model.bar_free.size
    if model.has_bar:
        rows.append(model.bar_free)
        cols.append(n_master + np.arange(model.bar_free.size))
        vals.append(np.ones(model.bar_free.size, complex))
    t = sp.csr_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
        shape=(n_full, n_cols),
    )
    if model.has_bar:
        c_sub = sp.csr_matrix(model.coupling[None, :])
        base_row = (c_sub @ t[: model.n_substrate]).tocoo()
        t = t.tolil()
        t[model.bar_base, base_row.col] = base_row.data
        t = t.tocsr()
    return t


@contextlib.contextmanager
def single_thread_blas() -> Iterator[None]:
    """Run the block with OpenBLAS limited to one thread, then restore the previous count.

    ARPACK's many small dense BLAS calls slow down badly when OpenBLAS threads compete with
    other processes for the two shared cores (measured: 0.15 s against 2.7 s for one eigen-
    solve). Finds the OpenBLAS copies loaded by numpy/scipy through /proc/self/maps (Linux);
    does nothing where that is not available.
    """
    setters = []
    try:
        with open("/proc/self/maps") as maps:
            paths = sorted({ln.split()[-1] for ln in maps if "openblas" in ln.lower()})
    except OSError:
        paths = []
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for suffix in ("", "64_"):
            for prefix in ("scipy_openblas", "openblas"):
                get = getattr(lib, f"{prefix}_get_num_threads{suffix}", None)
                put = getattr(lib, f"{prefix}_set_num_threads{suffix}", None)
                if get is not None and put is not None:
                    setters.append((put, int(get())))
    try:
        for put, _ in setters:
            put(1)
        yield
    finally:
        for put, n_before in setters:
            put(n_before)


def solve_cell(model: CellModel, bloch_k: np.ndarray, n_modes: int = 3,
               guess_speed: float | None = None) -> CellModes:
    """Eigenfrequencies below the shear line for each Bloch wavenumber.

    Parameters
    ----------
    model : CellModel
        Assembled cell.
    bloch_k : array_like
        Bloch wavenumbers K (1/m), kT < K <= pi/a expected.
    n_modes : int
        Number of eigenpairs computed per K (shift-invert nearest to the shift).
    guess_speed : float, optional
        Phase speed (m/s) used to place the shift at 0.7 * guess_speed * K; defaults to
        0.7 of the Rayleigh speed from `rayleigh_speed_ratio`, so the lowest modes are found.

    Returns
    -------
    CellModes
    """
    bloch_k = np.atleast_1d(np.asarray(bloch_k, dtype=float))
    if guess_speed is None:
        guess_speed = rayleigh_speed_ratio(model.cl, model.ct) * model.ct
    freq = np.full((bloch_k.size, n_modes), np.nan)
    surf = np.full_like(freq, np.nan)
    barf = np.full_like(freq, np.nan)
    is_bar = np.zeros(model.stiffness.shape[0], bool)
    if model.has_bar:
        is_bar[model.n_substrate:] = True
    for i, kb in enumerate(bloch_k):  # one sparse eigenproblem per K: no array form exists
        t = bloch_transform(model, kb)
        th = t.conj().T
        k_r = (th @ model.stiffness @ t).tocsc()
        m_r = (th @ model.mass @ t).tocsc()
        sigma = (0.7 * guess_speed * kb) ** 2
        with single_thread_blas():
            w2, vec = eigsh(k_r, k=n_modes, M=m_r, sigma=sigma, which="LM", tol=1e-12)
        order = np.argsort(w2)
        w2, vec = w2[order], vec[:, order]
        u = t @ vec
        energy = np.real(u.conj() * (model.mass @ u))
        total = energy.sum(axis=0)
        near = (model.depth_of_dof <= 2.0 * np.pi / kb) | is_bar
        omega = np.sqrt(np.abs(w2))
        keep = omega < model.ct * kb
        n_keep = int(keep.sum())
        freq[i, :n_keep] = omega[keep] / (2.0 * np.pi)
        surf[i, :n_keep] = (energy[near].sum(axis=0) / total)[keep]
        barf[i, :n_keep] = (energy[is_bar].sum(axis=0) / total)[keep]
    return CellModes(bloch_k, freq, surf, barf)
