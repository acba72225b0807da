"""Strip- or disc-averaged surface Green's function of the half-space, tabulated per study.

The finite-row model (docs/physics.md section 13) couples resonator j to resonator k through

    g(x, w) = sum_n (1/2 pi) int G(k_n, w) S(k_n)^2 exp(i xi x) dxi,   k_n^2 = xi^2 + q_n^2,

vertical surface displacement averaged over one footprint per unit force per unit length (along
y) applied on another footprint at separation x (m/(N/m)). ``"line"`` (2-D plane strain): n = 0
only, strip of width d, S = sin(xi d/2)/(xi d/2). ``"lattice"`` (3-D row): rows of discs of
radius r = d/2 at pitch b across, in phase, S = 2 J1(k r)/(k r), q_n = 2 pi n/b; the n != 0
terms are evanescent while q_1 exceeds the Rayleigh wavenumber (checked, else refused).

Evaluation, per frequency (conventions of docs/physics.md section 2: exp(-i w t), outgoing contour
below +kR and above -kR):

1. Rayleigh pole, analytically: p(xi) = A/(xi^2 - kR^2), A = 2 kR Res S(kR)^2, whose transform
   on the outgoing contour is i Res S(kR)^2 exp(i kR |x|); Res = -alpha kT^2/(mu R'(kR)). With a
   lossy substrate kR = w/(cR sqrt(1 - i eta)) is complex (Im kR > 0) and the same split holds.
2. The smooth rest (G S^2 - p) on 0 <= xi <= X0, composite Gauss-Legendre panels in variables
   that remove the square-root branch points (xi = kL sin t on the compressional cone, a cosine
   map between kL and kT, xi = kT + v^2 above), enough panels for the oscillation xi x_max.
3. The rest beyond X0, by rotating the contour into the complex plane (xi = X0 +- i t; the
   integrand is analytic there on the principal sheet) and Gauss-Laguerre in t scaled by x - d:
   exponentially convergent for every tabulated separation x > d.
4. x = 0 (self term): the part beyond X0 is split into the static compliance
   G_s = (1 - nu)/(mu k) (closed form for the strip, frequency-independent quadrature for the
   disc) and the dynamic rest (G - G_s) S^2 (quadrature in xi = X0/s); the row harmonics n != 0
   are summed to |n| = N_STATIC with the static tail beyond from the large-argument mean of S^2
   (as the lattice sums of `optgrade.dispersion` do).

Tables hold the smooth rest (everything but the pole term) on a separation grid made of uniform
segments (spacing (x - d)/40 near the shortest separation, lambda_T/32 far away) and at x = 0,
plus the four bulk-radiation tables (shear / compressional, power and angle moments over the
forward half of the cones) that `optgrade.propagation._scattering` needs. Separations are
interpolated with 6-point Lagrange stencils (accuracy measured in tests/test_scattering.py).

Cache: like the dispersion tables (key = hash of every input and ``FORMAT_VERSION``, checksum
in a side file, atomic writes, stale or corrupt files rebuilt), directory $OPTGRADE_CACHE or
~/.cache/optgrade; loaded memory-mapped.
"""

from __future__ import annotations

import cmath
import hashlib
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numba import njit
from scipy.special import j1, jv, sici, zeta

from optgrade._table_cache import default_cache_dir, read_cached, write_cached
from optgrade.units import format_eng as _eng

__all__ = [
    "FORMAT_VERSION",
    "GreenSpec",
    "GreenTables",
    "green_tables",
    "pole_constants",
    "form_factor",
    "bulk_densities",
]

FORMAT_VERSION = 2
N_GL = 16  # Gauss-Legendre order per panel
N_LAGUERRE = 28  # Gauss-Laguerre nodes of the rotated tail
N_STENCIL = 6  # Lagrange stencil (points)
N_STATIC = 160  # row harmonics summed exactly in the self term (static part)
N_DYNAMIC = 16  # row harmonics whose dynamic self-term part is summed
PPW = 32  # grid points per shear wavelength (far segments)
NEAR = 40  # grid points per (x - d) near the shortest separation

_GL_X, _GL_W = np.polynomial.legendre.leggauss(N_GL)
_LAG_X, _LAG_W = np.polynomial.laguerre.laggauss(N_LAGUERRE)
_LAG_WE = _LAG_W * np.exp(_LAG_X)


# ----------------------------------------------------------------------------- point physics


@njit(cache=True)
def _vert(d, principal):
    """sqrt(d) on the outgoing branch (-i sqrt(-d) inside the cone, docs/physics.md s. 3.2) on the
    real axis, or the principal root on the rotated contour (analytic continuation there)."""
    if (not principal) and d.real < 0.0:
        return -1j * cmath.sqrt(-d)
    return cmath.sqrt(d)


