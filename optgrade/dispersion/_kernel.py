"""The surrogate's compiled root kernel: local Bloch modes of many cells at many frequencies.

`solve_grid` runs the algorithm of `optgrade.dispersion._direct.solve_points` one point at a
time, cell by cell and, per cell, frequency by frequency (so that each branch continues from
its last visits): per point `_frequency_point` (the rod's compliance, the Rest columns),
`_main_poles` (the bracket ends), and per branch `_solve_branch`, which reads as the steps of
`optgrade.dispersion._kernel_roots` (continued bracket, gap continuation, scan, Illinois,
complex Newton) followed by `_channel_split`. The per-call constants come packed in the small
named tuples below; the half-space's point functions are in `optgrade.ground._halfspace`, the
rod's in `optgrade.resonators._rod`.

A row request (`entry_order` not empty; `optgrade.dispersion.RowPath`) solves the cells as a
row in order from the entry: at the entry cell the branches of ``entry_order`` in turn until
one has a root, that branch at the later cells (the other one from a cell where it has no root
but the other has: the march's continuity and step rule), each frequency up to and including
the first cell where neither has a root. The rest is left unsolved (status NOT_SOLVED, k nan).

Speed-ups (benchmarks/bench_dispersion.py, benchmarks/bench_propagation.py; method, checks
and figures in docs/surrogate-speed.md). Real axis: the pole-side sign of the pole-free Re D is
kept per cell and branch; the bracket is continued from the roots of the branch's last visits
(first a narrow one about their linear extrapolation, then the wide one about K w / w_prev,
sign-checked; where both fail but their failed ends enclose the root, those; else the full
scan); a branch that had no root stays without root while the scan point that came closest to a
sign change keeps GAP_KEEP of its margin (one evaluation instead of the scan; a full scan at
least every GAP_RESCAN frequencies, the interval doubling up to GAP_RESCAN_MAX while the rescans
find the gap no narrower, and always after a frequency step above GAP_STEP); Illinois stops at
ILLINOIS_TOL, or where inverse quadratic interpolation through the bracket ends and the newest
point confirms the root, and in a continued bracket takes that interpolation as its next point.
Complex Newton on D R_0: analytic slope (`_pole_free_d`), iteration count and acceptance of the
difference-slope Newton of `optgrade.dispersion._direct`, whose first step reuses D and its
slope at the real-axis root and whose last iteration is skipped where quadratic convergence
predicts it below the stop (never the final one, so acceptance is unchanged); the
difference-slope Newton remains the fallback where the analytic one missed the acceptance step
by little (FD_RETRY); the disc
form-factor series stops as early as each argument allows. The rod's compliance is evaluated
only at the points solved, and a row request (`RowPath`) solves only its points. Checked
against the earlier kernels on 20 x 60 random cells x 256 frequencies of each
example study: no branch appears or vanishes, the same first-order points, K within 1e-8 at
Newton roots and 1.6e-7 at first-order ones (relative).
"""

from __future__ import annotations

import math
from collections import namedtuple

import numpy as np
from numba import njit

from optgrade.dispersion._kernel_roots import (
    GAP_INT,
    GAP_J,
    GAP_RESCAN,
    GAP_STEP,
    HIST_W,
    N_CNT,
    N_CONT,
    N_VIS,
    POLE_SIGN,
    PREV2_K,
    PREV3_K,
    PREV_K,
    _h,
    _scan_k,
    complex_root,
    continued_bracket,
    d_at_real_root,
    gap_holds,
    illinois,
    scan_bracket,
)
from optgrade.dispersion._kernel_sums import _blend_column, _ff2_re, _same_blend
from optgrade.dispersion._modes import ABSENT, FIRST_ORDER, ROOT
from optgrade.ground._halfspace import compliance_im_at, shear_share_at
from optgrade.resonators._rod import rod_parts_at

