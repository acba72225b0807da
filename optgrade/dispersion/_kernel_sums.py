"""Compiled pieces of the dispersion function D(K, w) = 1/Z - Sigma for the surrogate's kernel.

Sigma = main harmonics (closed form, with the half-space's point functions of
`optgrade.ground._halfspace`) + Rest (read from the surrogate's tables). Here: the disc / strip
form factor and its slope, the main harmonics at real K (lossless, real arithmetic: the real-axis
scan's path) and at complex K with their slope, and the Rest table reads (spacing blend,
Catmull-Rom in kappa, linear in w). One point at a time; the root steps that use them are in
`optgrade.dispersion._kernel_roots`.
"""

from __future__ import annotations

import cmath
import math

import numpy as np
from numba import njit

from optgrade.ground._halfspace import compliance_at, compliance_re_at, compliance_slope_at

# Taylor coefficients of 2 J1(x)/x in x^2 (|x| <= 4 is all the two main terms need)
_COEF = np.array(
    [(-1.0) ** k / (4.0**k * math.factorial(k) * math.factorial(k + 1)) for k in range(22)]
)


def _n_taylor_terms(x_max: float, tol: float = 1e-16) -> int:
    """Number of Taylor terms of 2 J1(x)/x in x^2 (series of `_COEF`) after which every
    further term is below ``tol`` for |x| <= ``x_max`` (the terms fall faster than
    geometrically once they fall, so the tail is of the order of the first dropped term).
    Abramowitz & Stegun 9.1.10 (ascending series of J1)."""
    x2 = x_max * x_max
    for n in range(4, _COEF.size + 1):
        if abs(_COEF[n - 1]) * x2 ** (n - 1) < tol and x2 / (4.0 * n * (n + 1)) < 0.5:
            return n
    return int(_COEF.size)

def _series_table(n_max: int, tol: float = 1e-16) -> np.ndarray:
    """Coefficients of 2 J1(x)/x in x^2 (first n_max of `_COEF`) followed by, for n = 1 ..
    n_max terms, the largest |x^2| for which n terms meet the criterion of `_n_taylor_terms`
    (the kernel's series then stop as early as each argument allows; the last is inf)."""
    thr = np.empty(n_max)
    for n in range(1, n_max + 1):
        c = abs(_COEF[n - 1])
        lim = (tol / c) ** (1.0 / (n - 1)) if n > 1 else 0.0
        thr[n - 1] = min(lim, 2.0 * n * (n + 1))
    thr[-1] = np.inf
    return np.concatenate([_COEF[:n_max], thr])

@njit(cache=True, inline="always")
def _n_used(coef, ax2):
    """Number of series terms needed at |x^2| = ax2 (see `_series_table`)."""
    n_max = coef.size // 2
    n = 4 if n_max > 4 else n_max
    while n < n_max and coef[n_max + n - 1] < ax2:
        n += 1
    return n

@njit(cache=True, inline="always")
def _mag(z):
    """|z| of a complex number without hypot's overflow guard (the kernel's magnitudes are far
    from the float range's ends): several times faster than abs(z) in the compiled kernel."""
    return math.sqrt(z.real * z.real + z.imag * z.imag)


# -- form factor of the contact (disc: lattice, strip: line, 1: homogenised) ----------------
@njit(cache=True)
def _ff2(q, radius, model, coef):
    # model: 0 lattice (disc), 1 line (strip), 2 homogenised
    if model == 2:
        return 1.0 + 0j
    x2 = q * radius * radius
    if model == 0:
        n = _n_used(coef, abs(x2))
        s = coef[n - 1] * x2 + coef[n - 2]
        for i in range(n - 3, -1, -1):
            s = s * x2 + coef[i]
    else:
        if abs(x2) < 1e-12:
            s = 1.0 - x2 / 6.0
        else:
            x = cmath.sqrt(x2 + 0j)
            s = cmath.sin(x) / x
    return s * s + 0j