@njit(cache=True)
def _rayleigh(k2, kl2, kt2, principal):
    """Rayleigh function R (1/m^4) and alpha at squared wavenumber k2 (rationalised where the
    direct difference cancels, as in optgrade.ground)."""
    al = _vert(k2 - kl2, principal)
    be = _vert(k2 - kt2, principal)
    a = (2.0 * k2 - kt2) ** 2
    b = 4.0 * k2 * al * be
    den = a + b
    if abs(den) >= abs(a):
        num = (
            16.0 * k2**3 * (kl2 - kt2)
            + 8.0 * k2**2 * kt2 * (3.0 * kt2 - 2.0 * kl2)
            - 8.0 * k2 * kt2**3
            + kt2**4
        )
        return num / den, al
    return a - b, al


@njit(cache=True)
def _compliance(k2, kl2, kt2, mu, principal):
    """Surface compliance G = -alpha kT^2/(mu R) at squared wavenumber k2 (m/Pa per 1/m)."""
    r, al = _rayleigh(k2, kl2, kt2, principal)
    return -al * kt2 / (mu * r)


@njit(cache=True)
def _axis_values(xi, s2, kl2, kt2, mu, q2, amp, kr2, out):
    """G(k) S(k)^2 - A/(xi^2 - kR^2) at real xi (outgoing branch), k^2 = xi^2 + q^2."""
    for i in range(xi.size):
        k2 = complex(xi[i] * xi[i] + q2)
        val = _compliance(k2, kl2, kt2, mu, False) * s2[i]
        if amp != 0.0:
            val -= amp / (xi[i] * xi[i] - kr2)
        out[i] = val


@njit(cache=True)
def _dynamic_values(xi, s2, kl2, kt2, mu, q2, static_c, out):
    """(G(k) - G_s(k)) S(k)^2 at real xi, G_s = static_c / k (static compliance)."""
    for i in range(xi.size):
        k2 = complex(xi[i] * xi[i] + q2)
        out[i] = (_compliance(k2, kl2, kt2, mu, False) - static_c / cmath.sqrt(k2)) * s2[i]


@njit(cache=True, fastmath=True)
def _accumulate(xi, wv, seg_x0, seg_h, seg_start, seg_n, out, use_cos):
    """out[r, i] += sum_q wv[r, q] cos(xi_q x_i) (or exp(i xi_q x_i)) on uniform segments.

    Grid point by grid point, all nodes at once: the phasors exp(i xi_q x) advance by
    exp(i xi_q h) (a recurrence along x, independent across nodes, so the inner loop over q
    vectorises); renormalised every 64 steps."""
    n_r, n_q = wv.shape
    er = np.empty(n_q)
    ei = np.empty(n_q)
    sr = np.empty(n_q)
    si = np.empty(n_q)
    wr = np.ascontiguousarray(wv.real)
    wi = np.ascontiguousarray(wv.imag)
    for s in range(seg_x0.size):
        for q in range(n_q):
            e = cmath.exp(1j * xi[q] * seg_x0[s])
            st = cmath.exp(1j * xi[q] * seg_h[s])
            er[q], ei[q], sr[q], si[q] = e.real, e.imag, st.real, st.imag
        for i in range(seg_n[s]):
            col = seg_start[s] + i
            for r in range(n_r):
                acc_r = 0.0
                acc_i = 0.0
                if use_cos:
                    for q in range(n_q):
                        acc_r += wr[r, q] * er[q]
                        acc_i += wi[r, q] * er[q]
                else:
                    for q in range(n_q):
                        acc_r += wr[r, q] * er[q] - wi[r, q] * ei[q]
                        acc_i += wr[r, q] * ei[q] + wi[r, q] * er[q]
                out[r, col] += complex(acc_r, acc_i)
            for q in range(n_q):
                a = er[q] * sr[q] - ei[q] * si[q]
                ei[q] = er[q] * si[q] + ei[q] * sr[q]
                er[q] = a
            if (i & 63) == 63:
                for q in range(n_q):
                    m = 1.0 / math.sqrt(er[q] * er[q] + ei[q] * ei[q])
                    er[q] *= m
                    ei[q] *= m


@njit(cache=True)
def _tail(xg, d, x0r, tau, wt, s2t, kl2, kt2, mu, q2, amp, kr2, symmetric, out):
    """(1/pi) int_X0^inf f(xi) cos(xi x) dxi for every grid x, f = G S^2 - p, on the rotated
    contours xi = X0 +- i t, t = tau/(x - d) (Gauss-Laguerre nodes tau[i, k] with weights
    wt[i, k] exp(tau), zero-padded); s2t[dir, i, k] holds S^2 there (dir 0 up, 1 down). With
    ``symmetric`` (lossless substrate: f(conj xi) = conj f(xi)) the down path is the conjugate
    of the up path."""
    for i in range(xg.size):
        x = xg[i]
        y = x - d
        ph = cmath.exp(1j * x0r * x)
        acc = 0j
        for k in range(tau.shape[1]):
            if wt[i, k] == 0.0:
                break
            t = tau[i, k] / y
            wk = wt[i, k] / y * math.exp(-t * x)
            for sgn in range(1 if symmetric else 2):
                sg = 1.0 if sgn == 0 else -1.0
                xi = complex(x0r, sg * t)
                k2 = xi * xi + q2
                val = _compliance(k2, kl2, kt2, mu, True) * s2t[sgn, i, k]
                if amp != 0.0:
                    val -= amp / (xi * xi - kr2)
                # up: d xi = i dt, exp(i xi x); down: d xi = -i dt, exp(-i xi x)
                term = (1j * sg) * val * (ph if sgn == 0 else np.conj(ph))
                if symmetric:
                    acc += wk * 2.0 * term.real  # up + conj(up) with the factor i folded in
                else:
                    acc += wk * term
        out[i] += acc / (2.0 * math.pi)


