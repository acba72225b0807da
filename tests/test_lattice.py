"""Checks of optgrade.dispersion._lattice: symmetry, truncation convergence, brute-force sums,
energy split."""

import numpy as np
import pytest

from optgrade.dispersion import (
    default_harmonics,
    form_factor_sq,
    harmonic_term,
    lattice_sum,
    radiation_parts,
)
from optgrade.ground import Substrate, surface_compliance

ALU = Substrate(2700.0, 6320.0, 3130.0)  # handbook aluminium speeds (from memory, physics.md)
SOIL = Substrate(1800.0, 400.0, 200.0)  # invented soil

CASES = [
    # substrate, spacing, row pitch, radius, frequencies (Hz)
    (ALU, 5e-3, 3e-3, 0.5e-3, [50e3, 150e3, 250e3]),
    (ALU, 3e-3, 3e-3, 0.5e-3, [100e3, 250e3]),
    (SOIL, 1.5, 1.5, 0.1, [5.0, 30.0, 60.0]),
]


@pytest.mark.parametrize("model", ["lattice", "line"])
@pytest.mark.parametrize("case", range(len(CASES)))
def test_truncation_convergence(case, model):
    """Relative change below 1e-4 when the harmonic count doubles (physics.md section 5)."""
    sub, a, b, r, f = CASES[case]
    w = 2 * np.pi * np.asarray(f)
    K = np.array([0.2, 0.55, 0.97])[:, None] * np.pi / a
    m0 = default_harmonics(a, r, model)
    s1 = lattice_sum(K, w, sub, a, b, r, model, n_harmonics=m0)
    s2 = lattice_sum(K, w, sub, a, b, r, model, n_harmonics=2 * m0)
    assert np.max(np.abs(s2 - s1) / np.abs(s2)) < 1e-4


def test_line_sum_against_brute_force():
    """The 2-D sum with its Hurwitz-zeta static tail equals a brute-force sum of 400 000
    harmonics (no tail) of the plane-strain formula (physics.md section 5)."""
    sub, a, b, r = ALU, 5e-3, 3e-3, 0.5e-3
    w = 2 * np.pi * 150e3
    K = 0.6 * np.pi / a
    m = np.arange(-200_000, 200_001)
    xi = K + 2 * np.pi * m / a
    brute = np.sum(surface_compliance(xi, w, sub) * (np.sin(xi * r) / (xi * r)) ** 2) / (a * b)
    ours = lattice_sum(K, w, sub, a, b, r, "line")
    assert abs(ours - brute) / abs(brute) < 3e-5


@pytest.mark.parametrize("model", ["lattice", "line"])
def test_bloch_symmetry(model):
    """Sigma(K) = Sigma(-K) = Sigma(2 pi/a - K): reciprocity and Bloch periodicity
    (physics.md section 5; holds to the truncation accuracy)."""
    sub, a, b, r = ALU, 5e-3, 3e-3, 0.5e-3
    w = 2 * np.pi * np.array([80e3, 220e3])
    K = np.array([0.13, 0.4, 0.8])[:, None] * np.pi / a
    s = lattice_sum(K, w, sub, a, b, r, model)
    np.testing.assert_allclose(lattice_sum(-K, w, sub, a, b, r, model), s, rtol=1e-12)
    s_fold = lattice_sum(2 * np.pi / a - K, w, sub, a, b, r, model)
    assert np.max(np.abs(s_fold - s) / np.abs(s)) < 1e-4


def test_homogenised_is_single_term():
    """Homogenised limit: only m = n = 0 and S = 1, Sigma = G(K)/(a b) (physics.md section 5)."""
    a, b = 2.0, 1.5
    w = 2 * np.pi * 20.0
    K = np.linspace(0.1, 1.5, 7)
    np.testing.assert_allclose(
        lattice_sum(K, w, SOIL, a, b, 0.1, "homogenised"),
        surface_compliance(K, w, SOIL) / (a * b),
    )


