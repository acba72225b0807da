"""Where the converted bulk waves reach the far face of a block (docs/physics.md section 14).

A bench block of thickness H has a free far face at depth z = H. The exact row model
(`optgrade.propagation._scattering`) gives the forces F_j (N/m per unit incident surface
amplitude) that the resonators press on the top face. Their traction spectrum

    t(xi) = S(xi) sum_j F_j exp(-i xi x_j)

(S the footprint form factor at the across-row harmonic n = 0; the others are evanescent) sets
the free-surface potential amplitudes of the compressional (A) and shear (B) waves,

    A = -t (2 xi^2 - kT^2) / (mu R(xi)),    B = 2 i xi alpha t / (mu R(xi))

(u_x = phi_x - psi_z, u_z = phi_z + psi_x; R the Rayleigh function, alpha the outgoing
compressional vertical decay; the same amplitudes as the bulk tables of the row model). Each
partial field (compressional or shear, forward xi > 0 or backward xi < 0) is propagated as a
plane-wave spectrum to depth H, phi = A exp(i (xi x + nu z)), nu = sqrt(k^2 - xi^2), and its
vertical power flux per unit length of the far face is

    p(x) = (w / 2) Im(sigma_xz conj(u_x) + sigma_zz conj(u_z))        (W/m per m of face).

The integral of p over x is the channel's bulk power (Parseval), so the map is normalised by the
incident Rayleigh power w / (4 Res) and its integral over the whole face equals the row model's
bulk fraction of that channel (checked to 1e-6 in tests/test_farface.py). The spectral integral
runs over the propagation angle, xi = k sin(theta), with Gauss-Legendre panels split where the
integrand has branch points (theta = 0, and the compressional critical angle for the shear
wave), so it is smooth on every panel. Evanescent parts are left out: they carry no power
through a plane in a lossless solid and have decayed at the depths allowed (H >= 2 Rayleigh
wavelengths). A lossy substrate attenuates each plane wave on its way down by the imaginary
part of its lossy vertical wavenumber (first order in the loss factor).

What the map leaves out: the far face reflects the arriving waves back up (the second bounce),
and the bulk waves that reach the side faces; it is the first arrival on an infinitely wide
block. The ray estimate beside it (`ray_arrivals`) puts each channel's power at its trace
position plus H tan(angle).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numba import njit

from optgrade.channels import RADIATING

__all__ = ["FarFaceMap", "face_grid", "far_face_map", "plane_wave_state", "ray_arrivals",
           "ray_only", "with_ray_estimate", "zone_fraction", "zone_grid"]

#: Gauss-Legendre order per angle panel, and the largest phase change per panel (rad).
N_GL = 16
PHASE_PER_PANEL = 24.0
#: The face is mapped out to this angle from the normal on both sides of the row (deg).
WINDOW_ANGLE_DEG = 72.0
#: Grid points per shear wavelength along the face (highest frequency), and the cap.
POINTS_PER_WAVELENGTH = 6
MAX_POINTS = 1200

_GL_X, _GL_W = np.polynomial.legendre.leggauss(N_GL)
#: (wave, direction) of each radiating channel, in the order of RADIATING.
_WAVE_NAMES = {"T": "shear", "L": "compressional"}
#: channel of each (wave, sign of the horizontal wavenumber)
_CHANNEL_OF = {("T", 1): "forward_shear", ("L", 1): "forward_compressional",
               ("T", -1): "backward_shear", ("L", -1): "backward_compressional"}


def plane_wave_state(wave: str, xi, nu, lam: float, mu: float, kl: float) -> np.ndarray:
    """(u_x, u_z, s_xz, s_zz) on a horizontal plane of one plane wave per unit potential
    amplitude, phi (``wave`` "L") or psi ("T") = exp(i (xi x + nu z)), u = grad phi +
    curl(psi y); nu > 0 goes down, -nu up. Shape (4, ...) like ``xi``."""
    xi = np.asarray(xi)
    nu = np.asarray(nu)
    if wave == "L":
        return np.stack([1j * xi, 1j * nu, -2 * mu * xi * nu, -(lam * kl * kl + 2 * mu * nu * nu)])
    return np.stack([-1j * nu, 1j * xi, mu * (nu * nu - xi * xi), -2 * mu * xi * nu])


@dataclass(frozen=True)
class FarFaceMap:
    """Power arriving at the far face z = ``depth`` per channel, position and frequency.

    Attributes
    ----------
    depth : float
        Block thickness H (m).
    frequency : ndarray, shape (n_f,)
        Hz.
    x : ndarray, shape (n_x,) or None
        Positions along the far face in the row's frame (m); None for the ray estimate only.
    flux : dict[str, ndarray (n_f, n_x)] or None
        Vertical power flux per unit length of the face, as a fraction of the incident surface
        wave's power per metre (1/m), per radiating channel.
    arrival, width : dict[str, ndarray (n_f,)]
        Power-weighted mean position (m) and standard deviation (m) of each channel's arrival
        inside the mapped window; nan where the channel carries nothing.
    reaching : dict[str, ndarray (n_f,)]
        Fraction of the incident power crossing the mapped window (-).
    total : dict[str, ndarray (n_f,)]
        The channel's whole bulk fraction (-), from the spectrum (all angles).
    ray_arrival : dict[str, ndarray (n_f,)]
        Ray estimate: the trace's channel position plus H tan(angle) (m).
    method : str
        ``"map"`` (plane-wave spectra of the exact model's forces) or ``"ray"`` (ray estimate
        only; a propagation model without forces).
    zone, zone_inside : (lo, hi) and ndarray (n_f,), or None
        The ``[goal.far_face]`` zone (m) and the fraction of the incident power arriving
        inside it in bulk waves, the flux of the whole bulk field integrated on the zone's own
        grid (the number the goal scores).
    flux_total : ndarray (n_f, n_x) or None
        Flux of the whole bulk field (all four channels together, 1/m). The channel fluxes
        are those of each channel's own plane waves (xi > 0 or < 0, one wave type): each
        integrates exactly to its channel's power, but where two channels' beams overlap on the
        face their cross terms (zero in the integral) are not in either; ``flux_total`` has
        them. It is the flux a sensor on the face would see.
    flux_wave : dict["shear" | "compressional", ndarray (n_f, n_x)] or None
        Flux of each wave type's whole field (forward and backward together; 1/m): where the
        two halves of one beam meet (near the normal) only this is the local flux.
    """

    depth: float
    frequency: np.ndarray
    x: np.ndarray | None
    flux: dict[str, np.ndarray] | None
    arrival: dict[str, np.ndarray]
    width: dict[str, np.ndarray]
    reaching: dict[str, np.ndarray]
    total: dict[str, np.ndarray]
    ray_arrival: dict[str, np.ndarray]
    method: str
    zone: tuple[float, float] | None = None
    zone_inside: np.ndarray | None = None
    flux_total: np.ndarray | None = None
    flux_wave: dict[str, np.ndarray] | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready (trace.json key ``far_face``): lists, None for nan."""

        def clean(a) -> list:
            a = np.asarray(a, float)
            if a.ndim > 1:
                return [clean(r) for r in a]
            return [None if not np.isfinite(v) else float(v) for v in a]

        out: dict[str, Any] = {
            "depth_m": float(self.depth),
            "method": self.method,
            "frequency_hz": clean(self.frequency),
            "arrival_m": {c: clean(v) for c, v in self.arrival.items()},
            "width_m": {c: clean(v) for c, v in self.width.items()},
            "reaching": {c: clean(v) for c, v in self.reaching.items()},
            "total": {c: clean(v) for c, v in self.total.items()},
            "ray_arrival_m": {c: clean(v) for c, v in self.ray_arrival.items()},
            "leaves_out": ("the reflection of the arriving waves at the far face back to the "
                           "top (second bounce) and the side faces: first arrival on an "
                           "infinitely wide block"),
        }
        if self.x is not None and self.flux is not None:
            out["position_m"] = clean(self.x)
            out["flux_per_m"] = {c: clean(v) for c, v in self.flux.items()}
            if self.flux_total is not None:
                out["flux_total_per_m"] = clean(self.flux_total)
        if self.zone is not None and self.zone_inside is not None:
            out["zone"] = {"x_range_m": [float(v) for v in self.zone],
                           "inside": clean(self.zone_inside)}
        return out


