"""Named steps of the surrogate kernel's root search at one cell, branch and frequency.

Real axis (K' of a branch), in the order the kernel tries them: `continued_bracket` (a narrow
bracket about the extrapolation of the branch's last roots, then a wide one about K w / w_prev,
then the failed ends where they enclose the root), `gap_holds` (a branch without root stays
without root while the scan point closest to a sign change keeps its margin), `scan_bracket`
(the full scan outwards from the Rayleigh pole) and `illinois` (regula falsi sped up by inverse
quadratic interpolation). Complex K: `complex_root` (Newton on D R_0 with the analytic slope,
the difference-slope Newton as fallback, else the first-order estimate). The function they all
evaluate, the pole-free -Re D, is `_h`; the pieces of D are in `optgrade.dispersion._kernel_sums`.
"""

from __future__ import annotations

import cmath
import math

from numba import njit

from optgrade.dispersion._kernel_sums import (
    _ff2_d,
    _mag,
    _main,
    _main_d,
    _main_re,
    _rest,
    _rest_re,
)
from optgrade.ground._halfspace import rayleigh_at, rayleigh_slope_at

N_SCAN = 16
#: Newton stops at |step| <= NEWTON_TOL |K| (quadratic convergence with a forward-difference
#: slope of relative error ~1e-6: the iterate's error is then ~1e-6 of the last step)
NEWTON_TOL = 1e-8
#: a Newton root is accepted when its last step is at most this fraction of |K|
NEWTON_ACCEPT = 1e-7
#: iterations of the analytic-slope Newton (the difference-slope one keeps N_NEWTON)
N_NEWTON_D = 4
MAX_ILLINOIS = 60
#: the difference-slope Newton runs when the analytic-slope one is not accepted and its last step
#: was between NEWTON_ACCEPT and this fraction of |K| (measurements in docs/surrogate-speed.md);
#: elsewhere both Newtons follow the same path
FD_RETRY = 2e-7
#: Illinois stops when the bracket or the last move is below this fraction of K (the complex
#: Newton that follows a lossy or leaky root refines K' as well)
ILLINOIS_TOL = 1e-9
#: gap continuation: a branch without root stays without root while the closest scan point
#: keeps this fraction of the margin of the last full scan ...
GAP_KEEP = 0.5
#: ... for at most this many frequencies in a row, and only across frequency steps of at most
#: this fraction of the frequency
GAP_RESCAN = 8
GAP_RESCAN_MAX = 32
GAP_STEP = 0.01
N_NEWTON = 4
N_LOSS_STAGES = 1

#: columns of the per-branch continuation state (`optgrade.dispersion._kernel._fresh_state`):
#: real array -- roots of the last three visits, pole-side sign, gap margin, angular frequencies
#: of the last three visits (newest first); integer array -- closest scan point, visits since
#: the last full scan, rescan interval, number of visits. Two arrays rather than ten: each array
#: a compiled step touches costs an atomic reference-count pair per call.
PREV_K, PREV2_K, PREV3_K, POLE_SIGN, GAP_M, HIST_W = 0, 1, 2, 3, 4, 5
N_CONT = 8
GAP_J, GAP_N, GAP_INT, N_VIS = 0, 1, 2, 3
N_CNT = 4


@njit(cache=True)
def _scan_k(js, lo, hi, br):
    """Scan point js of N_SCAN on (lo, hi), clustered quadratically at the Rayleigh pole (lo
    for branch 0, hi for branch 1); the ends are kept 1e-9 of the interval inside."""
    if js == 0:
        u = 1e-9
    elif js == N_SCAN:
        u = 1.0 - 1e-9
    else:
        u = (js / N_SCAN) ** 2
    if br == 0:
        return lo + (hi - lo) * u
    return hi - (hi - lo) * u