def test_exclude_main_removes_two_terms():
    """Sigma = T(m=0) + T(m=-1) + rest, the split the surrogate tabulates."""
    sub, a, b, r = ALU, 5e-3, 3e-3, 0.5e-3
    w = 2 * np.pi * 200e3
    K = np.array([0.3, 0.9]) * np.pi / a
    full = lattice_sum(K, w, sub, a, b, r)
    rest = lattice_sum(K, w, sub, a, b, r, exclude_main=True)
    main = harmonic_term(K, w, sub, a, b, r, 0) + harmonic_term(K, w, sub, a, b, r, -1)
    np.testing.assert_allclose(rest + main, full, rtol=1e-12)


def test_radiated_power_split_conserves_energy():
    """The shear/compressional split of a radiating harmonic obeys energy conservation: the P
    and S plane-wave fluxes (rho w^3 p |A|^2 / 2 and rho w^3 q |B|^2 / 2 from the free-surface
    potentials, Achenbach 1973 section 5) add up to the input power w Im G |f|^2 / 2. The
    potentials here are derived independently in the test."""
    sub = ALU
    w = 2 * np.pi * 100e3
    kl, kt = w / sub.cl, w / sub.ct
    xi = np.linspace(0.05, 0.98, 25) * kt
    p = np.sqrt(np.clip(kl**2 - xi**2, 0, None))
    q = np.sqrt(kt**2 - xi**2)
    alpha = np.where(xi < kl, -1j * p, np.sqrt(np.clip(xi**2 - kl**2, 0, None)))
    beta = -1j * q
    R = (2 * xi**2 - kt**2) ** 2 - 4 * xi**2 * alpha * beta
    A = -(2 * xi**2 - kt**2) / (sub.mu * R)  # potential of P per unit load
    B = -2j * xi * alpha * A / (2 * xi**2 - kt**2)
    flux_p = 0.5 * sub.density * w**3 * p * np.abs(A) ** 2
    flux_s = 0.5 * sub.density * w**3 * q * np.abs(B) ** 2
    g = surface_compliance(xi, w, sub)
    np.testing.assert_allclose(flux_p + flux_s, 0.5 * w * g.imag, rtol=1e-10)
    # our split, homogenised model (single harmonic, S = 1) at K = xi
    parts = radiation_parts(xi, w, sub, 1.0, 1.0, 1e-3, "homogenised")
    np.testing.assert_allclose(parts[0] + parts[1], g.imag, rtol=1e-10)
    np.testing.assert_allclose(
        parts[0] / (parts[0] + parts[1]), flux_s / (flux_s + flux_p), rtol=1e-9
    )
    assert np.all(parts[2:] == 0)


def test_backward_radiation_booked_backward():
    """m = -1 radiates backward when 2 pi/a - K < kT (physics.md section 5, folded harmonic;
    K beyond the zone edge in the extended zone, as on the lower branch above the Bragg
    frequency)."""
    sub, a, b, r = ALU, 8e-3, 3e-3, 0.5e-3
    w = 2 * np.pi * 200e3
    kt = w / sub.ct
    K = np.array([1.3 * np.pi / a])
    assert 2 * np.pi / a - K[0] < kt and K[0] > kt
    parts = radiation_parts(K, w, sub, a, b, r, "lattice")
    assert parts[0, 0] == 0 and parts[1, 0] == 0
    assert parts[2, 0] > 0
    total_im = lattice_sum(K, w, sub, a, b, r).imag
    assert parts.sum(axis=0)[0] == pytest.approx(total_im[0], rel=1e-9)


def test_form_factor_small_argument():
    """S -> 1 at xi -> 0 for disc and strip (uniform traction of unit resultant)."""
    assert form_factor_sq(np.array([0.0]), 1.0, "lattice")[0] == pytest.approx(1.0)
    assert form_factor_sq(np.array([0.0]), 1.0, "line")[0] == pytest.approx(1.0)