def ray_arrivals(trace, depth: float) -> dict[str, np.ndarray]:
    """Ray estimate per radiating channel: position + H tan(angle) (m; nan where the channel
    carries nothing). Angles are from the normal, negative backward (Trace convention)."""
    out = {}
    for c in RADIATING:
        ang = np.radians(np.asarray(trace.angle[c], float))
        out[c] = np.asarray(trace.position[c], float) + float(depth) * np.tan(ang)
    return out


def zone_fraction(face: FarFaceMap, fractions: dict[str, np.ndarray],
                  x_range: tuple[float, float]) -> np.ndarray:
    """Share of the converted (bulk) power arriving inside ``x_range`` (m), per frequency.

    With a map: the flux of the whole bulk field integrated over the zone (on the zone's own grid
    when the map was made for this zone), divided by the four channels' bulk fraction (power beyond
    the mapped window counts as outside). With the ray estimate only: each channel's fraction counts
    inside when its ray arrival does. nan where nothing is converted (below 1e-9 of the incident
    power).
    """
    lo, hi = (float(v) for v in x_range)
    bulk = np.sum([np.asarray(fractions[c], float) for c in RADIATING], axis=0)
    inside = np.zeros_like(bulk)
    if face.zone_inside is not None and face.zone == (lo, hi):
        inside = np.asarray(face.zone_inside, float).copy()
    elif face.flux_total is not None and face.x is not None:
        x = face.x
        wts = _trapezoid_weights(x)
        # part of each trapezoid cell inside the zone: clip the cell edges
        edges = np.concatenate([[x[0]], 0.5 * (x[1:] + x[:-1]), [x[-1]]])
        cover = np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None)
        share = np.where(wts > 0, cover / np.where(wts > 0, wts, 1.0), 0.0)
        inside = face.flux_total @ (wts * share)
    else:
        for c in RADIATING:
            xa = face.ray_arrival[c]
            hit = np.isfinite(xa) & (xa >= lo) & (xa <= hi)
            inside += np.where(hit, np.asarray(fractions[c], float), 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(bulk > 1e-9, np.clip(inside, 0.0, None) / bulk, np.nan)
    return np.minimum(out, 1.0)


def _trapezoid_weights(x: np.ndarray) -> np.ndarray:
    w = np.zeros_like(x)
    d = np.diff(x)
    w[:-1] += 0.5 * d
    w[1:] += 0.5 * d
    return w


def face_grid(x_first: float, x_last: float, depth: float, ct: float, f_max: float,
              zone: tuple[float, float] | None = None) -> np.ndarray:
    """Uniform far-face positions (m) covering the row widened by H tan(WINDOW_ANGLE) on both
    sides (and the zone), POINTS_PER_WAVELENGTH per shear wavelength at ``f_max``, at most
    MAX_POINTS."""
    reach = float(depth) * math.tan(math.radians(WINDOW_ANGLE_DEG))
    lo, hi = x_first - reach, x_last + reach
    if zone is not None:
        lo, hi = min(lo, zone[0]), max(hi, zone[1])
    step = ct / f_max / POINTS_PER_WAVELENGTH
    n = int(min(MAX_POINTS, max(64, math.ceil((hi - lo) / step) + 1)))
    return np.linspace(lo, hi, n)


def _angle_nodes(breaks: list[float], phase_rate: float,
                 singular: tuple[float, ...] = ()) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights in theta over consecutive ``breaks`` (rad), panels
    short enough that the phase, changing at most ``phase_rate`` rad per rad, moves by at most
    PHASE_PER_PANEL on each. An interval ending at one of the ``singular`` angles (a square-root
    branch point of the integrand: the shear wave's compressional critical angle) is mapped by
    theta = s -+ (length) u^2, which makes the integrand smooth in u (without it the error fell
    only linearly with the panel length; measured)."""
    nodes, weights = [], []
    for a, b in zip(breaks[:-1], breaks[1:], strict=True):
        at_b = any(abs(b - v) < 1e-15 for v in singular)
        at_a = any(abs(a - v) < 1e-15 for v in singular)
        n = max(1, math.ceil(phase_rate * (b - a) * (2 if (at_a or at_b) else 1)
                             / PHASE_PER_PANEL))
        edges = np.linspace(0.0, 1.0, n + 1)
        half = 0.5 * np.diff(edges)
        mid = 0.5 * (edges[1:] + edges[:-1])
        u = (mid[:, None] + half[:, None] * _GL_X[None, :]).ravel()
        wu = (half[:, None] * _GL_W[None, :]).ravel()
        if at_b:  # theta = b - (b - a) (1 - u)^2 ... written with v = 1 - u
            v = 1.0 - u
            th, wt = b - (b - a) * v * v, 2.0 * (b - a) * v * wu
        elif at_a:
            th, wt = a + (b - a) * u * u, 2.0 * (b - a) * u * wu
        else:
            th, wt = a + (b - a) * u, (b - a) * wu
        nodes.append(th)
        weights.append(wt)
    return np.concatenate(nodes), np.concatenate(weights)


@njit(cache=True, fastmath=True)
def _sum_waves(xi, coef, x0, dx, n_x, out):
    """out[c, m] = sum_t coef[c, t] exp(i xi[t] (x0 + m dx)) for the four field components c
    (u_x, u_z, sigma_xz, sigma_zz) on a uniform grid; the phase advances by a recurrence."""
    n_t = xi.size
    z = np.empty(n_t, dtype=np.complex128)
    r = np.empty(n_t, dtype=np.complex128)
    for t in range(n_t):
        z[t] = np.exp(1j * xi[t] * x0)
        r[t] = np.exp(1j * xi[t] * dx)
    for m in range(n_x):
        a0 = 0j
        a1 = 0j
        a2 = 0j
        a3 = 0j
        for t in range(n_t):
            zt = z[t]
            a0 += coef[0, t] * zt
            a1 += coef[1, t] * zt
            a2 += coef[2, t] * zt
            a3 += coef[3, t] * zt
            z[t] = zt * r[t]
        out[0, m] = a0
        out[1, m] = a1
        out[2, m] = a2
        out[3, m] = a3


@njit(cache=True, fastmath=True)
def _row_spectrum(xi, xr, forces, out):
    """out[t] = sum_j forces[j] exp(-i xi[t] x_j): the row's force spectrum at the nodes."""
    for t in range(xi.size):
        re = 0.0
        im = 0.0
        for j in range(xr.size):
            ph = xi[t] * xr[j]
            c = np.cos(ph)
            s = np.sin(ph)
            fr = forces[j].real
            fi = forces[j].imag
            re += fr * c + fi * s
            im += fi * c - fr * s
        out[t] = complex(re, im)


def _fields_on(grid: np.ndarray, xi, coef) -> np.ndarray:
    """The four field components (u_x, u_z, sigma_xz, sigma_zz) of a plane-wave sum on a
    uniform grid, shape (4, n)."""
    comp = np.empty((4, grid.size), dtype=complex)
    dx = float(grid[1] - grid[0]) if grid.size > 1 else 0.0
    _sum_waves(xi, np.ascontiguousarray(coef), float(grid[0]), dx, grid.size, comp)
    return comp


def _flux(comp: np.ndarray, w: float) -> np.ndarray:
    """Vertical power flux (W/m per m) of a field: (w/2) Im(sxz conj(ux) + szz conj(uz))."""
    ux, uz, sxz, szz = comp
    return 0.5 * w * np.imag(sxz * np.conj(ux) + szz * np.conj(uz))


def zone_grid(x_range: tuple[float, float], ct: float, f_max: float) -> np.ndarray:
    """Uniform points over a far-face zone (m), at least 2 * POINTS_PER_WAVELENGTH per shear
    wavelength at ``f_max`` (the zone integral is a trapezoid sum on them)."""
    lo, hi = (float(v) for v in x_range)
    step = ct / f_max / (2 * POINTS_PER_WAVELENGTH)
    return np.linspace(lo, hi, int(min(4 * MAX_POINTS, max(9, math.ceil((hi - lo) / step) + 1))))


def far_face_map(sub, freq, x_res, forces, diameter: float, model: str, depth: float,
                 x_face: np.ndarray | None, *, zone: tuple[float, float] | None = None,
                 trace=None) -> FarFaceMap:
    """The far-face map of a row (see the module docstring).

    Parameters
    ----------
    sub : SubstrateSpec-like
        density, cl, ct, loss_factor.
    freq : array (n_f,)
        Hz.
    x_res : array (n,)
        Resonator positions (m).
    forces : complex array (n_f, n)
        Forces per unit length for a unit incident surface amplitude (N/m per m).
    diameter, model
        Footprint (m) and variant ("line": strip; "lattice": disc, harmonic n = 0).
    depth : float
        Block thickness H (m).
    x_face : array (n_x,) or None
        Far-face positions (m), increasing and uniform (`face_grid`); None: no map, only the
        zone integral (the search's fast path; the zone number is the same either way).
    zone : (lo, hi), optional
        Far-face zone (m): its integral per channel, on its own grid (`zone_grid`).
    trace : Trace, optional
        For the ray estimate beside the map.
    """
    from optgrade.propagation._green import form_factor, pole_constants

    f = np.atleast_1d(np.asarray(freq, float))
    xr = np.asarray(x_res, float)
    rho, cl, ct = float(sub.density), float(sub.cl), float(sub.ct)
    eta = float(getattr(sub, "loss_factor", 0.0) or 0.0)
    mu = rho * ct**2
    lam = rho * (cl**2 - 2 * ct**2)
    w_all = 2 * math.pi * f
    res = pole_constants(sub, w_all, diameter, model).res
    h = float(depth)
    root = complex(1.0, -eta) ** 0.5
    grids = []
    if x_face is not None:
        grids.append(("map", np.asarray(x_face, float)))
    if zone is not None:
        grids.append(("zone", zone_grid(zone, ct, float(f.max()))))
    lo = min(g[0] for _, g in grids) if grids else float(xr[0])
    hi = max(g[-1] for _, g in grids) if grids else float(xr[-1])
    # largest distance from a source to a face point, for the panel count
    dist = math.hypot(max(abs(hi - xr[0]), abs(xr[-1] - lo)), h)
    n_f = f.size
    n_x = 0 if x_face is None else grids[0][1].size
    flux = {c: np.zeros((n_f, n_x)) for c in RADIATING}
    total = {c: np.zeros(n_f) for c in RADIATING}
    flux_all = np.zeros((n_f, n_x))
    flux_wave = {name: np.zeros((n_f, n_x)) for name in _WAVE_NAMES.values()}
    inside = np.zeros(n_f) if zone is not None else None
    for i, w in enumerate(w_all):
        whole = [np.zeros((4, grid.size), dtype=complex) for _, grid in grids]
        kl, kt = w / cl, w / ct
        p_inc = w / (4.0 * float(np.real(res[i])))
        for wave, k, kc in (("L", kl, w / (cl * root)), ("T", kt, w / (ct * root))):
            brk, sing = [-math.pi / 2, 0.0, math.pi / 2], ()
            if wave == "T":
                tc = math.asin(kl / kt)
                brk, sing = [-math.pi / 2, -tc, 0.0, tc, math.pi / 2], (-tc, tc)
            th, wt = _angle_nodes(brk, k * dist, sing)
            xi = k * np.sin(th)
            nu = k * np.cos(th)
            jac = wt * nu  # dxi = k cos(theta) dtheta
            xi2 = xi * xi
            nl2 = kl * kl - xi2
            al = np.where(nl2 > 0, -1j * np.sqrt(np.abs(nl2)), np.sqrt(np.abs(nl2)))
            be = -1j * np.sqrt(np.clip(kt * kt - xi2, 0.0, None))
            r = (2 * xi2 - kt * kt) ** 2 - 4 * xi2 * al * be
            s = form_factor(xi, diameter, model)
            t_spec = np.empty(xi.size, dtype=complex)
            _row_spectrum(xi, xr, np.ascontiguousarray(forces[i]), t_spec)
            t_spec *= s
            # lossy substrate: the lossy vertical wavenumber attenuates each plane wave
            nu_c = np.sqrt(kc * kc - xi2 + 0j)
            down = np.exp(1j * nu_c.real * h - abs(nu_c.imag) * h)
            if wave == "L":
                amp = -t_spec * (2 * xi2 - kt * kt) / (mu * r)
            else:
                amp = 2j * xi * al * t_spec / (mu * r)
            vec = plane_wave_state(wave, xi, nu, lam, mu, kl)
            coef = vec * (amp * down * jac / (2 * math.pi))[None, :]
            # the whole channel from the spectrum (Parseval): rho w^3 nu |amp|^2 / 2
            dens = 0.5 * rho * w**3 * nu * np.abs(amp * down) ** 2 * jac / (2 * math.pi)
            fwd, bwd = _CHANNEL_OF[wave, 1], _CHANNEL_OF[wave, -1]
            pos, neg = xi > 0, xi < 0
            total[fwd][i] = float(np.sum(dens[pos])) / p_inc
            total[bwd][i] = float(np.sum(dens[neg])) / p_inc
            for g, (kind, grid) in enumerate(grids):
                cf = _fields_on(grid, xi[pos], coef[:, pos])
                cb = _fields_on(grid, xi[neg], coef[:, neg])
                whole[g] += cf + cb
                if kind == "map":
                    flux[fwd][i], flux[bwd][i] = _flux(cf, w) / p_inc, _flux(cb, w) / p_inc
                    flux_wave[_WAVE_NAMES[wave]][i] = _flux(cf + cb, w) / p_inc
        for g, (kind, grid) in enumerate(grids):
            p = _flux(whole[g], w) / p_inc
            if kind == "map":
                flux_all[i] = p
            else:
                inside[i] = float(np.sum(p * _trapezoid_weights(grid)))
    arrival, width, reaching = {}, {}, {}
    xf = grids[0][1] if x_face is not None else None
    for c in RADIATING:
        if xf is None:
            arrival[c] = width[c] = reaching[c] = np.full(n_f, np.nan)
            continue
        pw = flux[c] * _trapezoid_weights(xf)[None, :]
        tot = pw.sum(axis=1)
        ok = tot > 1e-12
        safe = np.where(ok, tot, 1.0)
        mean = (pw @ xf) / safe
        var = (pw @ (xf * xf)) / safe - mean**2
        arrival[c] = np.where(ok, mean, np.nan)
        width[c] = np.where(ok, np.sqrt(np.clip(var, 0.0, None)), np.nan)
        reaching[c] = tot
    ray = ray_arrivals(trace, h) if trace is not None else {
        c: np.full(n_f, np.nan) for c in RADIATING}
    return FarFaceMap(h, f, xf, flux if xf is not None else None, arrival, width, reaching,
                      total, ray, "map", zone, inside, flux_all if xf is not None else None,
                      flux_wave if xf is not None else None)


def with_ray_estimate(trace, study):
    """``trace`` with the ray-estimate far-face record when the study has a thickness and the
    trace has no far-face record yet (a propagation model without forces); else unchanged."""
    thickness = getattr(study.substrate, "thickness", None)
    if thickness is None or getattr(trace, "far_face", None) is not None:
        return trace
    from dataclasses import replace

    return replace(trace, far_face=ray_only(trace, float(thickness)))


def ray_only(trace, depth: float) -> FarFaceMap:
    """A far-face record with the ray estimate only (propagation models without forces): the
    arrival is the ray's, widths and the spectrum total are unknown (nan), ``reaching`` the
    trace's channel fractions."""
    ray = ray_arrivals(trace, depth)
    f = np.asarray(trace.frequency, float)
    nan = {c: np.full(f.size, np.nan) for c in RADIATING}
    frac = {c: np.asarray(trace.fractions[c], float) for c in RADIATING}
    return FarFaceMap(float(depth), f, None, None, ray, dict(nan), frac, frac, ray, "ray")