@njit(cache=True, inline="always")
def _pole_factor(K, lo, hi, pole_lo, pole_hi):
    """(K - lo)(hi - K), each factor only where that end of the bracket is a pole: multiplied
    into Re D it removes the poles (positive inside the bracket)."""
    f = (K - lo) if pole_lo else 1.0
    if pole_hi:
        f *= hi - K
    return f

@njit(cache=True, inline="always")
def _h_inline(K, hx):
    """Pole-free -Re D at real K on the real-axis bracket: (Re Sigma - Re 1/Z) times
    `_pole_factor`, lossless main terms; hx packs the fixed arguments (built in
    `optgrade.dispersion._kernel`). Compiled inline into the two loops that evaluate it most
    (the scan and the Illinois iteration): a call there costs a reference-count pair for each
    array in hx (measured: the kernel 9 % slower with the call)."""
    a, b, radius, model, kl2_0, kt2_0, mu, coef, n_main, iz, table, k0, dk, wi, wt = hx[:15]
    lo, hi, pole_lo, pole_hi = hx[15:]
    f = _main_re(K, a, b, radius, model, kl2_0.real, kt2_0.real, mu.real, coef, n_main)
    f += _rest_re(K, a, table, k0, dk, wi, wt) - iz.real
    return f * _pole_factor(K, lo, hi, pole_lo, pole_hi)


@njit(cache=True)
def _h(K, hx):
    """`_h_inline` as a called function, for the places that evaluate it once or twice
    (inlined everywhere, the kernel's first compilation took about 7 times as long)."""
    return _h_inline(K, hx)

@njit(cache=True)
def _inverse_quadratic(ka, ha, kb, hb, kc, hc):
    """Root estimate of inverse quadratic interpolation through three points (K, h) with distinct
    h (kc when two h coincide)."""
    dab = ha - hb
    dac = ha - hc
    dbc = hb - hc
    if dab == 0.0 or dac == 0.0 or dbc == 0.0:
        return kc
    return ka * hb * hc / (dab * dac) - kb * ha * hc / (dab * dbc) + kc * ha * hb / (dac * dbc)


# -- complex Newton on D R_0 ----------------------------------------------------------------
@njit(cache=True)
def _pole_free(K, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0, shift):
    """D(K) R(K + shift): the Rayleigh function at the harmonic that carries the nearby pole
    (m = 0, or the folded harmonic in the grating regime, shift = 2 pi m_r / a)."""
    d = iz - _main(K, a, b, radius, model, kl2, kt2, mu, coef, n_main) - (r0 + (K - k_re) * dr0)
    ks = K + shift
    return d * rayleigh_at(ks * ks, kl2, kt2)

@njit(cache=True)
def _pole_free_d(K, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0):
    """D(K) R_0(K) of `_pole_free` and its K-derivative, analytic. The m = 0 harmonic times R_0
    is -alpha_0 kT^2 F_0 / (mu a b) (R_0 cancels), the rest of D is multiplied out."""
    q0 = K * K
    rr, drr, al0 = rayleigh_slope_at(q0, kl2, kt2)
    f0, df0 = _ff2_d(q0, radius, model, coef)
    sc = -kt2 / (mu * a * b)
    p0 = sc * al0 * f0
    dp0 = sc * (0.5 * f0 / al0 + al0 * df0)
    mo, dmo = _main_d(K, a, b, radius, model, kl2, kt2, mu, coef, n_main, True)
    dr_ = iz - mo - (r0 + (K - k_re) * dr0)
    val = dr_ * rr - p0
    der = (-dmo - dr0) * rr + (dr_ * drr - dp0) * 2.0 * K
    return val, der

