"""Fabrication limits: buckling formulas against independent solutions, and the checker."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
from scipy.special import jv
from search_helpers import clone, fake_study

from optgrade import fabrication
from optgrade.layout import layout_from_cells


def test_greenhill_coefficient_from_bessel_root():
    """Greenhill's coefficient 7.837 = (3/2 j)^2 with j the first zero of J_{-1/3}.

    Source: Timoshenko & Gere, *Theory of Elastic Stability* (1961), sec. 2.11 (heavy column
    solved with Bessel functions of order -1/3); the zero is found here with scipy.
    """
    j = brentq(lambda x: jv(-1.0 / 3.0, x), 1.0, 2.5)
    assert (1.5 * j) ** 2 == pytest.approx(fabrication.GREENHILL, rel=2e-4)


def _critical_height(e, rho, d, m) -> float:
    """Exact buckling height of a clamped-free round rod under self-weight plus tip weight.

    Shooting on the slope equation E I theta'' + (M g + q (L - x)) theta = 0, theta(0) = 0,
    free top theta'(L) = 0 (Timoshenko & Gere 1961, sec. 2.11 and 2.13), integrated with scipy.
    """
    ei = e * np.pi * d**4 / 64
    q = rho * 9.80665 * np.pi * d**2 / 4

    def mismatch(length: float) -> float:
        rhs = lambda x, y: [y[1], -(m * 9.80665 + q * (length - x)) * y[0] / ei]  # noqa: E731
        sol = solve_ivp(rhs, (0, length), [0.0, 1.0], rtol=1e-10, atol=1e-12)
        return sol.y[1, -1]

    lo = 1e-3
    while mismatch(lo * 1.2) > 0:  # theta'(L) > 0 until the first buckling length
        lo *= 1.2
    return brentq(mismatch, lo, lo * 1.2, xtol=1e-12)


@pytest.mark.parametrize("m", [0.0, 0.01, 1.0])
def test_buckling_height_against_shooting(m):
    """Greenhill (m = 0) and Euler cantilever (P = pi^2 E I / 4 L^2) checked by shooting; with
    both loads Dunkerley's rule must be a lower bound within 20 % (Timoshenko & Gere 1961)."""
    s = fake_study(resonator__head_mass=(0.0, 1.0), fabrication__slenderness_max=None)
    e, rho, d = 200e9, 7850.0, 1e-3
    exact = _critical_height(e, rho, d, m)
    got = float(fabrication.max_height(s, np.array([m]))[0])
    if m == 0:
        assert got == pytest.approx(exact, rel=1e-3)
        assert fabrication.greenhill_height(e, rho, d) == pytest.approx(exact, rel=1e-3)
    else:
        assert got <= exact * (1 + 1e-6)
        assert got >= 0.8 * exact
    if m == 1.0:  # tip load dominates: Euler cantilever alone is close to exact
        assert fabrication.tip_mass_height(e, d, m) == pytest.approx(exact, rel=0.02)


def test_check_layout_clean_and_each_limit():
    """A layout inside every limit passes; each broken limit is reported with its field."""
    s = fake_study(resonator__head_mass=(0.0, 0.01))
    h = np.linspace(10e-3, 3e-3, 20).round(4)
    ok = layout_from_cells(h, 3e-3, 1e-3, 0.0, 0.02e-3)
    assert fabrication.check_layout(s, ok) == []

    def fields(layout, study=s):
        return {v.field for v in fabrication.check_layout(study, layout)}

    assert "layout.height" in fields(layout_from_cells(h * 1.5, 3e-3, 1e-3))
    assert "fabrication.min_gap" in fields(layout_from_cells(h, 1.2e-3, 1e-3))
    assert "layout.spacing" in fields(layout_from_cells(h, 5e-3, 1e-3))
    assert "layout.max_length" in fields(layout_from_cells(np.full(40, 5e-3), 3.9e-3, 1e-3))
    assert "layout.count" in fields(layout_from_cells(np.full(5, 5e-3), 3e-3, 1e-3))
    assert "resonator.head_mass" in fields(layout_from_cells(h, 3e-3, 1e-3, 0.02))
    assert "layout.height_step" in fields(layout_from_cells(h + 0.03e-3, 3e-3, 1e-3))
    slim = clone(s, fabrication__slenderness_max=5.0)
    assert "fabrication.slenderness_max" in fields(ok, slim)
    soft = clone(s, resonator__youngs_modulus=1e5, layout__height=(1e-3, 1.0))
    assert "resonator" in fields(ok, soft)  # Greenhill: L_crit = 8.6 mm < 10 mm
    assert all(v.amount > 0 for v in fabrication.check_layout(soft, ok))