def _laguerre_sets(y: np.ndarray, x_cut: float) -> tuple[np.ndarray, np.ndarray]:
    """Per-point Gauss-Laguerre nodes and weights x exp(node) (zero-padded): N_LAGUERRE nodes
    where X0 (x - d) < 40 (the integrand varies on the node scale), 14 beyond."""
    n = y.size
    tau = np.zeros((n, N_LAGUERRE))
    wt = np.zeros((n, N_LAGUERRE))
    x_s, w_s = np.polynomial.laguerre.laggauss(14)
    near = x_cut * y < 40.0
    tau[near], wt[near] = _LAG_X, _LAG_WE
    tau[~near, :14], wt[~near, :14] = x_s, w_s * np.exp(x_s)
    return tau, wt


# ----------------------------------------------------------------------------- numpy helpers


def form_factor(k: np.ndarray, diameter: float, model: str) -> np.ndarray:
    """Footprint form factor S(k) (dimensionless), complex k allowed.

    Strip of width d (``"line"``): sin(k d/2)/(k d/2); disc of radius d/2 (``"lattice"``):
    2 J1(k r)/(k r) (docs/physics.md section 13).
    """
    k = np.asarray(k)
    if model == "line":
        z = k * (0.5 * diameter)
        small = np.abs(z) < 1e-4
        zs = np.where(small, 1.0, z)
        return np.where(small, 1.0 - z * z / 6.0, np.sin(zs) / zs)
    z = k * (0.5 * diameter)
    small = np.abs(z) < 1e-4
    zs = np.where(small, 1.0, z)
    if np.iscomplexobj(z):
        val = 2.0 * jv(1, zs) / zs
    else:
        val = 2.0 * j1(zs) / zs
    return np.where(small, 1.0 - z * z / 8.0, val)


def _panels(lo: float, hi: float, n: int, grade_lo: int = 0, grade_hi: int = 0):
    """Nodes and weights of n uniform Gauss-Legendre panels on [lo, hi], with `grade_*` extra
    geometric refinements towards either end (for near-singular ends)."""
    edges = list(np.linspace(lo, hi, max(n, 1) + 1))
    span = edges[1] - edges[0]
    for g in range(1, grade_lo + 1):
        edges.append(lo + span * 0.5**g)
    for g in range(1, grade_hi + 1):
        edges.append(hi - span * 0.5**g)
    e = np.unique(np.array(edges))
    mid = 0.5 * (e[1:] + e[:-1])[:, None]
    half = 0.5 * (e[1:] - e[:-1])[:, None]
    return (mid + half * _GL_X).ravel(), (half * _GL_W).ravel()


@dataclass(frozen=True)
class PoleConstants:
    """Rayleigh pole of one frequency: kR (1/m, complex with substrate loss), residue Res of G
    at +kR (m/N), footprint factor S(kR), incident power per unit squared amplitude
    w/(4 Re Res) (W/m per m^2)."""

    kr: np.ndarray
    res: np.ndarray
    s_kr: np.ndarray


def _speeds(sub) -> tuple[complex, complex, complex, float, float]:
    """Complex speeds cL, cT, complex mu, lossless Rayleigh speed, Poisson ratio."""
    fac = complex(1.0, -float(sub.loss_factor))
    root = cmath.sqrt(fac)
    mu = float(sub.density) * float(sub.ct) ** 2 * fac
    cl, ct = float(sub.cl), float(sub.ct)
    nu = (cl**2 - 2 * ct**2) / (2 * (cl**2 - ct**2))
    from optgrade.ground import Substrate

    cr = Substrate(float(sub.density), cl, ct).cr
    return cl * root, ct * root, mu, cr, nu


def pole_constants(sub, w: np.ndarray, diameter: float, model: str) -> PoleConstants:
    """Rayleigh pole constants at angular frequencies w (rad/s); see `PoleConstants`.

    Res = -alpha kT^2 / (mu dR/dxi) at xi = kR, dR/dxi = 2 kR dR/dk2 with
    dR/dk2 = 4 (2 k2 - kT^2) - 4 alpha beta - 2 k2 (beta/alpha + alpha/beta) (derived from
    R = (2 k2 - kT^2)^2 - 4 k2 alpha beta; checked by finite differences in the tests).
    """
    clc, ctc, mu, cr, _ = _speeds(sub)
    w = np.asarray(w, dtype=float)
    root = cmath.sqrt(complex(1.0, -float(sub.loss_factor)))
    kr = w / (cr * root)
    k2 = kr * kr
    kl2 = (w / clc) ** 2
    kt2 = (w / ctc) ** 2
    al = np.sqrt(k2 - kl2)
    be = np.sqrt(k2 - kt2)
    drdk2 = 4 * (2 * k2 - kt2) - 4 * al * be - 2 * k2 * (be / al + al / be)
    res = -al * kt2 / (mu * 2 * kr * drdk2)
    return PoleConstants(kr=kr, res=res, s_kr=form_factor(kr, diameter, model))


