"""Checks of optgrade.resonators._rod against textbook formulas and independent root finders."""

import numpy as np
import pytest
from scipy.optimize import fsolve

from optgrade.resonators import (
    Rod,
    oscillator_stiffness,
    rod_compliance,
    rod_resonances,
    rod_stiffness,
)

AL = Rod(youngs_modulus=70e9, density=2700.0, diameter=1e-3)


@pytest.mark.parametrize("height", [3e-3, 7e-3, 12e-3])
def test_free_rod_resonances_quarter_wave(height):
    """f_n = (2n - 1) c / (4 L) for a base-driven rod with a free top (thin-rod theory;
    e.g. Blevins, Formulas for Natural Frequency and Mode Shape, 1979)."""
    c = np.sqrt(70e9 / 2700.0)
    f = rod_resonances(height, 1e-3, 70e9, 2700.0, n_modes=3)
    np.testing.assert_allclose(f, (2 * np.arange(1, 4) - 1) * c / (4 * height), rtol=1e-12)
    # and Z has poles there: 1/Z vanishes
    assert abs(rod_compliance(2 * np.pi * f, AL, height)).max() < 1e-12 * abs(
        rod_compliance(2 * np.pi * 0.5 * f[0], AL, height)
    )


@pytest.mark.parametrize("head_mass", [0.05, 1.0, 300.0])
def test_head_mass_resonance_independent_root(head_mass):
    """(kL) tan(kL) = m_rod / M (Blevins 1979, axial bar with tip mass), checked with scipy's
    fsolve started from the single-degree-of-freedom estimate, independently of brentq."""
    L, d, E, rho = 3.0, 0.2, 30e9, 2400.0
    m_rod = rho * np.pi * d**2 / 4 * L
    c = np.sqrt(E / rho)
    f = rod_resonances(L, d, E, rho, head_mass=head_mass, n_modes=2)
    x0 = min(np.sqrt(m_rod / (head_mass + m_rod / 3.0)), 0.99 * np.pi / 2)  # Rayleigh quotient
    ratio = m_rod / head_mass
    x = fsolve(lambda t: t * np.sin(t) - ratio * np.cos(t), x0, xtol=1e-13)[0]
    assert f[0] == pytest.approx(x * c / (2 * np.pi * L), rel=1e-9)
    assert f[1] > f[0]
    rod = Rod(E, rho, d)
    assert abs(rod_compliance(2 * np.pi * f[0], rod, L, head_mass)) < 1e-9 * abs(
        rod_compliance(2 * np.pi * 0.3 * f[0], rod, L, head_mass)
    )


def test_rigid_mass_low_frequency_limit():
    """Z -> (m_rod + M) w^2 for k_r L -> 0 (physics.md section 4; Newton's law)."""
    L, M = 5e-3, 2e-4
    m_rod = 2700.0 * AL.area * L
    w = 2 * np.pi * np.array([10.0, 100.0])
    z = rod_stiffness(w, AL, L, M)
    err = np.abs(z.real / ((m_rod + M) * w**2) - 1.0)
    assert err[0] < 1e-6
    # the correction is second order in k_r L: ten times the frequency, a hundred times the error
    assert err[1] / err[0] == pytest.approx(100.0, rel=0.01)


def test_broadcasting_over_height_and_mass():
    """Vectorised over w x height x head mass by numpy broadcasting."""
    w = 2 * np.pi * np.linspace(1e3, 2e5, 7)
    h = np.array([3e-3, 6e-3])[:, None, None]
    m = np.array([0.0, 1e-4, 1e-3])[None, :, None]
    z = rod_stiffness(w, AL, h, m)
    assert z.shape == (2, 3, 7)
    assert z[1, 2, 3] == rod_stiffness(w[3], AL, 6e-3, 1e-3)


@pytest.mark.parametrize("eta", [0.01, 0.1])
def test_loss_factor_absorbs_energy(eta):
    """Power into the resonator (w/2)|u|^2 Im Z must be >= 0 for eta > 0 with E (1 - i eta)
    under exp(-i w t) (physics.md section 4); the opposite sign would create energy."""
    w = 2 * np.pi * np.linspace(1e3, 1e6, 2000)
    rod = Rod(70e9, 2700.0, 1e-3, loss_factor=eta)
    assert np.all(rod_stiffness(w, rod, 6e-3, 1e-4).imag > 0)
    assert np.all(oscillator_stiffness(w, 1.0, 2 * np.pi * 3e4, eta).imag > 0)
    lossless = Rod(70e9, 2700.0, 1e-3)
    assert np.all(rod_stiffness(w, lossless, 6e-3).imag == 0)


def test_oscillator_formula():
    """Lumped oscillator Z = M w^2 w0^2 / (w0^2 - w^2) (physics.md section 4; mass-spring on a
    moving base), low-frequency limit M w^2."""
    w = np.array([1.0, 5.0, 20.0])
    z = oscillator_stiffness(w, 2.0, 10.0)
    np.testing.assert_allclose(z.real, 2.0 * w**2 * 100.0 / (100.0 - w**2))


def test_rod_single_mode_near_oscillator():
    """Near and below the first resonance a free rod behaves like an oscillator of modal mass
    8 m_rod / pi^2 (from memory: standard modal mass of the quarter-wave rod mode); low-frequency
    check of the sign and magnitude of Z up to 30 % of the resonance."""
    L = 6e-3
    f1 = rod_resonances(L, 1e-3, 70e9, 2700.0)[0]
    m_rod = 2700.0 * AL.area * L
    w = 2 * np.pi * f1 * np.array([0.1, 0.3])
    z_rod = rod_stiffness(w, AL, L).real
    assert np.all(z_rod > 0)
    z_osc = (m_rod - 8 * m_rod / np.pi**2) * w**2 + oscillator_stiffness(
        w, 8 * m_rod / np.pi**2, 2 * np.pi * f1
    ).real
    np.testing.assert_allclose(z_rod, z_osc, rtol=2e-3)


def test_invalid_rod():
    with pytest.raises(ValueError):
        Rod(70e9, 2700.0, -1e-3)
    with pytest.raises(ValueError):
        rod_resonances(-1.0, 1e-3, 70e9, 2700.0)


def test_rod_validity_notes_thin_rod_rule():
    """`Rod.validity_notes`: thin-rod theory is flagged once d > lambda_r / 5, i.e. above
    f = c_r / (5 d) (rule of thumb, common practice, physics.md section 4); the note that
    bending modes are not represented is always there."""
    f_limit = AL.bar_speed / (5.0 * AL.diameter)
    below, above = AL.validity_notes(0.99 * f_limit), AL.validity_notes(1.01 * f_limit)
    assert not any("thin-rod" in s for s in below)
    assert sum("thin-rod" in s for s in above) == 1
    assert all(any("bending" in s for s in notes) for notes in (below, above))