#: the half-space: lossless speeds cl, ct, cr (m/s), complex speeds (m/s), shear modulus mu
#: (Pa, as complex) and mu (1 - i eta), loss factor eta
KernelGround = namedtuple("KernelGround", "cl ct cr cl_lossy ct_lossy mu mu_lossy loss_factor")
#: the lattice: row pitch b (m), contact radius (m), model code (0 lattice, 1 line,
#: 2 homogenised), form-factor series table, number of main orders J
KernelLattice = namedtuple("KernelLattice", "b radius model coef n_main")
#: the Rest tables (levels, kappa, w), each cell's level indices and weights, the kappa grid
#: start and step, the angular-frequency grid start and step (rad/s)
KernelTables = namedtuple("KernelTables", "rest idx wts k0 dk w0 dw")
#: the cells: rod height (m), head mass (kg), spacing (m); the rod's constants (`rod_constants`)
KernelCells = namedtuple("KernelCells", "height head_mass spacing rod_root rod_slowness")
#: the outputs, filled in place: k (2, nc, nf), shares (2, 5, nc, nf), angle (2, 4, nc, nf),
#: status (2, nc, nf) int8 (`optgrade.dispersion._modes`)
KernelOut = namedtuple("KernelOut", "k shares angle status")


@njit(cache=True)
def solve_grid(w_arr, cells, ground, lattice, tables, out, entry_order):
    """Fill ``out`` with the local modes of the cells at angular frequencies w_arr (rad/s).

    With ``entry_order`` empty every cell, frequency and branch is solved; otherwise the row
    request of the module docstring (branches tried at the entry cell, in that order)."""
    # the named tuples are unpacked once here: every read of an array field from a tuple costs
    # an atomic reference-count pair, which in the point loops took 10 % of the kernel's time
    k_out, shares_out, angle_out, status_out = out
    rest, idx, wts, k0, dk, w0, dw = tables
    height, head_mass, spacing, rod_root, rod_slowness = cells
    b, radius, model, coef, n_main = lattice
    nc = spacing.size
    nf = w_arr.size
    nw = rest.shape[2]
    table = np.empty((rest.shape[1], nw), dtype=np.complex128)  # this cell's Rest
    is_blended = np.zeros(nw, dtype=np.bool_)  # which of its columns are filled
    parts = np.zeros(4)  # channel parts and their best harmonic, reset per root
    best = np.zeros(4)
    # the lossy substrate's squared wavenumbers at each frequency (complex: a product, not the
    # general power)
    kl2_arr = np.empty(nf, dtype=np.complex128)
    kt2_arr = np.empty(nf, dtype=np.complex128)
    for jf in range(nf):
        kl2_arr[jf] = (w_arr[jf] / ground.cl_lossy) * (w_arr[jf] / ground.cl_lossy)
        kt2_arr[jf] = (w_arr[jf] / ground.ct_lossy) * (w_arr[jf] / ground.ct_lossy)
    is_row = entry_order.size > 0
    # row request: branch followed per frequency and whether the wave still travels
    path_br = np.zeros(nf, dtype=np.int64)
    path_on = np.ones(nf, dtype=np.bool_)
    for ic in range(nc):
        a = spacing[ic]
        g = 2.0 * math.pi / a
        # the Rest slice is blended column by column as frequencies need it, and kept for the
        # next cell when that cell has the same spacing
        if not _same_blend(idx, wts, ic):
            is_blended[:] = False
        cont, cnt = _fresh_state()
        m_last = 0  # the folded order at this cell's last frequency (grating regime)
        for jf in range(nf):
            if is_row and ic > 0 and not path_on[jf]:
                continue
            w = w_arr[jf]
            iz, wi, wt = _frequency_point(
                w, height[ic], head_mass[ic], rod_root, rod_slowness, ic, rest, idx, wts, w0, dw,
                table, is_blended,
            )
            kr = w / ground.cr
            # grating regime (kR >= 2 pi / a): the branches start from the folded Rayleigh
            # pole of harmonic m_r, are solved in the extended zone and stored unfolded
            # (`optgrade.dispersion._direct.folded_order`)
            m_r = 0 if model == 2 else int(math.floor(kr / g))
            if m_r != m_last:
                # the reduced roots jump: the continuation starts afresh
                cont, cnt = _fresh_state()
                m_last = m_r
            kr_red = kr - m_r * g
            p_lo, p_hi = _main_poles(kr, g, model, n_main, m_r)
            zone = 0.5 * g if model == 2 else g
            n_br = 2 if not is_row else (entry_order.size if ic == 0 else 1)
            if kr_red >= zone or m_r > n_main - 1:
                path_on[jf] = False  # no root on either branch: the path ends here
                for ib in range(n_br):
                    br = _branch_of(ib, ic, jf, is_row, entry_order, path_br)
                    status_out[br, ic, jf] = ABSENT
                continue
            pt = (w, iz, a, g, wi, wt, kr_red, p_lo, p_hi, zone, kl2_arr[jf], kt2_arr[jf],
                  m_r * g)
            for ib in range(n_br):
                br = _branch_of(ib, ic, jf, is_row, entry_order, path_br)
                if is_row and ic == 0 and _entry_has_root(k_out, entry_order, ib, jf):
                    continue
                is_stored, total = _solve_branch(
                    br, ic, jf, pt, table, cont, cnt, ground, lattice, b, radius, model, coef,
                    n_main, k0, dk, k_out, status_out
                )
                if is_stored:
                    _channel_split(
                        br, ic, jf, pt, total, ground, b, radius, model, coef, n_main, k_out,
                        shares_out, angle_out, parts, best,
                    )
            if is_row and ic > 0 and math.isnan(k_out[path_br[jf], ic, jf].real):
                # the followed branch ends here: the other one may continue it (a branch
                # crossing the Rayleigh line changes label, `_advance_path`)
                other = 1 - path_br[jf]
                is_stored, total = _solve_branch(
                    other, ic, jf, pt, table, cont, cnt, ground, lattice, b, radius, model,
                    coef, n_main, k0, dk, k_out, status_out
                )
                if is_stored:
                    _channel_split(
                        other, ic, jf, pt, total, ground, b, radius, model, coef, n_main,
                        k_out, shares_out, angle_out, parts, best,
                    )
            if is_row:
                _advance_path(ic, jf, k_out, entry_order, path_br, path_on)


