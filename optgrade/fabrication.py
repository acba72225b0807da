"""Fabrication and safety limits of a layout.

Limits (study fields in brackets):

- height range and machining step [layout.height, layout.height_step];
- minimum clear gap between neighbours, spacing - diameter >= min_gap [fabrication.min_gap];
- spacing range [layout.spacing]; maximum array length [layout.max_length], the row length being
  the sum of the cell lengths x[-1] + spacing[-1];
- resonator count [layout.count]; head-mass range [resonator.head_mass];
- slenderness height / diameter <= slenderness_max [fabrication.slenderness_max];
- self-weight buckling of a free-standing post (Greenhill):
  L_crit = (7.837 E I / (rho g A))^(1/3)  (A. G. Greenhill, Proc. Cambridge Phil. Soc. 4, 1881;
  S. P. Timoshenko & J. M. Gere, *Theory of Elastic Stability*, 2nd ed. 1961, sec. 2.11, the
  critical load q L^3 = 7.837 E I; coefficient from memory);
- tip-mass buckling of a cantilever carrying its head mass M: Euler's fixed-free column,
  P_cr = pi^2 E I / (4 L^2) >= M g (Timoshenko & Gere 1961, sec. 2.1);
- both loads together, Dunkerley's lower bound: M g / P_cr + (L / L_crit)^3 <= 1 (Timoshenko &
  Gere 1961, sec. 2.13, Dunkerley's rule for combined axial loads; from memory).

No safety factor is applied to the buckling limits: they are physical limits, not design
allowances. Site-scale posts must be checked by a qualified engineer against local codes.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

GRAVITY = 9.80665  # m/s^2, standard gravity (CGPM 1901)
GREENHILL = 7.837  # dimensionless, q L^3 / (E I) at self-weight buckling (Timoshenko & Gere)
_RTOL = 1e-9


@dataclass(frozen=True)
class Violation:
    """One broken limit.

    ``field`` is the study field that sets the limit, ``index`` the resonator (None for the
    whole row), ``value`` and ``limit`` in SI, ``amount`` the relative excess (> 0).
    """

    field: str
    reason: str
    index: int | None
    value: float
    limit: float
    amount: float

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def second_moment(diameter: np.ndarray | float) -> np.ndarray:
    """Second moment of area of a solid round rod, I = pi d^4 / 64 (m^4)."""
    d = np.asarray(diameter, dtype=float)
    return np.pi * d**4 / 64.0


def greenhill_height(
    youngs_modulus: float, density: float, diameter: np.ndarray | float
) -> np.ndarray:
    """Self-weight buckling height of a free-standing round post (m).

    L_crit = (7.837 E I / (rho g A))^(1/3) with I / A = d^2 / 16 (Greenhill 1881; Timoshenko &
    Gere 1961, sec. 2.11).
    """
    d = np.asarray(diameter, dtype=float)
    return (GREENHILL * youngs_modulus * d**2 / 16.0 / (density * GRAVITY)) ** (1.0 / 3.0)


def tip_mass_height(youngs_modulus: float, diameter: np.ndarray | float, head_mass) -> np.ndarray:
    """Height at which a cantilever buckles under the weight of its head mass (m).

    Euler fixed-free column P_cr = pi^2 E I / (4 L^2) set equal to M g (Timoshenko & Gere 1961,
    sec. 2.1); infinite for M = 0.
    """
    m = np.asarray(head_mass, dtype=float)
    ei = youngs_modulus * second_moment(diameter)
    with np.errstate(divide="ignore"):
        p_unit = np.pi**2 * ei / (4.0 * np.maximum(m, 1e-300) * GRAVITY)
        return np.where(m > 0, np.sqrt(p_unit), np.inf)


def max_height(study: Study, head_mass: ArrayLike) -> np.ndarray:
    """Largest height allowed by slenderness and combined buckling for each head mass (m)."""
    m = np.atleast_1d(np.asarray(head_mass, dtype=float))
    d = study.resonator.diameter
    slender = study.fabrication.slenderness_max * d if study.fabrication.slenderness_max else np.inf
    e = study.resonator.youngs_modulus
    lc = greenhill_height(e, study.resonator.density, d)
    lt = tip_mass_height(e, d, m)
    hi = np.minimum(lc, lt) * np.ones_like(m)
    lo = np.zeros_like(m)
    for _ in range(80):  # bisection on a monotone function, vectorised over head masses
        mid = 0.5 * (lo + hi)
        is_ok = (mid / lc) ** 3 + (mid / lt) ** 2 <= 1.0
        lo = np.where(is_ok, mid, lo)
        hi = np.where(is_ok, hi, mid)
    return np.minimum(lo, slender)


def _cells(x: np.ndarray) -> np.ndarray:
    if x.size < 2:
        return np.zeros_like(x)
    gaps = np.diff(x)
    return np.concatenate([gaps, gaps[-1:]])


def check_layout(study: Study, layout: Layout) -> list[Violation]:
    """Every fabrication and safety limit of ``study`` checked on ``layout``.

    Returns
    -------
    list of Violation, empty when the layout can be made.
    """
    out: list[Violation] = []

    def per_item(field: str, reason: str, values, limit, is_bad, scale) -> None:
        values = np.broadcast_to(np.asarray(values, dtype=float), is_bad.shape)
        limit = np.broadcast_to(np.asarray(limit, dtype=float), is_bad.shape)
        scale = np.broadcast_to(np.abs(np.asarray(scale, dtype=float)), is_bad.shape)
        for j in np.flatnonzero(is_bad):
            amount = abs(values[j] - limit[j]) / max(scale[j], 1e-300)
            out.append(Violation(field, reason, int(j), float(values[j]), float(limit[j]), amount))

    x = np.asarray(layout.x, dtype=float)
    h = np.asarray(layout.height, dtype=float)
    d = np.broadcast_to(np.asarray(layout.diameter, dtype=float), h.shape)
    m = np.broadcast_to(np.asarray(layout.head_mass, dtype=float), h.shape)
    n = h.size
    n_lo, n_hi = study.layout.count
    if not n_lo <= n <= n_hi:
        lim = n_lo if n < n_lo else n_hi
        out.append(Violation("layout.count", "resonator count out of range", None, n, lim,
                             abs(n - lim) / max(lim, 1)))
    if n == 0:
        return out
    if x[0] != 0.0 or (n > 1 and np.any(np.diff(x) <= 0)):
        out.append(Violation("layout", "positions must start at 0 and increase", None,
                             float(x[0]), 0.0, 1.0))

    h_lo, h_hi = study.layout.height
    tol = _RTOL * h_hi
    per_item("layout.height", "height below range", h, h_lo, h < h_lo - tol, h_lo)
    per_item("layout.height", "height above range", h, h_hi, h > h_hi + tol, h_hi)
    step = study.layout.height_step
    if step and step > 0:
        off = np.abs(h / step - np.round(h / step))
        per_item("layout.height_step", "height not a multiple of the machining step", h,
                 np.round(h / step) * step, off > 1e-6, step)

    cells = _cells(x)
    if n > 1:
        gaps = np.diff(x)
        clear = gaps - 0.5 * (d[:-1] + d[1:])
        g = study.fabrication.min_gap
        per_item("fabrication.min_gap", "clear gap to the next resonator below minimum", clear, g,
                 clear < g - _RTOL * max(g, gaps.max()), max(g, d.max()))
        s_lo, s_hi = study.layout.spacing
        per_item("layout.spacing", "spacing below range", gaps, s_lo,
                 gaps < s_lo * (1 - _RTOL), s_lo)
        per_item("layout.spacing", "spacing above range", gaps, s_hi,
                 gaps > s_hi * (1 + _RTOL), s_hi)
    length = float(x[-1] + cells[-1])
    max_len = study.layout.max_length
    if max_len is not None and np.isfinite(max_len) and length > max_len * (1 + _RTOL):
        out.append(Violation("layout.max_length", "array longer than allowed", None, length,
                             max_len, (length - max_len) / max_len))

    m_lo, m_hi = study.resonator.head_mass
    mt = _RTOL * max(m_hi, 1e-12)
    m_scale = max(m_hi, 1e-12)
    per_item("resonator.head_mass", "head mass below range", m, m_lo, m < m_lo - mt, m_scale)
    per_item("resonator.head_mass", "head mass above range", m, m_hi, m > m_hi + mt, m_scale)

    smax = study.fabrication.slenderness_max
    if smax:
        ratio = h / d
        per_item("fabrication.slenderness_max", "height / diameter above maximum", ratio, smax,
                 ratio > smax * (1 + _RTOL), smax)

    e, rho = study.resonator.youngs_modulus, study.resonator.density
    lc = greenhill_height(e, rho, d)
    per_item("resonator", "taller than the self-weight buckling height (Greenhill)", h, lc,
             h > lc * (1 + _RTOL), lc)
    lt = tip_mass_height(e, d, m)
    per_item("resonator.head_mass", "head mass buckles the rod (Euler cantilever)", h, lt,
             h > lt * (1 + _RTOL), np.where(np.isfinite(lt), lt, 1.0))
    combined = (h / lc) ** 3 + (h / lt) ** 2
    per_item("resonator.head_mass", "rod weight and head mass together buckle the rod (Dunkerley)",
             combined, 1.0, combined > 1.0 + 1e-6, 1.0)
    return out


def constraint_values(violations: list[Violation]) -> list[float]:
    """Optuna constraint vector: one entry, the summed relative excess (feasible when <= 0)."""
    return [float(sum(v.amount for v in violations)) if violations else 0.0]