@njit(cache=True)
def _newton_d(
    kk, n_iter, tol, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0, f0, df0
):
    """Newton on D(K) R_0(K) with the analytic derivative (`_pole_free_d`) from kk; the first
    iteration uses f0, df0 (the function and slope at kk, known to the caller) when df0 != 0.
    Stops when |step| <= tol |K|, or when the step after the last one, predicted from
    quadratic convergence (|s_n|^3 / |s_(n-1)|^2), is below tol |K| and the loop would have
    made that iteration (one evaluation fewer, same acceptance). Returns
    (K, last step or predicted next step)."""
    step = 0j
    prev = 0.0
    for it in range(n_iter):
        if it == 0 and df0 != 0.0:
            f, df = f0, df0
        else:
            f, df = _pole_free_d(
                kk, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0
            )
        step = f / df
        kk = kk - step
        s = _mag(step)
        mk = _mag(kk)
        if s <= tol * mk:
            break
        # the prediction only stands in for an iteration the loop would still have made,
        # and only close to the root (|s_n| <= 1e-4 |K|), where convergence is quadratic
        if it > 0 and it + 1 < n_iter and s < prev and s <= 1e-4 * mk:
            pred = s * s * s / (prev * prev)
            if pred <= tol * mk:
                return kk, pred + 0j
        prev = s
    return kk, step

@njit(cache=True)
def _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g):
    """Acceptance of a Newton root: finite, converged (last step <= NEWTON_ACCEPT |K|), on the
    same side of every branch point of the main harmonics as the real-axis root, not growing."""
    mk = _mag(kk)
    ok = math.isfinite(kk.real) and math.isfinite(kk.imag) and _mag(step) <= NEWTON_ACCEPT * mk
    for m in range(m_lo, m_hi):
        for e0 in (kt_s, kl_s, -kt_s, -kl_s):
            e = e0 - m * g
            if (kk.real > e) != (k_re > e):
                ok = False
    if kk.imag < -1e-9 * mk:
        ok = False
    return ok

@njit(cache=True)
def _newton(
    kk, n_iter, tol, hstep, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0,
    shift=0.0,
):
    """Newton on the pole-free D(K) R_0(K) (see optgrade.dispersion._direct) from kk,
    forward-difference derivative (step hstep); stops when |step| <= tol |K|. Returns (K, last
    step)."""
    step = 0j
    for _ in range(n_iter):
        f0 = _pole_free(
            kk, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0, shift
        )
        f1 = _pole_free(
            kk + hstep, k_re, a, b, radius, model, kl2, kt2, mu, coef, n_main, iz, r0, dr0, shift
        )
        step = f0 / ((f1 - f0) / hstep)
        kk = kk - step
        if abs(step) <= tol * abs(kk):
            break
    return kk, step