@njit(cache=True, inline="always")
def _fresh_state():
    """Continuation state of one cell's two branches, as two arrays with the columns named in
    `optgrade.dispersion._kernel_roots`: real (2, N_CONT) -- roots of the last three visits,
    pole-side sign, gap margin, angular frequencies of the last three visits (newest first);
    integer (2, N_CNT) -- the gap continuation's closest scan point (-1: none), visits since
    the last full scan, the rescan interval, the number of visits."""
    cont = np.zeros((2, N_CONT))
    cnt = np.zeros((2, N_CNT), dtype=np.int64)
    for br in range(2):
        cnt[br, GAP_J] = -1
        cnt[br, GAP_INT] = GAP_RESCAN
    return cont, cnt


@njit(cache=True, inline="always")
def _frequency_point(w, h, m, rod_root, rod_slowness, ic, rest, idx, wts, w0, dw, table,
                     is_blended):
    """The rod's compliance 1/Z (only where the kernel solves) and the table's frequency cell
    (index wi, weight wt) at w; blends the two Rest columns it reads if not yet done."""
    z_num, z_den = rod_parts_at(w, h, m, rod_root, rod_slowness)
    iz = z_den / z_num if z_num != 0.0 else complex(math.inf, 0.0)
    nw = rest.shape[2]
    t = (w - w0) / dw
    wi = int(math.floor(t))
    if wi < 0:
        wi = 0
    if wi > nw - 2:
        wi = nw - 2
    wt = min(max(t - wi, 0.0), 1.0)
    for jw in (wi, wi + 1):
        if not is_blended[jw]:
            _blend_column(rest, idx, wts, ic, table, jw)
            is_blended[jw] = True
    return iz, wi, wt


@njit(cache=True, inline="always")
def _main_poles(kr, g, model, n_main, m_r):
    """Nearest poles of the main harmonics below / above the folded Rayleigh pole
    kR - 2 pi m_r / a in (0, 2 pi / a) (-1 where none)."""
    p_lo = -1.0
    p_hi = -1.0
    kr_red = kr - m_r * g
    if model != 2:
        for m in range(-n_main, n_main):
            for sgn in (1.0, -1.0):
                if m == m_r and sgn == 1.0:
                    continue
                p = sgn * kr - m * g
                if p > 0.0 and p < g:
                    if p > kr_red and (p_hi < 0.0 or p < p_hi):
                        p_hi = p
                    if p < kr_red and (p_lo < 0.0 or p > p_lo):
                        p_lo = p
    return p_lo, p_hi


