"""Helpers shared by the goal modules (private)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from optgrade.channels import BLOCKING, RADIATING

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation import Trace
    from optgrade.study import Study

#: The four converted (bulk-wave) channels.
CONVERTED = RADIATING


def lossy_rayleigh_wavenumber(freq: ArrayLike, cl: complex, ct: complex) -> np.ndarray:
    """Complex Rayleigh wavenumber kR(f) of a (lossy) isotropic half-space (1/m).

    Root of the Rayleigh equation (2 - x)^2 = 4 sqrt(1 - x) sqrt(1 - s x), x = cR^2 / cT^2,
    s = cT^2 / cL^2, taken with the complex speeds of the damped solid (elastic-viscoelastic
    correspondence principle: the elastic result holds with complex moduli; e.g. R. M.
    Christensen, *Theory of Viscoelasticity*, 1982, ch. 2 -- from memory). The rationalised
    form x^3 - 8 x^2 + (24 - 16 s) x - 16 (1 - s) = 0 (Achenbach 1973, sec. 5.11) is solved for
    its three roots and the one nearest the lossless Rayleigh root is kept (the Rayleigh
    root is the only one with 0 < Re x < 1 for a lossless solid).

    Parameters
    ----------
    freq : array_like
        Frequency (Hz).
    cl, ct : complex
        Compressional and shear speeds (m/s); complex ``c sqrt(1 - i eta)`` for a damped solid
        (``optgrade.ground._halfspace.Substrate.complex_speeds``).

    Returns
    -------
    ndarray, complex
        kR = w / (cT sqrt(x)) (1/m), with Im kR > 0 (decay along +x for exp(-i w t)) when the
        solid is damped. With equal loss eta on both moduli this is exactly
        kR0 (1 - i eta)^(-1/2), so Im kR ~ (eta / 2) Re kR for small eta.
    """
    cl = complex(cl)
    ct = complex(ct)
    s = (ct / cl) ** 2
    roots = np.roots([1.0, -8.0, 24.0 - 16.0 * s, -16.0 * (1.0 - s)])
    s0 = (ct.real / cl.real) ** 2
    real0 = np.roots([1.0, -8.0, 24.0 - 16.0 * s0, -16.0 * (1.0 - s0)])
    is_rayleigh = (np.abs(real0.imag) < 1e-9) & (real0.real > 0) & (real0.real < 1)
    x0 = real0.real[is_rayleigh].min()
    x = roots[np.argmin(np.abs(roots - x0))]
    w = 2.0 * np.pi * np.asarray(freq, dtype=float)
    return w / (ct * np.sqrt(x))


def bare_transmission(trace: Trace, layout: Layout, study: Study) -> np.ndarray:
    """Surface power the bare (lossy) ground alone lets through over the row's path length.

    ``T_bare(f) = exp(-2 Im kR(f) L)`` with kR from :func:`lossy_rayleigh_wavenumber` (the
    substrate's complex speeds, ``optgrade.ground._halfspace.Substrate.complex_speeds``) and
    ``L`` the row length (sum of the cell lengths, the path the march follows). 1 for a lossless
    substrate. Dimensionless, shape of ``trace.frequency``.
    """
    from optgrade.ground import Substrate

    sub = study.substrate
    f = np.asarray(trace.frequency, dtype=float)
    eta = float(sub.loss_factor)
    if eta == 0.0:
        return np.ones_like(f)
    cl, ct = Substrate(float(sub.density), float(sub.cl), float(sub.ct), eta).complex_speeds
    k = lossy_rayleigh_wavenumber(f, cl, ct)
    return np.exp(-2.0 * np.abs(k.imag) * float(layout.length))


def insertion_blocking(
    trace: Trace, layout: Layout, study: Study
) -> tuple[np.ndarray, np.ndarray]:
    """Surface blocking due to the array, per frequency, and the plain transmitted fraction.

    ``blocking = clip(1 - T_array / T_bare, 0, 1)``: the insertion effect of the row, the part of
    the surface power that the bare ground over the same path would have let through but the
    array does not (T_bare from :func:`bare_transmission`). For a lossless substrate
    T_bare = 1 and this is 1 - T_array. Where T_bare underflows to 0 nothing can be told apart
    and blocking is 0. A missing (nan) transmitted fraction counts as fully transmitted.

    Returns
    -------
    (blocking, transmitted) : tuple of ndarray
        Both dimensionless, shape of ``trace.frequency``.
    """
    t = np.nan_to_num(np.asarray(trace.fractions["transmitted_surface"], float), nan=1.0)
    t_bare = bare_transmission(trace, layout, study)
    ratio = np.divide(t, t_bare, out=np.ones_like(t), where=t_bare > 0)
    return np.clip(1.0 - ratio, 0.0, 1.0), t


def wanted_fraction(
    trace: Trace, channel: str, layout: Layout | None = None, study: Study | None = None
) -> np.ndarray:
    """Fraction of the incoming power in the wanted channel per frequency.

    ``blocking`` is the array's insertion blocking (:func:`insertion_blocking`) when ``layout``
    and ``study`` are given, else 1 - transmitted surface power.
    """
    if channel == BLOCKING:
        if layout is not None and study is not None:
            return insertion_blocking(trace, layout, study)[0]
        return 1.0 - np.asarray(trace.fractions["transmitted_surface"], dtype=float)
    return np.asarray(trace.fractions[channel], dtype=float)