def bulk_densities(sub, w: float, xi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Radiated power densities per unit xi of a unit surface traction, shear and compressional
    (real xi inside the cones; W per (N/m)^2 per (1/m) up to the factor w/2 and 1/(2 pi)).

    From the free-surface potentials under a normal traction t (docs/physics.md section 13):
    A = -t (2 xi^2 - kT^2)/(mu R), B = 2 i xi alpha t/(mu R); the vertical power fluxes
    rho w^3 nu |.|^2 / 2 divided by w/2 give dens_L = rho w^2 nu_L (2 xi^2 - kT^2)^2/(mu^2 |R|^2),
    dens_T = rho w^2 nu_T 4 xi^2 |alpha|^2/(mu^2 |R|^2); dens_L + dens_T = Im G (tested). For a
    lossy substrate the split of the lossy Im G is taken from these lossless densities.
    """
    cl, ct, rho = float(sub.cl), float(sub.ct), float(sub.density)
    mu = rho * ct**2
    kl2, kt2 = (w / cl) ** 2, (w / ct) ** 2
    xi2 = np.asarray(xi, dtype=float) ** 2
    nu_l = np.sqrt(np.clip(kl2 - xi2, 0.0, None))
    nu_t = np.sqrt(np.clip(kt2 - xi2, 0.0, None))
    al = np.where(xi2 < kl2, -1j * nu_l, np.sqrt(np.abs(xi2 - kl2)))
    be = -1j * nu_t
    r = (2 * xi2 - kt2) ** 2 - 4 * xi2 * al * be
    c = rho * w**2 / (mu**2 * np.abs(r) ** 2)
    d_l = c * nu_l * (2 * xi2 - kt2) ** 2
    d_t = c * nu_t * 4 * xi2 * np.abs(al) ** 2
    if float(sub.loss_factor) > 0.0:
        clc, ctc, muc, _, _ = _speeds(sub)
        im_g = np.empty(xi2.size, dtype=complex)
        _axis_values(np.sqrt(xi2), np.ones(xi2.size), (w / clc) ** 2, (w / ctc) ** 2, muc,
                     0.0, 0.0, 0j, im_g)
        tot = d_l + d_t
        share = np.where(tot > 0, d_t / np.where(tot > 0, tot, 1.0), 1.0)
        d_t, d_l = im_g.imag * share, im_g.imag * (1.0 - share)
    return d_t, d_l


# ----------------------------------------------------------------------------- the tables


@dataclass(frozen=True)
class GreenSpec:
    """Inputs of one set of tables (SI): substrate (density kg/m^3, cL, cT m/s, loss factor),
    model "line" | "lattice", footprint diameter d (m), row pitch b (m), frequencies (Hz) and
    the separation range [x_lo, x_hi] (m) the tables cover (x_lo > d)."""

    density: float
    cl: float
    ct: float
    loss_factor: float
    model: str
    diameter: float
    row_pitch: float
    freq: tuple[float, ...]
    x_lo: float
    x_hi: float

    def __post_init__(self) -> None:
        if self.model not in ("line", "lattice"):
            raise ValueError(f"model: must be 'line' or 'lattice', got {self.model!r}")
        if not (self.x_lo > self.diameter * 1.001):
            raise ValueError(
                f"separation range: shortest separation {self.x_lo:g} m must exceed the "
                f"footprint diameter {self.diameter:g} m (resonators may not touch)"
            )
        if not self.x_hi > self.x_lo:
            raise ValueError(f"separation range: x_hi {self.x_hi:g} m must exceed x_lo")
        if min(self.freq) <= 0:
            raise ValueError("freq: frequencies must be positive (Hz)")

    @property
    def substrate(self):
        from optgrade.ground import Substrate

        return Substrate(self.density, self.cl, self.ct, self.loss_factor)

    def key(self) -> str:
        payload = {
            "format": FORMAT_VERSION,
            "numerics": [N_GL, N_LAGUERRE, N_STENCIL, N_STATIC, N_DYNAMIC, PPW, NEAR],
            "substrate": [self.density, self.cl, self.ct, self.loss_factor],
            "model": self.model,
            "footprint": [self.diameter, self.row_pitch],
            "freq": hashlib.sha256(np.asarray(self.freq, float).tobytes()).hexdigest(),
            "x": [self.x_lo, self.x_hi],
        }
        return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()[:32]


@dataclass(frozen=True)
class Grid:
    """Separation grid: uniform segments (first point x0, step h, start index, count)."""

    x0: np.ndarray
    h: np.ndarray
    start: np.ndarray
    n: np.ndarray
    lo: np.ndarray  # nominal segment starts (query chooses the segment by these)

    @property
    def x(self) -> np.ndarray:
        parts = zip(self.x0, self.h, self.n, strict=True)
        return np.concatenate([x0 + h * np.arange(n) for x0, h, n in parts])

    @property
    def size(self) -> int:
        return int(self.n.sum())


def make_grid(d: float, x_lo: float, x_hi: float, h_far: float) -> Grid:
    """Segments with step (x - d)/NEAR near x_lo, doubling until h_far, then h_far to x_hi;
    each padded by half a stencil on both sides so every query has a centred stencil."""
    pad = N_STENCIL // 2
    starts, steps = [], []
    x = x_lo
    while True:
        h = (x - d) / NEAR
        if h >= h_far or x >= x_hi:
            break
        nxt = min(d + 2.0 * (x - d), x_hi)
        starts.append(x)
        steps.append(h)
        x = nxt
    if x < x_hi:
        starts.append(x)
        steps.append(h_far)
    ends = starts[1:] + [x_hi]
    x0, hs, cnt = [], [], []
    for a, b, h in zip(starts, ends, steps, strict=True):
        n_in = int(math.ceil((b - a) / h)) + 1
        x0.append(a - pad * h)
        hs.append(h)
        cnt.append(n_in + 2 * pad)
    cnt = np.array(cnt, dtype=np.int64)
    start = np.concatenate([[0], np.cumsum(cnt)[:-1]]).astype(np.int64)
    return Grid(np.array(x0), np.array(hs), start, cnt, np.array(starts))


class GreenTables:
    """Tabulated Green's functions of one `GreenSpec` (built or loaded from the cache).

    Attributes
    ----------
    table : ndarray, complex, shape (5, 1 + n_x, n_freq)
        [0]: smooth rest of g (everything but the pole term i Res S(kR)^2 exp(i kR |x|));
        [1], [2]: forward shear / compressional power tables B(x) = (1/2 pi) int_0^k dens S^2
        exp(i xi x) dxi; [3], [4]: the same weighted by the radiation angle (rad). Row 0 of
        the second axis is x = 0, rows 1.. the grid `grid`; frequency is the contiguous axis
        (the per-layout gathers run along it).
    pole : PoleConstants per frequency.
    """

    def __init__(self, spec: GreenSpec, cache_dir: str | os.PathLike | None | bool = None):
        self.spec = spec
        self.freq = np.asarray(spec.freq, dtype=float)
        self.omega = 2 * np.pi * self.freq
        sub = spec.substrate
        self._sp = _speeds(spec)
        self._row_nodes: list | None = None
        self.pole = pole_constants(sub, self.omega, spec.diameter, spec.model)
        kt_max = float(self.omega.max()) / spec.ct
        if spec.model == "lattice":
            q1 = 2 * np.pi / spec.row_pitch
            if q1 <= 1.02 * float(np.max(self.pole.kr.real)):
                raise ValueError(
                    f"row_pitch: 2 pi / b = {q1:.4g} 1/m does not exceed the Rayleigh "
                    f"wavenumber ({float(np.max(self.pole.kr.real)):.4g} 1/m): the rows would "
                    "radiate sideways, outside this model"
                )
        self.grid = make_grid(spec.diameter, spec.x_lo, spec.x_hi, 2 * np.pi / kt_max / PPW)
        self.x_cut = max(4.0 * kt_max, 12.0 / (spec.x_lo - spec.diameter))
        self.was_loaded = False
        self.cache_path: Path | None = None
        self.table = self._load_or_build(cache_dir)

    # -- build -------------------------------------------------------------------------
    def build(self) -> np.ndarray:
        """Compute all tables (complex (5, 1 + n_x, n_freq))."""
        spec = self.spec
        nf, nx = self.freq.size, self.grid.size
        out = np.zeros((5, 1 + nx, nf), dtype=complex)
        harm = self._harmonics()
        fixed = self._fixed_parts(harm)
        for f in range(nf):
            self._one_frequency(f, harm, fixed, out[:, :, f])
        if spec.model == "lattice":
            out[0, 0, :] += self._row_static_self()
        return out

    def _harmonics(self) -> list[tuple[float, int]]:
        """(q_n^2, number of grid points where that harmonic matters) for n >= 0; n >= 1 ones
        are kept up to the separation where exp(-(q_n - kT)(x - d)) < 1e-15."""
        spec = self.spec
        xg = self.grid.x
        out = [(0.0, xg.size)]
        if spec.model == "line":
            return out
        kt_max = float(self.omega.max()) / spec.ct
        n = 1
        while True:
            q = 2 * np.pi * n / spec.row_pitch
            decay = np.sqrt(max(q**2 - kt_max**2, 0.0))
            # grid points are in segment order (padded segments overlap slightly), so keep
            # everything up to the last point inside the cut-off separation
            inside = np.nonzero(xg <= spec.diameter + 36.0 / decay)[0]
            if inside.size == 0:
                break
            n_keep = int(inside[-1]) + 1
            out.append((q * q, n_keep))
            n += 1
        return out

    def _fixed_parts(self, harm) -> dict[str, Any]:
        """Frequency-independent nodes and form factors: the upper real-axis panel, the
        rotated-tail nodes, the self-term tail nodes."""
        spec = self.spec
        kt_max = float(self.omega.max()) / spec.ct
        xa, x0 = 2.5 * kt_max, self.x_cut
        n_pan = int(math.ceil((x0 - xa) * spec.x_hi / (2 * np.pi))) + 2
        hi_xi, hi_w = _panels(xa, x0, n_pan)
        xg = self.grid.x
        y = xg - spec.diameter
        tau, wt = _laguerre_sets(y, x0)
        t = tau / y[:, None]
        fixed: dict[str, Any] = {"hi": (hi_xi, hi_w), "xa": xa, "tail": [], "axis_n": [],
                                 "lag": (tau, wt)}
        for q2, n_keep in harm:
            up = x0 + 1j * t[:n_keep]
            nodes = np.stack([up, np.conj(up)])
            s2t = form_factor(np.sqrt(nodes * nodes + q2), spec.diameter, spec.model) ** 2
            fixed["tail"].append(np.ascontiguousarray(s2t))
            if q2 > 0:
                xs, ws = _panels(0.0, x0, int(math.ceil(x0 * xg[n_keep - 1] / (2 * np.pi))) + 4)
                fixed["axis_n"].append((xs, ws, form_factor(np.sqrt(xs**2 + q2),
                                                            spec.diameter, spec.model) ** 2))
            else:
                fixed["axis_n"].append(None)
        s, ws = _panels(0.0, 1.0, 48, grade_lo=12)
        xi_t = x0 / s
        fixed["self_tail"] = (xi_t, ws * x0 / s**2, form_factor(xi_t, spec.diameter,
                                                                spec.model) ** 2)
        fixed["hi_s2"] = form_factor(hi_xi, spec.diameter, spec.model) ** 2
        fixed["static0"] = self._static_tail0(x0)
        return fixed

    def _low_panels(self, w: float, x_max: float, refine: float = 1.0):
        """Real-axis nodes below the fixed upper panel at one frequency: the compressional cone
        (xi = kL sin t), kL..kT (cosine map), kT..xa (xi = kT + v^2); graded towards the branch
        points (near-singular with substrate loss)."""
        spec = self.spec
        kl, kt = w / spec.cl, w / spec.ct
        grade = 10 if spec.loss_factor > 0 else 4
        osc = lambda length: int(math.ceil(refine * length * x_max / (2 * np.pi))) + 3  # noqa: E731
        th, wt = _panels(0.0, 0.5 * np.pi, osc(kl), 0, grade)
        xi1, w1 = kl * np.sin(th), wt * kl * np.cos(th)
        mid, half = 0.5 * (kl + kt), 0.5 * (kt - kl)
        ph, wp = _panels(0.0, np.pi, osc(kt - kl), grade, grade)
        xi2, w2 = mid - half * np.cos(ph), wp * half * np.sin(ph)
        xa = 2.5 * float(self.omega.max()) / spec.ct
        v, wv = _panels(0.0, math.sqrt(xa - kt), osc(xa - kt), grade, 0)
        xi3, w3 = kt + v * v, wv * 2 * v
        return (xi1, w1), (xi2, w2), (xi3, w3)

    def _one_frequency(self, f: int, harm, fixed, out: np.ndarray) -> None:
        spec = self.spec
        w = float(self.omega[f])
        clc, ctc, mu, _, nu = self._sp
        kl2, kt2 = (w / clc) ** 2, (w / ctc) ** 2
        kr = complex(self.pole.kr[f])
        amp = complex(2 * kr * self.pole.res[f] * self.pole.s_kr[f] ** 2)
        g = self.grid
        low = self._low_panels(w, spec.x_hi)
        xi = np.concatenate([p[0] for p in low] + [fixed["hi"][0]])
        wq = np.concatenate([p[1] for p in low] + [fixed["hi"][1]])
        s2 = np.concatenate([form_factor(p[0], spec.diameter, spec.model) ** 2 for p in low]
                            + [fixed["hi_s2"]])
        val = np.empty(xi.size, dtype=complex)
        _axis_values(xi, s2, kl2, kt2, mu, 0.0, amp, kr * kr, val)
        rest = np.zeros((1, g.size), dtype=complex)
        _accumulate(xi, (val * wq / np.pi)[None, :], g.x0, g.h, g.start, g.n, rest, True)
        rest = rest[0]
        xg = g.x
        tau, wt = fixed["lag"]
        sym = spec.loss_factor == 0.0
        _tail(xg, spec.diameter, self.x_cut, tau, wt, fixed["tail"][0], kl2, kt2, mu, 0.0, amp,
              kr * kr, sym, rest)
        self_term = np.sum(val * wq) / np.pi + self._self_tail0(w, kl2, kt2, mu, nu, amp, kr,
                                                                fixed)
        rows = zip(harm[1:], fixed["tail"][1:], fixed["axis_n"][1:], strict=True)
        for (q2, n_keep), s2t, axis in rows:
            xs, ws, s2n = axis
            vn = np.empty(xs.size, dtype=complex)
            _axis_values(xs, s2n, kl2, kt2, mu, q2, 0.0, 0j, vn)
            part = np.zeros((1, n_keep), dtype=complex)
            _accumulate(xs, (vn * ws / np.pi)[None, :], *_truncate(g, n_keep), part, True)
            part = part[0]
            _tail(xg[:n_keep], spec.diameter, self.x_cut, tau[:n_keep], wt[:n_keep], s2t, kl2,
                  kt2, mu, q2, 0.0, 0j, sym, part)
            rest[:n_keep] += 2.0 * part  # harmonics +n and -n
        if spec.model == "lattice":
            self_term += self._row_dynamic_self(kl2, kt2, mu, nu)
        out[0, 0] = self_term
        out[0, 1:] = rest
        # the bulk tables get their own, finer nodes: the energy balance then also measures
        # the quadrature of Im g against an independent integration over the cones
        self._bulk(f, self._low_panels(w, spec.x_hi, refine=1.37), out)

    def _self_tail0(self, w, kl2, kt2, mu, nu, amp, kr, fixed) -> complex:
        """(1/pi) int_X0^inf (G S^2 - p) dxi for n = 0: static part (precomputed, scaled to
        the complex mu), dynamic part by quadrature in xi = X0/s, pole part in closed form."""
        xi_t, w_t, s2_t = fixed["self_tail"]
        static_c = (1.0 - nu) / mu
        dyn = np.empty(xi_t.size, dtype=complex)
        _dynamic_values(xi_t, s2_t, kl2, kt2, mu, 0.0, static_c, dyn)
        x0 = self.x_cut
        pole = amp / (2 * kr) * np.log((x0 + kr) / (x0 - kr))
        static = fixed["static0"] * (1.0 - nu) / mu
        return complex((static + np.sum(dyn * w_t) - pole) / np.pi)

    def _static_tail0(self, x0: float) -> float:
        """int_X0^inf S(xi)^2 / xi dxi (1/m^0): closed form for the strip (generalised cosine
        integrals), Gauss-Legendre plus the large-argument mean for the disc."""
        d = self.spec.diameter
        if self.spec.model == "line":
            si, ci = sici(d * x0)
            i3 = np.cos(d * x0) / (2 * x0**2) - d * np.sin(d * x0) / (2 * x0) + d**2 * ci / 2
            return float(2.0 / d**2 * (1.0 / (2 * x0**2) - i3))
        r = 0.5 * d
        x_big = max(600.0 / r, 4 * x0)
        xs, ws = _panels(x0, x_big, int(math.ceil((x_big - x0) * r / np.pi * 2)) + 2)
        body = np.sum(ws * form_factor(xs, d, "lattice") ** 2 / xs)
        return float(body + 4.0 / (3.0 * np.pi * r**3 * x_big**3))

    def _row_static_self(self) -> float:
        """Sum over n != 0 of (1/pi) int_0^inf G_s(k_n) S(k_n)^2 dxi (frequency independent,
        real mu; scaled to complex mu by the caller's factor), G_s = (1 - nu)/(mu k)."""
        spec = self.spec
        _, _, mu, _, nu = self._sp
        r = 0.5 * spec.diameter
        u, wu = _panels(0.0, 16.0, 400, grade_lo=0)
        total = 0.0
        for n in range(1, N_STATIC + 1):
            q = 2 * np.pi * n / spec.row_pitch
            k = q * np.cosh(u)
            # xi = q sinh u: d xi / k = du
            total += 2.0 * np.sum(wu * form_factor(k, spec.diameter, "lattice") ** 2)
        # |n| > N: S^2 -> 4/(pi (k r)^3); (1/pi) int dxi/k^4 = 1/(4 q^3) per n, +-n, zeta sum
        bq = spec.row_pitch / (2 * np.pi)
        tail = 2.0 / (np.pi * r**3) * bq**3 * zeta(3.0, N_STATIC + 1)
        return complex((1.0 - nu) / mu * (total / np.pi + tail))

    def _row_dynamic_self(self, kl2, kt2, mu, nu) -> complex:
        """Sum over 1 <= |n| <= N_DYNAMIC of (1/pi) int_0^inf (G - G_s)(k_n) S(k_n)^2 dxi."""
        spec = self.spec
        if self._row_nodes is None:
            u, wu = _panels(0.0, 10.0, 80)
            nodes = []
            for n in range(1, N_DYNAMIC + 1):
                q = 2 * np.pi * n / spec.row_pitch
                s2 = form_factor(q * np.cosh(u), spec.diameter, "lattice") ** 2
                nodes.append((q, q * np.sinh(u), s2 * wu * q * np.cosh(u)))
            self._row_nodes = nodes
        total = 0j
        vals = np.empty(self._row_nodes[0][1].size, dtype=complex)
        for q, xs, s2w in self._row_nodes:
            _dynamic_values(xs, s2w, kl2, kt2, mu, q * q, (1.0 - nu) / mu, vals)
            total += 2.0 * np.sum(vals)
        return total / np.pi

    def _bulk(self, f: int, low, out: np.ndarray) -> None:
        """Forward power and angle tables of the shear and compressional cones (n = 0)."""
        spec = self.spec
        w = float(self.omega[f])
        kl, kt = w / spec.cl, w / spec.ct
        xi = np.concatenate([low[0][0], low[1][0]])
        wq = np.concatenate([low[0][1], low[1][1]])
        d_t, d_l = bulk_densities(spec, w, xi)
        s2 = np.abs(form_factor(xi, spec.diameter, spec.model)) ** 2
        th_t = np.arcsin(np.clip(xi / kt, 0, 1))
        th_l = np.arcsin(np.clip(xi / kl, 0, 1))
        g = self.grid
        wv = np.array([d_t, d_l, d_t * th_t, d_l * th_l]) * (wq * s2 / (2 * np.pi))
        wv = wv.astype(complex)
        out[1:, 0] = wv.sum(axis=1)
        acc = np.zeros((4, g.size), dtype=complex)
        _accumulate(xi, wv, g.x0, g.h, g.start, g.n, acc, False)
        out[1:, 1:] = acc

    # -- cache -------------------------------------------------------------------------
    def _load_or_build(self, cache_dir) -> np.ndarray:
        shape = (5, 1 + self.grid.size, self.freq.size)
        if cache_dir is False:
            return self.build()
        root = Path(cache_dir) if cache_dir is not None else default_cache_dir()
        key = self.spec.key()
        path, meta_path = root / f"green-{key}.npy", root / f"green-{key}.json"
        self.cache_path = path
        table = read_cached(path, meta_path, key, shape, FORMAT_VERSION)
        if table is not None:
            self.was_loaded = True
            return table
        table = self.build()
        try:
            root.mkdir(parents=True, exist_ok=True)
            write_cached(path, meta_path, key, table, FORMAT_VERSION)
            loaded = read_cached(path, meta_path, key, shape, FORMAT_VERSION)
            if loaded is not None:
                return loaded
        except OSError:
            pass
        return table


def _truncate(g: Grid, n_keep: int):
    """Segment arrays of the first n_keep grid points."""
    x0, h, start, n = [], [], [], []
    for s in range(g.x0.size):
        if g.start[s] >= n_keep:
            break
        x0.append(g.x0[s])
        h.append(g.h[s])
        start.append(g.start[s])
        n.append(min(g.n[s], n_keep - g.start[s]))
    return np.array(x0), np.array(h), np.array(start, dtype=np.int64), np.array(n, dtype=np.int64)


def green_tables(spec: GreenSpec, cache_dir=None) -> GreenTables:
    """Tables for `spec`, from the cache when a valid copy exists (see module docstring)."""
    return GreenTables(spec, cache_dir=cache_dir)


@njit(cache=True)
def _stencil_kernel(x, d, seg_x0, seg_h, seg_start, seg_n, seg_lo, idx, wts):
    """Lagrange stencil (N_STENCIL table rows, offset 1 for the x = 0 row) of every separation
    |x| > d; x = 0 maps to row 0 with weight 1."""
    m = idx.shape[1]
    for p in range(x.size):
        ax = abs(x[p])
        if ax == 0.0:
            for j in range(m):
                idx[p, j] = 0
                wts[p, j] = 1.0 if j == 0 else 0.0
            continue
        s = 0
        while s + 1 < seg_x0.size and ax >= seg_lo[s + 1]:
            s += 1
        u = (ax - seg_x0[s]) / seg_h[s]
        i0 = int(math.floor(u)) - (m // 2 - 1)
        i0 = min(max(i0, 0), seg_n[s] - m)
        for j in range(m):
            num = 1.0
            den = 1.0
            for k in range(m):
                if k != j:
                    num *= u - (i0 + k)
                    den *= j - k
            idx[p, j] = 1 + seg_start[s] + i0 + j
            wts[p, j] = num / den


def stencils(tables: GreenTables, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row indices and Lagrange weights (n, N_STENCIL) of separations x (m) into the tables'
    separation axis; refuses separations outside the tabulated range (0 or x_lo..x_hi)."""
    x = np.ascontiguousarray(np.abs(np.asarray(x, dtype=float)).ravel())
    spec = tables.spec
    bad = (x != 0) & ((x < spec.x_lo * (1 - 1e-12)) | (x > spec.x_hi * (1 + 1e-12)))
    if np.any(bad):
        raise ValueError(
            f"layout: separations {_eng(x[bad].min(), 'm')} .. {_eng(x[bad].max(), 'm')} lie "
            f"outside the Green's-function table range {_eng(spec.x_lo, 'm')} .. "
            f"{_eng(spec.x_hi, 'm')}"
        )
    g = tables.grid
    idx = np.empty((x.size, N_STENCIL), dtype=np.int64)
    wts = np.empty((x.size, N_STENCIL))
    _stencil_kernel(x, spec.diameter, g.x0, g.h, g.start, g.n, g.lo, idx, wts)
    return idx, wts