@njit(cache=True, inline="always")
def _branch_of(ib, ic, jf, is_row, entry_order, path_br):
    """The ib-th branch visited at cell ic: 0, 1 for every point; for a row request the entry
    order at the entry cell and the followed branch later."""
    if not is_row:
        return ib
    if ic == 0:
        return entry_order[ib]
    return path_br[jf]


@njit(cache=True, inline="always")
def _entry_has_root(k, entry_order, ib, jf):
    """Whether a branch before the ib-th of the entry order has a root at the entry cell."""
    for jb in range(ib):
        if not math.isnan(k[entry_order[jb], 0, jf].real):
            return True
    return False


@njit(cache=True, inline="always")
def _advance_path(ic, jf, k, entry_order, path_br, path_on):
    """Row request: the branch followed from the entry cell (the first of the entry order with
    a root), the other one from a cell where it has no root but the other has, and the end of
    the path at the first cell where neither has one."""
    if ic == 0:
        for ib in range(entry_order.size):
            if not math.isnan(k[entry_order[ib], 0, jf].real):
                path_br[jf] = entry_order[ib]
                return
        path_on[jf] = False
    elif math.isnan(k[path_br[jf], ic, jf].real):
        # continue on the other branch where it has a root (the march's `_follow_by_continuity`
        # applies the same rule: the same branch under its other label within SWITCH_TOL,
        # a step between two branches otherwise)
        other = 1 - path_br[jf]
        if not math.isnan(k[other, ic, jf].real):
            path_br[jf] = other
        else:
            path_on[jf] = False


@njit(cache=True, inline="always")
def _solve_branch(br, ic, jf, pt, table, cont, cnt, ground, lattice, b, radius, model, coef,
                  n_main, k0, dk, k_out, status_out):
    """Branch br at cell ic, frequency jf: the real-axis root (continued, gap-kept or scanned,
    then Illinois) and the complex K from it; stores K and its status (ABSENT where the branch
    has no root, or where its K is not finite, decays by more than K' or is a first-order
    estimate with K'' < 0). Returns (whether K was stored, Im(Sigma - 1/Z) at K')."""
    w, iz, a, g, wi, wt, kr, p_lo, p_hi, zone, kl2, kt2, shift = pt
    status_out[br, ic, jf] = ABSENT
    # the previous visits of this branch (every frequency unless a row request skips some)
    n_prev = cnt[br, N_VIS]
    w1 = cont[br, HIST_W]
    w2 = cont[br, HIST_W + 1] if n_prev > 1 else w1
    w3 = cont[br, HIST_W + 2] if n_prev > 2 else w2
    cont[br, HIST_W + 2] = cont[br, HIST_W + 1]
    cont[br, HIST_W + 1] = w1
    cont[br, HIST_W] = w
    cnt[br, N_VIS] = n_prev + 1
    # the gap continuation trusts only fine frequency steps
    is_fine_step = n_prev > 0 and abs(w - w1) <= GAP_STEP * w
    root_real = cont[br, PREV_K]
    root_prev2 = cont[br, PREV2_K]
    root_prev3 = cont[br, PREV3_K]
    cont[br, PREV3_K] = root_prev2
    cont[br, PREV2_K] = root_real
    cont[br, PREV_K] = 0.0
    if br == 0:
        lo = kr
        hi = p_hi if p_hi > 0.0 else zone
        pole_lo = True
        pole_hi = p_hi > 0.0
    else:
        hi = kr
        lo = p_lo if p_lo > 0.0 else 1e-3 * kr
        pole_lo = p_lo > 0.0
        pole_hi = True
    if not hi > lo * (1.0 + 1e-9):
        cnt[br, GAP_J] = -1
        return False, 0.0
    # everything the real-axis function needs besides K, for `_h`
    kl2_0 = (w / ground.cl) ** 2 + 0j
    kt2_0 = (w / ground.ct) ** 2 + 0j
    hx = (a, b, radius, model, kl2_0, kt2_0, ground.mu, coef, n_main, iz, table, k0, dk, wi, wt,
          lo, hi, pole_lo, pole_hi)
    # the pole-free Re D just off the Rayleigh pole keeps its sign (the sign of the pole's
    # residue): evaluated once per cell and branch, then reused
    if cont[br, POLE_SIGN] == 0.0:
        cont[br, POLE_SIGN] = 1.0 if _h(_scan_k(0, lo, hi, br), hx) > 0.0 else -1.0
    s0 = cont[br, POLE_SIGN]
    found = False
    is_continued = False  # the bracket comes from continuation, not from a scan
    ka = kb = ha = hb = 0.0
    if n_prev > 0 and root_real > 0.0:
        found, is_continued, ka, ha, kb, hb = continued_bracket(
            br, w, w1, w2, w3, root_real, root_prev2, root_prev3, lo, hi, s0, hx
        )
    if not found and root_real == 0.0 and cnt[br, GAP_J] > 0 and is_fine_step:
        if gap_holds(br, lo, hi, pole_lo, pole_hi, s0, hx, cont, cnt):
            return False, 0.0
    if not found:
        found, ka, ha, kb, hb = scan_bracket(
            br, lo, hi, pole_lo, pole_hi, s0, hx, cont, cnt
        )
        if not found:
            return False, 0.0
    cnt[br, GAP_J] = -1
    k_re = illinois(ka, ha, kb, hb, is_continued, lo, hi, br, hx)
    cont[br, PREV_K] = k_re
    d0, dd0, r0, dr0, m0 = d_at_real_root(
        k_re, iz, a, table, k0, dk, wi, wt, lattice, kl2, kt2, ground.mu_lossy
    )
    kk, is_first_order = complex_root(k_re, d0, dd0, w, iz, r0, dr0, a, g, lattice, ground,
                                      kl2, kt2, shift)
    if is_first_order and kk.imag < 0.0:
        return False, 0.0
    # overdamped (K'' beyond the unfolded K'): no travelling wave
    if not (math.isfinite(kk.real) and math.isfinite(kk.imag)) or abs(kk.imag) > kk.real + shift:
        return False, 0.0
    k_out[br, ic, jf] = kk + shift
    status_out[br, ic, jf] = FIRST_ORDER if is_first_order else ROOT
    return True, (m0 + r0 - iz).imag