@njit(cache=True, inline="always")
def _ff2_re(q, radius, model, coef):
    if model == 2:
        return 1.0
    x2 = q * radius * radius
    if model == 0:
        n = _n_used(coef, abs(x2))
        s = coef[n - 1] * x2 + coef[n - 2]
        for i in range(n - 3, -1, -1):
            s = s * x2 + coef[i]
    else:
        if x2 < 1e-12:
            s = 1.0 - x2 / 6.0
        else:
            x = math.sqrt(x2)
            s = math.sin(x) / x
    return s * s

@njit(cache=True, inline="always")
def _ff2_d(q, radius, model, coef):
    """Form factor F(q) and dF/dq at complex q = xi^2 (see `_ff2`)."""
    if model == 2:
        return 1.0 + 0j, 0j
    r2 = radius * radius
    x2 = q * r2
    if model == 0:
        # the real-coefficient series and its derivative at complex x2 by the second-order
        # Horner scheme (Knuth, TAOCP vol. 2, 4.6.4): x2^2 = r x2 - t with r = 2 Re x2,
        # t = |x2|^2, so each term costs two real multiply-adds instead of a complex product
        xr = x2.real
        xi = x2.imag
        rr = 2.0 * xr
        tt = xr * xr + xi * xi
        n = _n_used(coef, math.sqrt(tt))
        a = coef[n - 1]
        b = coef[n - 2]
        da = (n - 1) * coef[n - 1]
        db = (n - 2) * coef[n - 2]
        for k in range(n - 3, -1, -1):
            a, b = b + rr * a, coef[k] - tt * a
            if k > 0:
                da, db = db + rr * da, k * coef[k] - tt * da
        s = complex(a * xr + b, a * xi)
        ds = complex(da * xr + db, da * xi)
    else:
        if abs(x2) < 1e-6:
            s = 1.0 - x2 / 6.0 + x2 * x2 / 120.0
            ds = -1.0 / 6.0 + x2 / 60.0
        else:
            x = cmath.sqrt(x2 + 0j)
            sn = cmath.sin(x)
            s = sn / x
            ds = (x * cmath.cos(x) - sn) / (2.0 * x * x2)
    return s * s, 2.0 * s * ds * r2


# -- main harmonics ------------------------------------------------------------------------
@njit(cache=True)
def _main(K, a, b, radius, model, kl2, kt2, mu, coef, n_main):
    g = 2.0 * math.pi / a
    if model == 2:
        q0 = K * K
        return compliance_at(q0, kl2, kt2, mu) * _ff2(q0, radius, model, coef) / (a * b)
    t = 0j
    for m in range(-n_main, n_main):
        x = K + m * g
        q = x * x
        t += compliance_at(q, kl2, kt2, mu) * _ff2(q, radius, model, coef)
    return t / (a * b)

@njit(cache=True, inline="always")
def _main_re(K, a, b, radius, model, kl2, kt2, mu, coef, n_main):
    """Re of the main harmonics at real K, lossless (fast path of the real-axis scan)."""
    g = 2.0 * math.pi / a
    if model == 2:
        q0 = K * K
        return compliance_re_at(q0, kl2, kt2, mu) * _ff2_re(q0, radius, model, coef) / (a * b)
    t = 0.0
    for m in range(-n_main, n_main):
        x = K + m * g
        q = x * x
        t += compliance_re_at(q, kl2, kt2, mu) * _ff2_re(q, radius, model, coef)
    return t / (a * b)

@njit(cache=True)
def _main_d(K, a, b, radius, model, kl2, kt2, mu, coef, n_main, skip0):
    """Main harmonics (of `_main`) and their K-derivative at complex K, analytic; the m = 0
    harmonic is left out when skip0."""
    g = 2.0 * math.pi / a
    t = 0j
    dt = 0j
    lo = 0 if model == 2 else -n_main
    hi = 1 if model == 2 else n_main
    for m in range(lo, hi):
        if m == 0 and skip0:
            continue
        x = K + m * g
        q = x * x
        gq, dg = compliance_slope_at(q, kl2, kt2, mu)
        f, df = _ff2_d(q, radius, model, coef)
        t += gq * f
        dt += (dg * f + gq * df) * 2.0 * x
    return t / (a * b), dt / (a * b)


