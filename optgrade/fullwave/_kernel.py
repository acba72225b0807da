"""Compiled time-step kernels of the 2-D plane-strain full-wave solver (private).

Staggered-grid velocity-stress finite differences, second order in space and time
(J. Virieux, Geophysics 51, 889, 1986), with a free surface by stress imaging at the row of
normal stresses (A. R. Levander, Geophysics 53, 1425, 1988) and convolutional perfectly
matched layers (CPML: J. A. Roden and S. D. Gedney, Microw. Opt. Technol. Lett. 27, 334, 2000;
D. Komatitsch and R. Martin, Geophysics 72, SM155, 2007). Citations from memory.

Grid (i along x, j along z into the solid, spacing h, surface at j = 0):

- ``sxx[i, j]``, ``szz[i, j]`` at (i h, j h)
- ``vx[i, j]`` at ((i + 1/2) h, j h)
- ``vz[i, j]`` at (i h, (j + 1/2) h)
- ``sxz[i, j]`` at ((i + 1/2) h, (j + 1/2) h)

Velocities live at half time steps, stresses at whole steps. The surface row j = 0 carries the
applied vertical traction ``tz`` (positive into the solid): ``szz[:, 0] = -tz``; the shear stress
is imaged antisymmetrically above the surface.

Rods are axial bars along z standing on the surface (per unit length of the row: stiffness
E A / b, mass rho_r A / b, tip mass M / b). Node velocities ``rod_v[r, k]`` (k = 0 at the base,
positive into the solid), compressive forces ``rod_c[r, k]`` between nodes k and k + 1.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True)
def step_velocity(vx, vz, sxx, szz, sxz, rho, dt, h,
                  ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h,
                  p_vx_x, p_vx_z, p_vz_x, p_vz_z, free_bottom=False):  # pragma: no cover
    """Advance vx, vz by one step from the stresses (momentum balance, CPML in both axes).

    With ``free_bottom`` the last row j = nz - 1 is a second free face (a block's far face,
    no layer below): its shear stress is imaged antisymmetrically below it, as at the top."""
    nx, nz = vx.shape
    c = dt / (rho * h)
    for i in range(nx - 1):
        axh = ax_h[i]
        bxh = bx_h[i]
        for j in range(nz):
            dsxx = sxx[i + 1, j] - sxx[i, j]
            if j == 0:
                dsxz = 2.0 * sxz[i, 0]
            elif free_bottom and j == nz - 1:
                dsxz = -2.0 * sxz[i, nz - 2]
            else:
                dsxz = sxz[i, j] - sxz[i, j - 1]
            if axh != 0.0:
                p_vx_x[i, j] = bxh * p_vx_x[i, j] + axh * dsxx
                dsxx += p_vx_x[i, j]
            if az_i[j] != 0.0:
                p_vx_z[i, j] = bz_i[j] * p_vx_z[i, j] + az_i[j] * dsxz
                dsxz += p_vx_z[i, j]
            vx[i, j] += c * (dsxx + dsxz)
    for i in range(1, nx):
        axi = ax_i[i]
        bxi = bx_i[i]
        for j in range(nz - 1):
            dsxz = sxz[i, j] - sxz[i - 1, j]
            dszz = szz[i, j + 1] - szz[i, j]
            if axi != 0.0:
                p_vz_x[i, j] = bxi * p_vz_x[i, j] + axi * dsxz
                dsxz += p_vz_x[i, j]
            if az_h[j] != 0.0:
                p_vz_z[i, j] = bz_h[j] * p_vz_z[i, j] + az_h[j] * dszz
                dszz += p_vz_z[i, j]
            vz[i, j] += c * (dsxz + dszz)


@njit(cache=True)
def step_stress(vx, vz, sxx, szz, sxz, lam, mu, dt, h,
                ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h,
                p_s_x, p_s_z, p_sxz_x, p_sxz_z, tz, sel, tau,
                free_bottom=False):  # pragma: no cover
    """Advance the stresses by one step (Hooke's law); free surface with applied traction.

    With ``free_bottom`` the last row is a free face too (szz = 0, sxx with the plane-strain
    modulus of a free face; see :func:`step_velocity`).

    With ``tau > 0`` the substrate is Kelvin-Voigt viscoelastic, sigma = C (e + tau de/dt):
    ``sel`` (3, nx, nz) keeps the elastic parts of sxx, szz, sxz and the stresses are the
    elastic part plus tau times the rate (increment / dt). With ``tau == 0`` ``sel`` is unused.
    """
    nx, nz = sxx.shape
    l2m = lam + 2.0 * mu
    c = dt / h
    is_visc = tau > 0.0
    g = tau / dt
    # Surface row: plane-strain modulus with szz = 0 for sxx. The applied traction acts on the
    # vertical momentum only (its Poisson effect on sxx in the half cell above the first vz
    # node is left out: that term is not energy-consistent on this grid and made the box
    # energy balance fail by several per cent; the omission is an O(h) local error).
    m_surf = 4.0 * mu * (lam + mu) / l2m
    for i in range(1, nx):
        axi = ax_i[i]
        bxi = bx_i[i]
        for j in range(nz):
            dvx = vx[i, j] - vx[i - 1, j]
            if axi != 0.0:
                p_s_x[i, j] = bxi * p_s_x[i, j] + axi * dvx
                dvx += p_s_x[i, j]
            if j == 0 or (free_bottom and j == nz - 1):
                d = c * m_surf * dvx
                if is_visc:
                    sel[0, i, j] += d
                    sxx[i, j] = sel[0, i, j] + g * d
                else:
                    sxx[i, j] += d
                szz[i, j] = -tz[i] if j == 0 else 0.0
                continue
            dvz = vz[i, j] - vz[i, j - 1]
            if az_i[j] != 0.0:
                p_s_z[i, j] = bz_i[j] * p_s_z[i, j] + az_i[j] * dvz
                dvz += p_s_z[i, j]
            dx_ = c * (l2m * dvx + lam * dvz)
            dz_ = c * (lam * dvx + l2m * dvz)
            if is_visc:
                sel[0, i, j] += dx_
                sel[1, i, j] += dz_
                sxx[i, j] = sel[0, i, j] + g * dx_
                szz[i, j] = sel[1, i, j] + g * dz_
            else:
                sxx[i, j] += dx_
                szz[i, j] += dz_
    for i in range(nx - 1):
        axh = ax_h[i]
        bxh = bx_h[i]
        for j in range(nz - 1):
            dvxz = vx[i, j + 1] - vx[i, j]
            dvzx = vz[i + 1, j] - vz[i, j]
            if az_h[j] != 0.0:
                p_sxz_z[i, j] = bz_h[j] * p_sxz_z[i, j] + az_h[j] * dvxz
                dvxz += p_sxz_z[i, j]
            if axh != 0.0:
                p_sxz_x[i, j] = bxh * p_sxz_x[i, j] + axh * dvzx
                dvzx += p_sxz_x[i, j]
            d = c * mu * (dvxz + dvzx)
            if is_visc:
                sel[2, i, j] += d
                sxz[i, j] = sel[2, i, j] + g * d
            else:
                sxz[i, j] += d


@njit(cache=True)
def step_rods(vz, rod_v, rod_c, rod_e, n_seg, ds, m_node, m_tip, ea, visc,
              fp_start, fp_count, dt, h, tz):  # pragma: no cover - compiled
    """Advance every rod by one step (the substrate's step) and add its base force to ``tz``.

    The rod base moves with the mean vertical velocity of its footprint (the nodes
    ``fp_start .. fp_start + fp_count - 1`` of the surface) at the half step, and presses on
    that footprint with a uniform traction equal to its base compressive force at the whole
    step (the time level of the stresses) divided by the footprint width. Rod velocities live
    at half steps, rod forces at whole steps, like the substrate's: substrate and rods together
    are one leapfrog of M u'' = -K u with one symmetric stiffness K (the base spring's force on
    the footprint is the gradient of its strain energy in the footprint's mean displacement),
    stable while dt^2 lambda_max(M^-1 K) < 4 (docs/fullwave.md, "Stability"). The rods are
    not sub-stepped: a rod advanced in sub-steps against a base velocity frozen over the step
    breaks that symmetry and grew without bound (issue 14). Kelvin-Voigt damping:
    C = E A (e + visc de/dt).
    """
    n_rods = rod_v.shape[0]
    for r in range(n_rods):
        n = n_seg[r]
        vb = 0.0
        for i in range(fp_start[r], fp_start[r] + fp_count[r]):
            vb += vz[i, 0]
        vb /= fp_count[r]
        rod_v[r, 0] = vb
        m = m_node[r]
        for k in range(1, n):
            rod_v[r, k] += dt * (rod_c[r, k] - rod_c[r, k - 1]) / m
        rod_v[r, n] += dt * (-rod_c[r, n - 1]) / (0.5 * m + m_tip[r])
        for k in range(n):
            rate = (rod_v[r, k + 1] - rod_v[r, k]) / ds[r]
            rod_e[r, k] += dt * rate
            rod_c[r, k] = ea[r] * (rod_e[r, k] + visc[r] * rate)
        t = rod_c[r, 0] / (fp_count[r] * h)
        for i in range(fp_start[r], fp_start[r] + fp_count[r]):
            tz[i] += t


@njit(cache=True)
def advance(n0, n1, vx, vz, sxx, szz, sxz, uz, is_uz, rho, lam, mu, dt, h,
            ax_h, bx_h, ax_i, bx_i, az_i, bz_i, az_h, bz_h, psi, src, i_source, tz,
            rod_v, rod_c, rod_e, n_seg, ds, m_node, m_tip, ea, visc, fp_start,
            fp_count, sel, tau, free_bottom, sponge):  # pragma: no cover - compiled
    """Steps n0 .. n1-1 in one call (velocity, rods, surface traction, stress).

    ``sponge`` (nx,) or empty: every field of column i is multiplied by sponge[i] after each
    step (a block's side layers, see `optgrade.fullwave._solver.plan_grid`).

    ``src[n]`` is the source traction at time (n + 1) dt on surface node ``i_source``;
    ``psi`` stacks the eight CPML memory arrays; with ``is_uz`` the vertical displacement
    ``uz`` is integrated as well (for snapshots); ``sel``/``tau``: see :func:`step_stress`.
    """
    for n in range(n0, n1):
        step_velocity(vx, vz, sxx, szz, sxz, rho, dt, h, ax_h, bx_h, ax_i, bx_i, az_i, bz_i,
                      az_h, bz_h, psi[0], psi[1], psi[2], psi[3], free_bottom)
        tz[:] = 0.0
        tz[i_source] = src[n]
        if rod_v.shape[0] > 0:
            step_rods(vz, rod_v, rod_c, rod_e, n_seg, ds, m_node, m_tip, ea, visc, fp_start,
                      fp_count, dt, h, tz)
        step_stress(vx, vz, sxx, szz, sxz, lam, mu, dt, h, ax_h, bx_h, ax_i, bx_i, az_i, bz_i,
                    az_h, bz_h, psi[4], psi[5], psi[6], psi[7], tz, sel, tau, free_bottom)
        if sponge.size:
            for i in range(vx.shape[0]):
                g = sponge[i]
                if g != 1.0:
                    for j in range(vx.shape[1]):
                        vx[i, j] *= g
                        vz[i, j] *= g
                        sxx[i, j] *= g
                        szz[i, j] *= g
                        sxz[i, j] *= g
        if is_uz:
            for i in range(uz.shape[0]):
                for j in range(uz.shape[1]):
                    uz[i, j] += dt * vz[i, j]


def warm_up() -> None:
    """Compile the kernels on a tiny grid (numba caches the machine code on disk)."""
    nx, nz = 6, 5
    f = [np.zeros((nx, nz)) for _ in range(5)]
    p = [np.zeros((nx, nz)) for _ in range(8)]
    cx = [np.zeros(nx) for _ in range(4)]
    cz = [np.zeros(nz) for _ in range(4)]
    step_velocity(*f, 1.0, 1e-3, 1.0, cx[0], cx[1], cx[2], cx[3], cz[0], cz[1], cz[2], cz[3],
                  *p[:4])
    step_stress(*f, 1.0, 1.0, 1e-3, 1.0, cx[0], cx[1], cx[2], cx[3], cz[0], cz[1], cz[2], cz[3],
                *p[4:], np.zeros(nx), np.zeros((3, nx, nz)), 0.0)
    step_rods(f[1], np.zeros((1, 3)), np.zeros((1, 2)), np.zeros((1, 2)), np.array([2]),
              np.array([1.0]), np.array([1.0]), np.array([0.0]), np.array([1.0]),
              np.array([0.0]), np.array([1]), np.array([1]), 1e-3, 1.0, np.zeros(nx))
    for n_rods in (0, 1):
        advance(0, 1, *f, np.zeros((nx, nz)), True, 1.0, 1.0, 1.0, 1e-3, 1.0, cx[0], cx[1],
                cx[2], cx[3], cz[0], cz[1], cz[2], cz[3], np.zeros((8, nx, nz)), np.zeros(1),
                1, np.zeros(nx), np.zeros((n_rods, 3)), np.zeros((n_rods, 2)),
                np.zeros((n_rods, 2)), np.full(n_rods, 2), np.ones(n_rods), np.ones(n_rods),
                np.zeros(n_rods), np.ones(n_rods), np.zeros(n_rods), np.ones(n_rods, np.int64),
                np.ones(n_rods, np.int64), np.zeros((3, nx, nz)), 0.0, False, np.zeros(0))

