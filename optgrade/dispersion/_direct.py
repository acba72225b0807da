"""Bloch band solver for one resonator cell: bound and leaky branches (docs/physics.md section 5.4).

The dispersion relation is D(K, w) = 1/Z(w) - Sigma(K, w) = 0 (`optgrade.dispersion._lattice`).
We split

    Sigma = sum_{m=-J}^{J-1} T_m(K) + Rest(K, w)

where T_m are the (m, n = 0) "main" harmonics (J from `optgrade.dispersion._lattice.main_orders`:
J = 1, i.e. m = 0 and -1, unless the spacing exceeds about a Rayleigh wavelength). They carry the
Rayleigh poles (K = kR and its folded images) and the branch points of every harmonic that can
radiate, and are evaluated in closed form, at complex K as well. The rest (all other harmonics)
is then smooth and analytic over the extended zone 0 < K < 2 pi/a and symmetric about the zone
edge. The direct solver sums Rest exactly; the surrogate (`optgrade.dispersion._surrogate`)
interpolates it from tables with a compiled copy of the root engine `solve_points` below.

Branches (K in the extended zone 0 < K < 2 pi/a, so that a wave running in +x has K' > 0):

* branch 0, the lower (surface) branch: the first root of Re D above the Rayleigh pole kR,
  bracketed by the next pole of a main harmonic (while kR < pi/a that is the folded pole
  2 pi/a - kR, and the mirror half beyond the zone edge holds the same roots, so the branch ends
  at K = pi/a: the Bragg gap) or by 2 pi/a (once kR > pi/a: the second band, where the folded
  harmonic K - 2 pi/a radiates backward when 2 pi/a - K' < kT). It leaves the Rayleigh line at
  low frequency and slows towards the rod resonance.
* branch 1, the upper branch: the first root of Re D below kR (down to the previous pole of a
  main harmonic, or to 1e-3 kR); above the rod resonance it emerges from the shear line and is
  leaky forward while K' < kT. Under heavy mass loading it can also exist just below the
  resonance.
* grating regime (kR >= 2 pi/a, lattice and line variants): both branches are searched about
  the folded pole kR_red = kR - 2 pi m_r/a of harmonic m_r = floor(kR a/2 pi) (`folded_order`)
  and stored unfolded, K = K_red + 2 pi m_r/a (docs/physics.md section 5.4).

Roots are found by scanning outwards from the Rayleigh pole (points clustered near the pole) for
the first sign change of Re D times the pole factors of the bracket ends (pole-free), then
Illinois (regula falsi) steps. Continuation across frequency: each branch is the root of this
fixed rule attached to the Rayleigh pole, so it follows itself from frequency to frequency; it
is nan where it has no root (a gap). Roots with K'' > K' (overdamped, no travelling wave) are
dropped.

Leaky and lossy roots: K' from the real-axis root of Re D (lossless main terms), then complex
Newton steps on D(K) R_0(K) (R_0, the ground's pole function at the m = 0 harmonic, for the
half-space its Rayleigh function, removes the nearby Rayleigh pole that substrate loss moves off
the axis), with the main terms on the analytic continuation of their branches
(`optgrade.ground.Ground.compliance_sq`) and Rest by a first-order Taylor step from the real
axis. Near a branch point (Newton leaves the side of the
cone it started on, or does not converge) the first-order value K'' = -Im D / (d Re D/dK) is
kept and flagged (`Branch.is_first_order`); a first-order K'' < 0 is dropped. Loss factors of
rod and substrate enter D, so K'' includes material loss.

Channel shares: K'' is split in proportion to the Im parts at K' (first order): each radiating
main harmonic's Im T_m (lossless ground) split into shear and compressional power
(`optgrade.ground.Ground.shear_share`), forward if K' + 2 pi m/a > 0, backward otherwise; the
remainder of Im(Sigma - 1/Z) is absorbed (material loss). Sideways harmonics (n != 0) are not
booked (`validity_warnings` says when they radiate).

Ground and resonator enter through their interfaces only (`optgrade.ground.Ground`,
`optgrade.resonators.Resonator`), so any registered kind of either is solved here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from optgrade.dispersion._lattice import (
    MODELS,
    harmonic_term,
    lattice_sum,
    main_orders,
)
from optgrade.ground import Ground
from optgrade.resonators import Resonator
from optgrade.units import format_eng as _eng

__all__ = [
    "Cell",
    "Branch",
    "Bands",
    "solve_bands",
    "direct_local_modes",
    "solve_points",
    "validity_warnings",
]

_N_SCAN = 40
_MAX_ILLINOIS = 60
_N_NEWTON = 4
_N_LOSS_STAGES = 1  # continuation stages in the substrate loss (1: the pole-free Newton suffices)


@dataclass(frozen=True)
class Cell:
    """One unit cell of a resonator row (SI units).

    Attributes
    ----------
    substrate : Ground
        The ground (any registered kind; the half-space `optgrade.ground.Substrate` so far).
    rod : Resonator
        The resonator type (any registered kind; the axial rod `optgrade.resonators.Rod`).
    height : float
        Resonator height L (m).
    spacing : float
        Cell length a along the row (m).
    row_pitch : float
        Pitch b between rods across the row (m).
    head_mass : float
        Head mass M (kg).
    """

    substrate: Ground
    rod: Resonator
    height: float
    spacing: float
    row_pitch: float
    head_mass: float = 0.0


@dataclass(frozen=True)
class Branch:
    """One dispersion branch over the frequency grid.

    k : complex (n_freq,) Bloch wavenumber K' + i K'' (1/m), nan where absent.
    shares : (5, n_freq) split of K'' over `optgrade.channels.DECAY` (zeros where K'' = 0 or
        absent).
    angle : (4, n_freq) radiation angle from the surface normal (rad), nan where closed.
    is_leaky : (n_freq,) bool, a harmonic radiates at K'.
    is_first_order : (n_freq,) bool, K'' kept at its first-order value (near a branch point).
    """

    name: str
    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray
    is_leaky: np.ndarray
    is_first_order: np.ndarray


@dataclass(frozen=True)
class Bands:
    """Band structure of one cell: branches, gaps, rod resonances and warnings."""

    cell: Cell
    freq: np.ndarray
    model: str
    branches: tuple[Branch, ...]
    resonances: np.ndarray
    gaps: tuple[tuple[float, float], ...]
    warnings: tuple[str, ...] = field(default_factory=tuple)


def main_terms(K, w, a, substrate: Ground, b: float, r: float, model: str, n_main: int = 1):
    """Sum of the main harmonics T_m, m = -J .. J-1 (homogenised: T_0 only), at complex or
    real K (m/N), broadcasting."""
    if model == "homogenised":
        return harmonic_term(K, w, substrate, a, b, r, 0, model)
    t = 0.0
    for m in range(-n_main, n_main):
        t = t + harmonic_term(K, w, substrate, a, b, r, m, model)
    return t


def _main_derivative(K, w, a, substrate, b, r, model, n_main):
    h = 1e-6 * np.pi / a
    return (
        main_terms(K + h, w, a, substrate, b, r, model, n_main)
        - main_terms(K - h, w, a, substrate, b, r, model, n_main)
    ) / (2.0 * h)


RestFn = Callable[..., tuple[np.ndarray, np.ndarray]]


def _pole_free(K, k_re, w, a, iz, r0, dr0, sub, b, r, model, n_main, shift=0.0):
    """D(K) R(K + shift): dispersion function times the ground's pole function (the Rayleigh
    function for the half-space) at the harmonic that carries the nearby Rayleigh pole: m = 0
    (shift 0), or in the grating regime the folded harmonic m_r (shift = 2 pi m_r / a), so no
    pole there."""
    d = iz - main_terms(K, w, a, sub, b, r, model, n_main) - (r0 + (K - k_re) * dr0)
    return d * sub.pole_function(K + shift, w)


def _newton_step(K, k_re, w, a, iz, r0, dr0, sub, b, r, model, n_main, shift=0.0):
    h = 1e-6 * np.pi / a
    args = (k_re, w, a, iz, r0, dr0, sub, b, r, model, n_main, shift)
    f0 = _pole_free(K, *args)
    f1 = _pole_free(K + h, *args)
    with np.errstate(divide="ignore", invalid="ignore"):
        return f0 / ((f1 - f0) / h)


def folded_order(kr, g, is_homog):
    """The harmonic m_r that carries the forward Rayleigh pole inside the extended zone:
    K + 2 pi m_r / a = kR with 0 <= K < 2 pi / a, i.e. m_r = floor(kR a / 2 pi) (0 below the
    grating regime kR >= 2 pi / a; always 0 for the homogenised model, whose zone ends at
    pi / a). Returns (m_r, kR_red = kR - m_r 2 pi / a), the pole the branches start from."""
    kr = np.asarray(kr, dtype=float)
    if is_homog:
        m_r = np.zeros(kr.shape)
    else:
        m_r = np.floor(kr / g)
    return m_r, kr - m_r * g


def _pole_bounds(kr, g, n_main, is_homog, m_r):
    """Nearest Rayleigh poles of the main harmonics below and above the folded Rayleigh pole
    kR_red = kR - m_r 2 pi / a (`folded_order`) in (0, 2 pi/a).

    Returns (p_lo, p_hi): nan where there is none (then the bracket ends at 1e-3 kR_red, resp.
    at pi/a (homogenised) or 2 pi/a).
    """
    p_lo = np.full(kr.shape, np.nan)
    p_hi = np.full(kr.shape, np.nan)
    if is_homog:
        return p_lo, p_hi
    kr_red = kr - m_r * g
    for m in range(-n_main, n_main):
        for sgn in (1.0, -1.0):
            p = sgn * kr - m * g
            inside = (p > 0) & (p < g) & ~((m == m_r) & (sgn == 1.0))
            above = inside & (p > kr_red) & ~(p >= p_hi)
            p_hi = np.where(above, p, p_hi)
            below = inside & (p < kr_red) & ~(p <= p_lo)
            p_lo = np.where(below, p, p_lo)
    return p_lo, p_hi


def solve_points(
    w: np.ndarray,
    inv_z: np.ndarray,
    a: np.ndarray,
    substrate: Ground,
    b: float,
    r: float,
    model: str,
    rest: RestFn,
    n_main: int = 1,
) -> dict[str, np.ndarray]:
    """Root engine of the direct solver (the surrogate's compiled kernel mirrors it).

    Per branch: the bracket between the Rayleigh pole and the nearest harmonic pole
    (`_branch_bounds`), the scan outwards from the pole (`_scan_brackets`), Illinois on the
    real axis (`_illinois`), Newton to the complex root with its acceptance test
    (`_complex_roots`) and the channel split of the accepted roots (`_store_roots`).

    Parameters
    ----------
    w, inv_z, a : ndarray (n,)
        Angular frequency (rad/s), rod compliance 1/Z (m/N, complex) and spacing (m) per point.
    substrate, b, r, model
        Ground, row pitch (m), contact radius (m), lattice model.
    rest : callable
        ``rest(K, idx, deriv) -> (value, dvalue/dK)`` of Rest (m/N) at real K for points
        ``idx``; K has shape (len(idx),) or (len(idx), m); the derivative may be None when
        ``deriv`` is False.
    n_main : int
        J of `optgrade.dispersion._lattice.main_orders`: harmonics -J .. J-1 in closed form.

    Returns
    -------
    dict with ``k`` (2, n) complex, ``shares`` (2, 5, n), ``angle`` (2, 4, n),
    ``is_leaky`` (2, n), ``is_first_order`` (2, n).
    """
    w = np.asarray(w, dtype=float)
    a = np.broadcast_to(np.asarray(a, dtype=float), w.shape)
    inv_z = np.broadcast_to(np.asarray(inv_z, dtype=complex), w.shape)
    n = w.size
    lossless = substrate.lossless()
    kr = w / substrate.cr
    g = 2.0 * np.pi / a
    is_homog = model == "homogenised"
    # grating regime (kR >= 2 pi / a): the branches start from the folded Rayleigh pole of
    # harmonic m_r; the roots are solved in the extended zone and stored unfolded,
    # K = K_red + 2 pi m_r / a (the wavenumber of the harmonic that carries the surface wave)
    m_r, kr_red = folded_order(kr, g, is_homog)
    p_lo, p_hi = _pole_bounds(kr, g, n_main, is_homog, m_r)
    shift = m_r * g
    out = {
        "k": np.full((2, n), np.nan + 0j),
        "shares": np.zeros((2, 5, n)),
        "angle": np.full((2, 4, n), np.nan),
        "is_leaky": np.zeros((2, n), dtype=bool),
        "is_first_order": np.zeros((2, n), dtype=bool),
    }

    def h_of(K, sel, lo_s, hi_s, pole_lo, pole_hi):
        """Re(Sigma - 1/Z) times the pole factors of the bracket ends (pole-free)."""
        sh = (slice(None),) + (None,) * (np.ndim(K) - 1)
        val = main_terms(K, w[sel][sh], a[sel][sh], lossless, b, r, model, n_main)
        rv, _ = rest(K, sel, False)
        f = (val + rv).real - inv_z[sel][sh].real
        f = f * np.where(pole_lo[sh], K - lo_s[sh], 1.0)
        return f * np.where(pole_hi[sh], hi_s[sh] - K, 1.0)

    point = (w, a, inv_z, g, shift)
    lattice = (substrate, lossless, b, r, model, n_main)
    # the folded pole's harmonic must be a main one (closed form), else the Rest holds a pole
    in_main = m_r <= n_main - 1
    for branch in (0, 1):
        bounds = _branch_bounds(branch, kr_red, g, p_lo, p_hi, is_homog, in_main)
        bracket = _scan_brackets(branch, bounds, h_of)
        if bracket is None:
            continue
        sel, ka, kb, ha, hb, ends = bracket
        k_re = _illinois(sel, ka, kb, ha, hb, ends, h_of)
        kk, fo, m0, r0 = _complex_roots(k_re, sel, point, lattice, rest)
        _store_roots(out, branch, sel, kk, fo, m0, r0, point, lattice)
    return out


def _branch_bounds(branch, kr, g, p_lo, p_hi, is_homog, in_main=True):
    """Real-axis bracket of a branch at every point: (lo, hi, pole_lo, pole_hi, valid), about
    the (folded) Rayleigh pole kr. Branch 0 (lower, slow) lies between kr and the nearest
    harmonic pole above it (or the zone edge), branch 1 (upper) between the nearest pole below
    kr (or 1e-3 kr) and kr; pole_lo / pole_hi mark the ends that are poles; valid where the
    bracket is not empty, kr is inside the zone (the homogenised model's zone edge is pi / a)
    and the pole's harmonic is a main one (in_main)."""
    n = kr.size
    zone = 0.5 * g if is_homog else g
    if branch == 0:
        lo = kr.copy()
        hi = np.where(np.isfinite(p_hi), p_hi, zone)
        pole_lo = np.ones(n, dtype=bool)
        pole_hi = np.isfinite(p_hi)
    else:
        hi = kr.copy()
        lo = np.where(np.isfinite(p_lo), p_lo, 1e-3 * kr)
        pole_lo = np.isfinite(p_lo)
        pole_hi = np.ones(n, dtype=bool)
    valid = (hi > lo * (1.0 + 1e-9)) & (kr < zone) & in_main
    return lo, hi, pole_lo, pole_hi, valid


def _scan_brackets(branch, bounds, h_of):
    """Scan outwards from the Rayleigh pole (points clustered quadratically near it): the
    pole-free h keeps the sign of the pole's residue next to it, so the first sign change
    outwards brackets the root. Returns None where no point has one, else (sel, ka, kb, ha, hb,
    ends) with the points sel, the bracket and ends = (lo, hi, pole_lo, pole_hi) at sel."""
    lo, hi, pole_lo, pole_hi, valid = bounds
    idx = np.flatnonzero(valid)
    if idx.size == 0:
        return None
    lo_i, hi_i, pl_i, ph_i = lo[idx], hi[idx], pole_lo[idx], pole_hi[idx]
    u = (np.arange(1, _N_SCAN + 1) / _N_SCAN) ** 2
    u[-1] = 1.0 - 1e-9
    u = np.concatenate([[1e-9], u])
    if branch == 0:
        Ks = lo_i[:, None] + (hi_i - lo_i)[:, None] * u[None, :]
    else:
        Ks = hi_i[:, None] - (hi_i - lo_i)[:, None] * u[None, :]
    H = h_of(Ks, idx, lo_i, hi_i, pl_i, ph_i)
    neg = np.sign(H) != np.sign(H[:, :1])
    first = np.argmax(neg, axis=1)
    found = neg[np.arange(idx.size), first] & (first > 0)
    if not np.any(found):
        return None
    j = first[found]
    rows = np.flatnonzero(found)
    ends = (lo_i[rows], hi_i[rows], pl_i[rows], ph_i[rows])
    return idx[found], Ks[rows, j - 1], Ks[rows, j], H[rows, j - 1], H[rows, j], ends


def _illinois(sel, ka, kb, ha, hb, ends, h_of):
    """Illinois (regula falsi with the halving rule) on every bracket at once, to a relative
    1e-13 in K; returns the real roots (1/m)."""
    lo_s, hi_s, pl_s, ph_s = ends
    active = np.ones(sel.size, dtype=bool)
    for _ in range(_MAX_ILLINOIS):
        act = np.flatnonzero(active)
        if act.size == 0:
            break
        den = hb[act] - ha[act]
        safe = np.where(den != 0, den, 1.0)
        kc = np.where(
            den != 0,
            (ka[act] * hb[act] - kb[act] * ha[act]) / safe,
            0.5 * (ka[act] + kb[act]),
        )
        hc = h_of(kc, sel[act], lo_s[act], hi_s[act], pl_s[act], ph_s[act])
        flip = np.sign(hc) != np.sign(hb[act])
        ka_new = np.where(flip, kb[act], ka[act])
        ha_new = np.where(flip, hb[act], 0.5 * ha[act])
        moved = np.abs(kc - kb[act])
        ka[act], ha[act] = ka_new, ha_new
        kb[act], hb[act] = kc, hc
        done = (
            (np.abs(kb[act] - ka[act]) <= 1e-13 * np.abs(kc))
            | (hc == 0)
            | (moved <= 1e-13 * np.abs(kc))
        )
        active[act[done]] = False
    return kb


def _complex_roots(k_re, sel, point, lattice, rest):
    """Complex Bloch wavenumbers from the real-axis roots: Newton on the pole-free D R_0 with
    exact main terms and the Taylor-continued Rest (optionally in stages of the substrate's
    loss factor), accepted where it converged without crossing a branch point of a radiating
    main harmonic and without growth; elsewhere the first-order estimate k_re - i Im D / Re D'.
    Returns (K with nan where dropped, is_first_order, main terms and Rest at k_re)."""
    w, a, inv_z, g, shift = point
    substrate, _, b, r, model, n_main = lattice
    orders = [0] if model == "homogenised" else list(range(-n_main, n_main))
    w_s, a_s, iz_s, sh_s = w[sel], a[sel], inv_z[sel], shift[sel]
    r0, dr0 = rest(k_re, sel)
    m0 = main_terms(k_re, w_s, a_s, substrate, b, r, model, n_main)
    dm0 = _main_derivative(k_re, w_s, a_s, substrate, b, r, model, n_main)
    d0 = iz_s - m0 - r0
    dd0 = -(dm0 + dr0)
    with np.errstate(divide="ignore", invalid="ignore"):
        k_first = k_re + 1j * (-d0.imag / dd0.real)
    is_real = np.abs(d0.imag) <= 1e-14 * np.abs(iz_s)
    kk = k_re.astype(complex)
    step = np.zeros(sel.size, dtype=complex)
    # substrate loss moves the Rayleigh pole off the axis; Newton on the pole-free D R_0
    # reaches the lossy root directly (optional continuation stages in the loss factor)
    n_stages = _N_LOSS_STAGES if substrate.loss_factor > 0 else 1
    for stage in range(1, n_stages + 1):
        eta = substrate.loss_factor * stage / n_stages
        sub_s = substrate.with_loss(eta)
        for _ in range(_N_NEWTON):
            # Newton on D(K) R_0(K): the Rayleigh function of the m = 0 harmonic removes
            # the nearby (loss-displaced) Rayleigh pole, widening Newton's basin
            step = _newton_step(
                kk, k_re, w_s, a_s, iz_s, r0, dr0, sub_s, b, r, model, n_main, sh_s
            )
            step = np.where(is_real, 0.0, step)
            kk = kk - step
    ok = np.isfinite(kk) & (np.abs(step) <= 1e-7 * np.abs(kk))
    # Newton must not cross a branch point of a radiating main harmonic
    kt_s, kl_s = w_s / substrate.ct, w_s / substrate.cl
    for mi in orders:
        for edge in (kt_s, kl_s, -kt_s, -kl_s):
            e = edge - mi * g[sel]
            ok &= np.sign(kk.real - e) == np.sign(k_re - e)
    ok &= kk.imag > -1e-9 * np.abs(kk)
    kk = np.where(ok, kk, k_first)
    fo = ~ok
    # a first-order value with K'' < 0 (growth) is not a mode we can follow
    kk = np.where(fo & (kk.imag < 0), np.nan, kk)
    # drop overdamped roots (K'' beyond the unfolded K': no travelling wave)
    keep = np.isfinite(kk) & (np.abs(kk.imag) <= kk.real + sh_s)
    return np.where(keep, kk, np.nan), fo, m0, r0


def _store_roots(out, branch, sel, kk, fo, m0, r0, point, lattice):
    """Store a branch's roots at points sel into out, with the channel split: each radiating
    main harmonic's part (`_channels`), the rest of Im(Sigma - 1/Z) absorbed; shares where
    K'' > 0, angles and the leaky flag where a bulk channel radiates."""
    w, a, inv_z, _, shift = point
    substrate, lossless, b, r, model, n_main = lattice
    orders = [0] if model == "homogenised" else list(range(-n_main, n_main))
    w_s, a_s, iz_s = w[sel], a[sel], inv_z[sel]
    keep = np.isfinite(kk)
    out["k"][branch, sel] = kk + shift[sel]
    out["is_first_order"][branch, sel] = fo & keep
    sh, an = _channels(kk.real, w_s, a_s, substrate, lossless, b, r, model, orders)
    total = (m0 + r0 - iz_s).imag
    total = np.where(np.isfinite(total), total, 0.0)
    absorbed = np.maximum(total - sh.sum(axis=0), 0.0)
    allp = np.concatenate([sh, absorbed[None]], axis=0)
    ssum = allp.sum(axis=0)
    has_decay = keep & (kk.imag > 0) & (ssum > 0)
    out["shares"][branch][:, sel] = np.where(
        has_decay, allp / np.where(ssum > 0, ssum, 1.0), 0.0
    )
    an[:, ~keep] = np.nan
    out["angle"][branch][:, sel] = an
    out["is_leaky"][branch, sel] = keep & np.any(np.isfinite(an), axis=0)


def _channels(kp, w, a, substrate, lossless, b, r, model, orders):
    """Radiated Im parts (4, n) of the main harmonics at K' and the channel angles (4, n).

    Harmonic m radiates shear where |K' + 2 pi m/a| < kT (compressional where < kL); forward if
    K' + 2 pi m/a > 0. Its Im T_m (lossless ground) is split by `Ground.shear_share`. A channel fed
    by several harmonics reports the angle of the strongest one.
    """
    kl2, kt2 = (w / substrate.cl) ** 2, (w / substrate.ct) ** 2
    parts = np.zeros((4, kp.size))
    best = np.zeros((4, kp.size))
    ang = np.full((4, kp.size), np.nan)
    g = 2.0 * np.pi / a
    for mi in orders:
        kx = kp + mi * g
        xi2 = kx * kx
        with np.errstate(invalid="ignore"):
            im = np.where(
                xi2 < kt2,
                harmonic_term(np.nan_to_num(kp), w, lossless, a, b, r, mi, model).imag,
                0.0,
            )
            im = np.maximum(np.nan_to_num(im), 0.0)
            shear = substrate.shear_share(xi2, w)
            fwd = kx > 0
            for off, share, k2 in ((0, shear, kt2), (1, 1.0 - shear, kl2)):
                p = im * share
                for ch, mask in ((off, fwd), (off + 2, ~fwd)):
                    pm = np.where(mask, p, 0.0)
                    parts[ch] += pm
                    opened = mask & (xi2 < k2)
                    stronger = opened & ((pm > best[ch]) | np.isnan(ang[ch]))
                    th = np.arcsin(np.clip(kx / np.sqrt(k2), -1.0, 1.0))
                    ang[ch] = np.where(stronger, th, ang[ch])
                    best[ch] = np.where(stronger, pm, best[ch])
    return parts, ang


def _direct_rest(w, a, substrate, b, r, model, n_main):
    """Rest callback summing the lattice exactly (one lattice_sum per distinct spacing)."""
    a = np.asarray(a, dtype=float)

    def rest(K, idx, deriv=True):
        K = np.asarray(K, dtype=float)
        sh = (slice(None),) + (None,) * (K.ndim - 1)
        ws = w[idx][sh]
        a_s = a[idx]
        val = np.zeros(K.shape, dtype=complex)
        der = np.zeros(K.shape, dtype=complex)
        for av in np.unique(a_s):
            rows = a_s == av
            h = 1e-6 * np.pi / av
            kk = K[rows]
            ww = np.broadcast_to(ws[rows], kk.shape) if K.ndim > 1 else ws[rows]
            kw = dict(exclude_main=n_main)
            val[rows] = lattice_sum(kk, ww, substrate, av, b, r, model, **kw)
            if not deriv:
                continue
            der[rows] = (
                lattice_sum(kk + h, ww, substrate, av, b, r, model, **kw)
                - lattice_sum(kk - h, ww, substrate, av, b, r, model, **kw)
            ) / (2.0 * h)
        return val, der

    return rest


def validity_warnings(
    substrate: Ground,
    rod: Resonator,
    spacing_max: float,
    row_pitch: float,
    freq_max: float,
    model: str = "lattice",
) -> list[str]:
    """Model-validity warnings for a frequency band (plain sentences).

    * sideways radiation: 2 pi / b < kT (docs/physics.md section 5.8);
    * grating regime: kR >= 2 pi / a (informational; roots about the folded Rayleigh pole);
    * the resonator type's own notes (`Resonator.validity_notes`; for the axial rod: thin-rod
      theory stretched where d > lambda_r / 5, bending modes not represented).
    """
    out = []
    kt = 2 * np.pi * freq_max / substrate.ct
    kr = 2 * np.pi * freq_max / substrate.cr
    if model == "lattice" and 2 * np.pi / row_pitch <= kr:
        out.append(
            f"row pitch {_eng(row_pitch, 'm')} exceeds a Rayleigh wavelength at "
            f"{_eng(freq_max, 'Hz')}: sideways harmonics reach the Rayleigh pole; results "
            "outside the model"
        )
    if model == "lattice" and 2 * np.pi / row_pitch < kt:
        out.append(
            f"row pitch {_eng(row_pitch, 'm')} exceeds the shear wavelength at "
            f"{_eng(freq_max, 'Hz')}: harmonics radiate sideways (not booked to any channel)"
        )
    if model != "homogenised" and kr >= 2 * np.pi / spacing_max:
        out.append(
            f"spacing {_eng(spacing_max, 'm')} exceeds a Rayleigh wavelength at "
            f"{_eng(freq_max, 'Hz')}: grating regime, the surface wave runs on a folded "
            "harmonic and leaks into bulk waves through the others (roots found about the folded "
            "Rayleigh pole)"
        )
    out.extend(rod.validity_notes(freq_max))
    return out


def direct_local_modes(
    substrate: Ground,
    rod: Resonator,
    row_pitch: float,
    height: ArrayLike,
    spacing: ArrayLike,
    head_mass: ArrayLike,
    freq: ArrayLike,
    model: str = "lattice",
):
    """LocalModes of cells by direct root solves (lattice summed exactly, no tables).

    The reference the surrogate is tested against. Cells are given by arrays (broadcast
    together) of height (m), spacing (m) and head mass (kg); freq in Hz.

    Returns
    -------
    optgrade.dispersion.LocalModes
        Every point solved: status ROOT, FIRST_ORDER or ABSENT.
    """
    from optgrade.dispersion._modes import LocalModes, status_from

    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")
    h, a, m = np.broadcast_arrays(
        np.atleast_1d(np.asarray(height, float)),
        np.atleast_1d(np.asarray(spacing, float)),
        np.atleast_1d(np.asarray(head_mass, float)),
    )
    freq = np.atleast_1d(np.asarray(freq, dtype=float))
    n_cells, n_freq = h.size, freq.size
    w = np.broadcast_to(2 * np.pi * freq[None, :], (n_cells, n_freq)).ravel()
    ap = np.broadcast_to(a.ravel()[:, None], (n_cells, n_freq)).ravel()
    iz = rod.compliance(2 * np.pi * freq[None, :], h.ravel()[:, None], m.ravel()[:, None]).ravel()
    n_main = main_orders(float(ap.max()), float(w.max()) / substrate.cr, model)
    rest = _direct_rest(w, ap, substrate, row_pitch, rod.radius, model, n_main)
    res = solve_points(w, iz, ap, substrate, row_pitch, rod.radius, model, rest, n_main)
    k = res["k"].reshape(2, n_cells, n_freq)
    return LocalModes(
        k=k,
        shares=res["shares"].reshape(2, 5, n_cells, n_freq),
        angle=res["angle"].reshape(2, 4, n_cells, n_freq),
        status=status_from(k, res["is_first_order"].reshape(2, n_cells, n_freq)),
    )


def _gaps(freq, branches):
    """Frequency intervals with no bound-or-leaky branch (complete local gaps)."""
    present = np.zeros(freq.size, dtype=bool)
    for br in branches:
        present |= np.isfinite(br.k)
    gaps = []
    i = 0
    while i < freq.size:
        if not present[i]:
            j = i
            while j + 1 < freq.size and not present[j + 1]:
                j += 1
            gaps.append((float(freq[i]), float(freq[j])))
            i = j + 1
        else:
            i += 1
    return tuple(gaps)


def solve_bands(
    cell: Cell,
    freq: ArrayLike,
    model: str = "lattice",
    progress: Callable[[int, int], None] | None = None,
    chunk: int = 32,
) -> Bands:
    """All branches of one cell over a frequency grid, by direct root solves.

    Parameters
    ----------
    cell : Cell
    freq : array_like
        Frequencies (Hz), increasing.
    model : {"lattice", "line", "homogenised"}
    progress : callable, optional
        Called as ``progress(done, total)`` after each chunk of frequencies.
    chunk : int
        Frequencies solved per chunk.

    Returns
    -------
    Bands
        Branch 0 (lower, surface) and branch 1 (upper), gaps, rod resonances and
        model-validity warnings.
    """
    if model not in MODELS:
        raise ValueError(f"model must be one of {MODELS}, got {model!r}")
    freq = np.atleast_1d(np.asarray(freq, dtype=float))
    w = 2 * np.pi * freq
    a = np.full(freq.shape, float(cell.spacing))
    iz = cell.rod.compliance(w, cell.height, cell.head_mass)
    sub, b, r = cell.substrate, cell.row_pitch, cell.rod.radius
    n_main = main_orders(float(cell.spacing), float(w.max()) / sub.cr, model)
    parts = []
    for start in range(0, freq.size, max(1, int(chunk))):
        sl = slice(start, start + max(1, int(chunk)))
        rest = _direct_rest(w[sl], a[sl], sub, b, r, model, n_main)
        parts.append(solve_points(w[sl], iz[sl], a[sl], sub, b, r, model, rest, n_main))
        if progress is not None:
            progress(min(start + int(chunk), freq.size), freq.size)
    res = {key: np.concatenate([p[key] for p in parts], axis=-1) for key in parts[0]}
    names = ("lower", "upper")
    branches = tuple(
        Branch(
            name=names[i],
            k=res["k"][i],
            shares=res["shares"][i],
            angle=res["angle"][i],
            is_leaky=res["is_leaky"][i],
            is_first_order=res["is_first_order"][i],
        )
        for i in range(2)
    )
    fr = cell.rod.resonances(cell.height, cell.head_mass, n_modes=3)
    return Bands(
        cell=cell,
        freq=freq,
        model=model,
        branches=branches,
        resonances=fr,
        gaps=_gaps(freq, branches),
        warnings=tuple(
            validity_warnings(
                cell.substrate, cell.rod, cell.spacing, cell.row_pitch, float(freq.max()), model
            )
        ),
    )