# -- real axis: bracket and root of one branch ------------------------------------------------
@njit(cache=True, inline="always")
def continued_bracket(br, w, w1, w2, w3, root_real, root_prev2, root_prev3, lo, hi, s0, hx):
    """Bracket of the branch's root continued from its last visits (frequencies w1, w2, w3 with
    real roots root_real, root_prev2, root_prev3; sign-checked against the pole-side sign s0).

    First a narrow bracket about the linear extrapolation of the last two roots, half-width
    three times the error the same extrapolation made one step back (needs three previous
    roots), then the wide bracket about the proportional guess K w / w_prev. Where neither holds
    the root, the failed ends bracket it where they enclose it (steps beyond them, to look
    further, found other roots than the scan does: 26 existence changes in 8 x 60 x 256 bench
    points, so there is none). Returns (found, is_continued, ka, ha, kb, hb)."""
    kg = root_real * w / w1
    dlt = 0.5 * abs(w - w1) / w + 1e-3
    n_try = 1
    kg_n = kg
    dlt_n = dlt
    # (any frequency order is allowed: repeated frequencies skip this guess)
    if root_prev2 > 0.0 and root_prev3 > 0.0 and w1 != w2 and w2 != w3:
        kl = root_real + (root_real - root_prev2) * (w - w1) / (w1 - w2)
        e1 = root_real - (root_prev2 + (root_prev2 - root_prev3) * (w1 - w2) / (w2 - w3))
        if kl > 0.0:
            dlt_n = (3.0 * abs(e1) * ((w - w1) / (w1 - w2)) ** 2) / kl + 1e-8
            if dlt_n < 0.25 * dlt:
                kg_n = kl
                n_try = 2
    # points that failed as bracket ends still tell where the root is: k_in (farthest from the
    # pole with the pole-side sign: the root lies beyond) and k_out (nearest to the pole with
    # the other sign: the root lies before)
    dirn = 1.0 if br == 0 else -1.0
    k_in = 0.0
    h_in = 0.0
    k_out = 0.0
    h_out = 0.0
    for attempt in range(n_try):
        kc_ = kg_n if attempt + 1 < n_try else kg
        dl_ = dlt_n if attempt + 1 < n_try else dlt
        k1 = kc_ * (1.0 - dirn * dl_)  # the end on the pole's side
        k2 = kc_ * (1.0 + dirn * dl_)
        inside = (min(k1, k2) > lo + 1e-9 * lo) and (max(k1, k2) < hi - 1e-9 * hi)
        if not inside:
            continue
        h1 = _h_inline(k1, hx)
        if (h1 > 0.0) != (s0 > 0.0):
            if k_out == 0.0 or dirn * k1 < dirn * k_out:
                k_out, h_out = k1, h1
            continue
        if k_in == 0.0 or dirn * k1 > dirn * k_in:
            k_in, h_in = k1, h1
        h2 = _h_inline(k2, hx)
        if (h2 > 0.0) != (s0 > 0.0):
            return True, True, k1, h1, k2, h2
        if dirn * k2 > dirn * k_in:
            k_in, h_in = k2, h2
    if k_in > 0.0 and k_out > 0.0 and dirn * k_in < dirn * k_out:
        return True, False, k_in, h_in, k_out, h_out
    return False, False, 0.0, 0.0, 0.0, 0.0


@njit(cache=True, inline="always")
def gap_holds(br, lo, hi, pole_lo, pole_hi, s0, hx, cont, cnt):
    """Gap continuation: the branch had no root at its previous visit, and the scan point that
    came closest to a sign change (column GAP_J) still keeps more than GAP_KEEP of the margin
    the last full scan measured there: still no root (counted in column GAP_N). False where a
    full scan is due (every GAP_INT visits, see `scan_bracket`) or the margin shrank."""
    if cnt[br, GAP_N] >= cnt[br, GAP_INT]:
        return False
    kq = _scan_k(cnt[br, GAP_J], lo, hi, br)
    hq = _h(kq, hx)
    if s0 * hq / _pole_factor(kq, lo, hi, pole_lo, pole_hi) > GAP_KEEP * cont[br, GAP_M]:
        cnt[br, GAP_N] += 1
        return True
    return False


@njit(cache=True, inline="always")
def scan_bracket(br, lo, hi, pole_lo, pole_hi, s0, hx, cont, cnt):
    """Full scan outwards from the Rayleigh pole (points clustered at the pole): the first sign
    change brackets the root. With none the branch is absent, and the point closest to a sign
    change is kept for `gap_holds`: a rescan that finds it no closer than the last full scan did
    doubles the interval to the next (up to GAP_RESCAN_MAX); any closer approach, or a fresh
    gap, resets it to GAP_RESCAN. Returns (found, ka, ha, kb, hb); ha may be the pole sign only
    (see `illinois`)."""
    kprev = _scan_k(0, lo, hi, br)
    hprev = s0
    jbest = -1
    mbest = 0.0
    for jp in range(1, N_SCAN + 1):
        K = _scan_k(jp, lo, hi, br)
        h = _h_inline(K, hx)
        if (h > 0.0) != (s0 > 0.0):
            return True, kprev, hprev, K, h
        marg = s0 * h / _pole_factor(K, lo, hi, pole_lo, pole_hi)
        if jbest < 0 or marg < mbest:
            jbest = jp
            mbest = marg
        kprev, hprev = K, h
    cnt[br, GAP_J] = jbest
    if cnt[br, GAP_N] >= cnt[br, GAP_INT] and mbest >= cont[br, GAP_M]:
        cnt[br, GAP_INT] = min(2 * cnt[br, GAP_INT], GAP_RESCAN_MAX)
    else:
        cnt[br, GAP_INT] = GAP_RESCAN
    cont[br, GAP_M] = mbest
    cnt[br, GAP_N] = 0
    return False, 0.0, 0.0, 0.0, 0.0