@njit(cache=True, inline="always")
def _channel_split(br, ic, jf, pt, total, ground, b, radius, model, coef, n_main, k_out, shares,
                   angle, parts, best):
    """Channel parts and angles at K' of a stored root: each radiating main harmonic's Im T_m
    (lossless substrate) split into shear and compressional (`shear_share_at`), forward where
    K' + 2 pi m / a > 0; the rest of total = Im(Sigma - 1/Z) at K' is absorbed. Shares are the
    parts over their sum where K'' > 0, else 0."""
    w, a, g, shift = pt[0], pt[2], pt[3], pt[12]
    m_lo = 0 if model == 2 else -n_main
    m_hi = 1 if model == 2 else n_main
    kk = k_out[br, ic, jf]
    kp = kk.real - shift  # the harmonics about the extended-zone root
    kl2r = (w / ground.cl) ** 2
    kt2r = (w / ground.ct) ** 2
    mu_re = ground.mu.real
    for ch in range(4):
        parts[ch] = 0.0
        best[ch] = 0.0
    for m in range(m_lo, m_hi):
        kx = kp + m * g
        xi2 = kx * kx
        if xi2 >= kt2r:
            continue
        im = compliance_im_at(xi2, kl2r, kt2r, mu_re)
        im = max(im * _ff2_re(xi2, radius, model, coef) / (a * b), 0.0)
        sh = shear_share_at(xi2, kl2r, kt2r)
        base = 0 if kx > 0.0 else 2
        for typ in range(2):
            pm = im * sh if typ == 0 else im * (1.0 - sh)
            k2 = kt2r if typ == 0 else kl2r
            ch = base + typ
            parts[ch] += pm
            if xi2 < k2 and (pm > best[ch] or math.isnan(angle[br, ch, ic, jf])):
                best[ch] = pm
                angle[br, ch, ic, jf] = math.asin(max(min(kx / math.sqrt(k2), 1.0), -1.0))
    if not math.isfinite(total):
        total = 0.0
    psum = parts[0] + parts[1] + parts[2] + parts[3]
    absorbed = max(total - psum, 0.0)
    ssum = psum + absorbed
    if kk.imag > 0.0 and ssum > 0.0:
        for ch in range(4):
            shares[br, ch, ic, jf] = parts[ch] / ssum
        shares[br, 4, ic, jf] = absorbed / ssum