# -- Rest from the tables ----------------------------------------------------------------
@njit(cache=True)
def _blend_column(table, idx, wts, c, out, j):
    """Column j (one table frequency) of cell c's table slice into out:
    sum_k wts[c, k] table[idx[c, k], :, j] (spacing interpolation)."""
    out[:, j] = 0.0
    for k in range(idx.shape[1]):
        wk = wts[c, k]
        for i in range(table.shape[1]):
            out[i, j] += wk * table[idx[c, k], i, j]

@njit(cache=True)
def _same_blend(idx, wts, c):
    """Whether cell c interpolates between the same levels with the same weights as cell c - 1."""
    if c == 0:
        return False
    for k in range(idx.shape[1]):
        if idx[c, k] != idx[c - 1, k] or wts[c, k] != wts[c - 1, k]:
            return False
    return True

@njit(cache=True, inline="always")
def _kappa_cell(K, a, n, k0, dk):
    """Catmull-Rom stencil start j, offset u and mirror sign of real K on the kappa grid (Rest is
    symmetric about the zone edge kappa = 1)."""
    kap = K * a / math.pi
    sgn = 1.0
    if kap > 1.0:
        kap = 2.0 - kap
        sgn = -1.0
    t = (kap - k0) / dk
    j = int(math.floor(t))
    if j < 1:
        j = 1
    if j > n - 3:
        j = n - 3
    return j, t - j, sgn

@njit(cache=True, inline="always")
def _cr_weights(u):
    """Catmull-Rom weights of the four stencil points at offset u."""
    u2 = u * u
    u3 = u2 * u
    return (
        -0.5 * u3 + u2 - 0.5 * u,
        1.5 * u3 - 2.5 * u2 + 1.0,
        -1.5 * u3 + 2.0 * u2 + 0.5 * u,
        0.5 * u3 - 0.5 * u2,
    )

@njit(cache=True)
def _rest(K, a, table, k0, dk, wi, wt):
    """Rest and dRest/dK at real K from one cell's table slice (n_kappa, n_w)."""
    j, u, sgn = _kappa_cell(K, a, table.shape[0], k0, dk)
    c0, c1, c2, c3 = _cr_weights(u)
    u2 = u * u
    d0 = -1.5 * u2 + 2.0 * u - 0.5
    d1 = 4.5 * u2 - 5.0 * u
    d2 = -4.5 * u2 + 4.0 * u + 0.5
    d3 = 1.5 * u2 - u
    v0 = (1.0 - wt) * table[j - 1, wi] + wt * table[j - 1, wi + 1]
    v1 = (1.0 - wt) * table[j, wi] + wt * table[j, wi + 1]
    v2 = (1.0 - wt) * table[j + 1, wi] + wt * table[j + 1, wi + 1]
    v3 = (1.0 - wt) * table[j + 2, wi] + wt * table[j + 2, wi + 1]
    val = c0 * v0 + c1 * v1 + c2 * v2 + c3 * v3
    der = d0 * v0 + d1 * v1 + d2 * v2 + d3 * v3
    return val, sgn * der / dk * a / math.pi

@njit(cache=True, inline="always")
def _rest_re(K, a, table, k0, dk, wi, wt):
    """Re Rest at real K (the value of `_rest` only, real part: the real-axis scan's path)."""
    j, u, _ = _kappa_cell(K, a, table.shape[0], k0, dk)
    c0, c1, c2, c3 = _cr_weights(u)
    w0 = 1.0 - wt
    return (
        c0 * (w0 * table[j - 1, wi].real + wt * table[j - 1, wi + 1].real)
        + c1 * (w0 * table[j, wi].real + wt * table[j, wi + 1].real)
        + c2 * (w0 * table[j + 1, wi].real + wt * table[j + 1, wi + 1].real)
        + c3 * (w0 * table[j + 2, wi].real + wt * table[j + 2, wi + 1].real)
    )