@njit(cache=True, inline="always")
def illinois(ka, ha, kb, hb, is_continued, lo, hi, br, hx):
    """Real root in the bracket (ka, kb): Illinois (regula falsi) sped up by inverse quadratic
    interpolation. After each evaluation, the inverse quadratic through the bracket ends and the
    new point (true values, ha_t: ha is halved by the Illinois rule) is the root if it moves less
    than ILLINOIS_TOL; in a continued bracket it is also the next point where it lies inside (the
    Illinois secant where not). A scan bracket is wide and may hold more roots: there the
    Illinois steps alone pick one, as in the direct solver. The first bracket end may carry only
    the pole sign (a scan bracket's first end), so it is evaluated then."""
    if ka == _scan_k(0, lo, hi, br):
        ha = _h(ka, hx)
    ha_t = ha
    kq = 0.0
    for it in range(MAX_ILLINOIS):
        if it > 0 and is_continued and min(ka, kb) < kq < max(ka, kb):
            kc = kq
        else:
            den = hb - ha
            if den != 0.0:
                kc = (ka * hb - kb * ha) / den
            else:
                kc = 0.5 * (ka + kb)
        hc = _h_inline(kc, hx)
        if hc != 0.0:
            kq = _inverse_quadratic(ka, ha_t, kb, hb, kc, hc)
            if abs(kq - kc) <= ILLINOIS_TOL * abs(kc) and min(ka, kb) < kq < max(ka, kb):
                kb = kq
                break
        if (hc > 0.0) != (hb > 0.0):
            ka, ha, ha_t = kb, hb, hb
        else:
            ha = 0.5 * ha
        moved = abs(kc - kb)
        kb, hb = kc, hc
        if abs(kb - ka) <= ILLINOIS_TOL * abs(kc) or hc == 0.0 or moved <= ILLINOIS_TOL * abs(kc):
            break
    return kb


# -- complex K from the real-axis root ---------------------------------------------------------
@njit(cache=True, inline="always")
def analytic_newton(k_re, d0, dd0, iz, r0, dr0, a, lat, kl2, kt2, mu_lossy):
    """Newton with the analytic slope (quadratic convergence) from the real-axis root k_re, as
    the direct solver; its first step's D R_0 and slope come from D and D' at k_re (d0, dd0).
    Returns (K, last step)."""
    b, radius, model, coef, n_main = lat
    rr0, drr0, _ = rayleigh_slope_at(k_re * k_re + 0j, kl2, kt2)
    return _newton_d(
        k_re + 0j,
        N_NEWTON_D,
        NEWTON_TOL,
        k_re,
        a,
        b,
        radius,
        model,
        kl2,
        kt2,
        mu_lossy,
        coef,
        n_main,
        iz,
        r0,
        dr0,
        d0 * rr0,
        dd0 * rr0 + d0 * drr0 * 2.0 * k_re,
    )


