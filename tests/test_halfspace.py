"""Checks of optgrade.ground._halfspace against published values and independent limits."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from optgrade.ground import (
    Substrate,
    rayleigh_function,
    rayleigh_speed,
    surface_compliance,
    vertical_wavenumber,
)


def speeds_for_poisson(nu, ct=1000.0):
    """cL from cT and Poisson ratio: cL^2/cT^2 = 2 (1 - nu) / (1 - 2 nu) (standard elasticity)."""
    return ct * np.sqrt(2.0 * (1.0 - nu) / (1.0 - 2.0 * nu)), ct


def test_rayleigh_root_nu_quarter_exact():
    """nu = 0.25: cR/cT = sqrt(2 - 2/sqrt(3)) = 0.919402 (Lord Rayleigh 1885; Achenbach,
    Wave Propagation in Elastic Solids, 1973)."""
    cl, ct = speeds_for_poisson(0.25)
    assert rayleigh_speed(cl, ct) / ct == pytest.approx(np.sqrt(2.0 - 2.0 / np.sqrt(3.0)), abs=1e-6)
    assert rayleigh_speed(cl, ct) / ct == pytest.approx(0.919402, abs=1e-6)


@pytest.mark.parametrize("nu", np.linspace(0.0, 0.499, 21))
def test_viktorov_approximation(nu):
    """Viktorov, Rayleigh and Lamb Waves (1967): cR/cT ~ (0.87 + 1.12 nu)/(1 + nu) within ~0.5 %."""
    cl, ct = speeds_for_poisson(nu)
    approx = (0.87 + 1.12 * nu) / (1.0 + nu)
    assert rayleigh_speed(cl, ct) / ct == pytest.approx(approx, rel=5e-3)


def test_rayleigh_function_zero_at_root_and_sign_change():
    """R(kR) = 0 is the Rayleigh equation (Achenbach 1973); R changes sign across kR."""
    s = Substrate(2700.0, 6320.0, 3130.0)
    w = 2 * np.pi * 1e5
    kr = w / s.cr
    scale = (w / s.ct) ** 4
    assert abs(rayleigh_function(kr, w, s.cl, s.ct)) / scale < 1e-10
    lo, hi = rayleigh_function(np.array([0.99, 1.01]) * kr, w, s.cl, s.ct).real
    assert lo * hi < 0


def test_handbook_aluminium_rayleigh_speed():
    """Aluminium cL 6320, cT 3130 -> cR ~ 2900 m/s (ultrasonic-testing tables, from memory)."""
    assert rayleigh_speed(6320.0, 3130.0) == pytest.approx(2900.0, rel=0.01)


def test_substrate_properties():
    """mu = rho cT^2 and nu from the speeds (standard isotropic elasticity)."""
    s = Substrate(2000.0, np.sqrt(3.0) * 100.0, 100.0)
    assert s.mu == pytest.approx(2e7)
    assert s.poisson == pytest.approx(0.25)
    with pytest.raises(ValueError):
        Substrate(2000.0, 90.0, 100.0)


@pytest.mark.parametrize("nu", [0.0, 0.25, 0.33, 0.45])
def test_static_limit_flamant_boussinesq(nu):
    """G -> (1 - nu)/(mu |xi|) for xi >> kT (Flamant / Boussinesq; K. L. Johnson, Contact
    Mechanics, 1985)."""
    cl, ct = speeds_for_poisson(nu)
    s = Substrate(2500.0, cl, ct)
    w = 2 * np.pi * 50.0
    xi = np.array([1e4, 1e5]) * w / ct
    g = surface_compliance(xi, w, s)
    expected = (1.0 - nu) / (s.mu * xi)
    np.testing.assert_allclose(g.real, expected, rtol=1e-4)
    assert np.all(np.abs(g.imag) < 1e-12 * np.abs(g.real))
    # also for w -> 0 at fixed xi
    g0 = surface_compliance(10.0, 1e-6, s)
    assert g0.real == pytest.approx((1.0 - nu) / (s.mu * 10.0), rel=1e-8)


@pytest.mark.parametrize("eta", [0.0, 0.05])
def test_static_compliance_is_the_large_wavenumber_limit(eta):
    """`Ground.static_compliance_sq` = (1 - nu)/(mu (1 - i eta) |xi|), the limit of G for
    xi >> kT (Flamant / Boussinesq; K. L. Johnson, Contact Mechanics, 1985), lossy too."""
    cl, ct = speeds_for_poisson(0.3)
    s = Substrate(2500.0, cl, ct, eta)
    w = 2 * np.pi * 50.0
    xi2 = (np.array([1e4, 1e5]) * w / ct) ** 2
    gs = s.static_compliance_sq(xi2)
    np.testing.assert_allclose(gs, (1.0 - 0.3) / (s.mu * (1 - 1j * eta) * np.sqrt(xi2)), rtol=1e-12)
    np.testing.assert_allclose(s.compliance_sq(xi2, w), gs, rtol=1e-4)


def test_outgoing_branch_radiates_power():
    """Inside the cone the load radiates: power (w/2)|f|^2 Im G must be >= 0 with exp(-i w t)
    (physics.md section 3); outside (evanescent) G is real for a lossless solid."""
    s = Substrate(1800.0, 400.0, 200.0)
    w = 2 * np.pi * 20.0
    xi = np.linspace(0.01, 0.99, 50) * w / s.ct
    g = surface_compliance(xi, w, s)
    assert np.all(g.imag > 0)
    xi_out = np.linspace(1.01, 5.0, 50) * w / s.ct
    xi_out = xi_out[np.abs(xi_out - w / s.cr) > 1e-3 * w / s.cr]
    assert np.all(surface_compliance(xi_out, w, s).imag == 0)


def test_vertical_wavenumber_branch():
    """alpha = -i sqrt(k^2 - xi^2) inside the cone, sqrt(xi^2 - k^2) outside (physics.md s. 3)."""
    a = vertical_wavenumber(np.array([0.25, 4.0]), 1.0)
    np.testing.assert_allclose(a, [-1j * np.sqrt(0.75), np.sqrt(3.0)])
    # analytic continuation off the axis: derivative from both sides agrees (inside the cone)
    z = 0.5
    h = 1e-6
    d_re = (vertical_wavenumber((z + h) ** 2, 1.0) - vertical_wavenumber((z - h) ** 2, 1.0)) / (
        2 * h
    )
    d_im = (
        vertical_wavenumber((z + 1j * h) ** 2, 1.0) - vertical_wavenumber((z - 1j * h) ** 2, 1.0)
    ) / (2j * h)
    assert d_re == pytest.approx(d_im, rel=1e-6)


def test_loss_factor_lossy_substrate_absorbs():
    """With complex moduli mu (1 - i eta) an evanescent load still absorbs power: Im G > 0."""
    s = Substrate(1800.0, 400.0, 200.0, loss_factor=0.05)
    w = 2 * np.pi * 20.0
    xi = np.linspace(1.5, 5.0, 20) * w / s.ct
    assert np.all(surface_compliance(xi, w, s).imag > 0)


@settings(max_examples=60, deadline=None)
@given(
    nu=st.floats(0.0, 0.49),
    xr=st.floats(0.01, 50.0),
)
def test_no_nan_real_axis(nu, xr):
    """No NaN on the real axis away from the Rayleigh pole (property)."""
    cl, ct = speeds_for_poisson(nu)
    s = Substrate(2000.0, cl, ct)
    w = 100.0
    xi = xr * w / ct
    g = surface_compliance(xi, w, s)
    assert np.isfinite(g)