@njit(cache=True)
def difference_newton(kk, n_newton, k_re, w, iz, r0, dr0, a, lat, ground, shift=0.0):
    """The difference-slope Newton (forward difference, step 1e-6 pi / a) from kk, over
    N_LOSS_STAGES stages of the substrate's loss factor. Returns (K, last step)."""
    b, radius, model, coef, n_main = lat
    cl, ct, mu, eta_sub = ground.cl, ground.ct, ground.mu, ground.loss_factor
    hstep = 1e-6 * math.pi / a
    step = 0j
    n_stages = N_LOSS_STAGES if eta_sub > 0.0 else 1
    for stage in range(1, n_stages + 1):
        eta_s = eta_sub * stage / n_stages
        fac = cmath.sqrt(1.0 - 1j * eta_s)
        kl2_s = (w / (cl * fac)) * (w / (cl * fac))
        kt2_s = (w / (ct * fac)) * (w / (ct * fac))
        mu_s = mu * (1.0 - 1j * eta_s)
        if n_newton > 0:
            kk, step = _newton(
                kk, n_newton, NEWTON_TOL, hstep, k_re, a, b, radius, model, kl2_s, kt2_s,
                mu_s, coef, n_main, iz, r0, dr0, shift,
            )
    return kk, step


@njit(cache=True, inline="always")
def complex_root(k_re, d0, dd0, w, iz, r0, dr0, a, g, lat, ground, kl2, kt2, shift=0.0):
    """Complex Bloch wavenumber from the real-axis root k_re: the analytic Newton; where it is
    not accepted, the difference-slope Newton decides, but only where the analytic one missed
    the acceptance step by little (NEWTON_ACCEPT < |step|/|K| <= FD_RETRY: elsewhere both follow
    the same path and fail alike, a converged root on the wrong side of a branch point or too
    few iterations); where neither is accepted, the first-order estimate
    K = k_re + i (-Im D / Re D'). A lossless bound root is exact on the real axis already.
    Returns (K, is_first_order)."""
    model, n_main = lat.model, lat.n_main
    m_lo = 0 if model == 2 else -n_main
    m_hi = 1 if model == 2 else n_main
    kt_s = w / ground.ct
    kl_s = w / ground.cl
    kk = k_re + 0j
    step = 0j
    n_newton = N_NEWTON
    if abs(d0.imag) <= 1e-14 * _mag(iz):
        n_newton = 0  # lossless bound root: already exact on the real axis
    ok = False
    skip_fd = False
    # the analytic Newton removes the m = 0 pole in closed form; in the grating regime
    # (shift != 0) the nearby pole is the folded harmonic's: the difference Newton on
    # D R(K + shift), as the direct solver
    if n_newton > 0 and N_LOSS_STAGES == 1 and shift == 0.0:
        kk, step = analytic_newton(k_re, d0, dd0, iz, r0, dr0, a, lat, kl2, kt2, ground.mu_lossy)
        ok = _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g)
        if not ok:
            s_rel = _mag(step) / _mag(kk)
            skip_fd = not (NEWTON_ACCEPT < s_rel <= FD_RETRY)
            kk = k_re + 0j
            step = 0j
    if not ok and not skip_fd:
        kk, step = difference_newton(kk, n_newton, k_re, w, iz, r0, dr0, a, lat, ground, shift)
        ok = _newton_ok(kk, step, k_re, m_lo, m_hi, kt_s, kl_s, g)
    if ok:
        return kk, False
    return k_re + 1j * (-d0.imag / dd0.real), True


@njit(cache=True, inline="always")
def d_at_real_root(k_re, iz, a, table, k0, dk, wi, wt, lat, kl2, kt2, mu_lossy):
    """D = 1/Z - Sigma and dD/dK at the real-axis root (lossy main terms at complex speeds,
    Rest and its slope from the table), with Rest's value and slope there (r0, dr0) and the
    main terms (m0). Returns (d0, dd0, r0, dr0, m0)."""
    b, radius, model, coef, n_main = lat
    r0, dr0 = _rest(k_re, a, table, k0, dk, wi, wt)
    m0, dm0 = _main_d(k_re + 0j, a, b, radius, model, kl2, kt2, mu_lossy, coef, n_main, False)
    d0 = iz - m0 - r0
    dd0 = -(dm0 + dr0)
    return d0, dd0, r0, dr0, m0
