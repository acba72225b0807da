"""Checks of the band solver (optgrade.dispersion._direct) against closed forms and independent root
finders."""

import numpy as np
import pytest
from scipy.optimize import brentq, newton

from optgrade.dispersion import Cell, direct_local_modes, solve_bands, solve_points
from optgrade.ground import Substrate, rayleigh_function
from optgrade.resonators import Rod, oscillator_stiffness, rod_resonances

SOIL = Substrate(1800.0, 400.0, 200.0)  # invented soil
ALU = Substrate(2700.0, 6320.0, 3130.0)  # handbook aluminium (from memory, physics.md s. 3)
PIN = Rod(70e9, 2700.0, 1e-3)


def _no_rest(K, idx, deriv=True):
    z = np.zeros(np.shape(K), dtype=complex)
    return z, z


def _homogenised_roots(sub, mass, f0, a, b, freq):
    w = 2 * np.pi * freq
    iz = 1.0 / oscillator_stiffness(w, mass, 2 * np.pi * f0)
    return solve_points(w, iz, np.full(w.shape, a), sub, b, 0.1, "homogenised", _no_rest)


def test_homogenised_bound_branch_closed_form():
    """Homogenised limit with lumped oscillators = the resonant-metasurface relation
    R(K) = -(alpha kT^2/mu) Z/(a b) (Garova, Maradudin & Mayer, PRB 59, 13291, 1999;
    Boechler et al., PRL 111, 036103, 2013; citations from memory), solved independently here
    with scipy's brentq on the real axis; agreement to 1e-8 relative."""
    mass, f0, a, b = 400.0, 40.0, 1.5, 1.5
    freq = np.linspace(5.0, 36.0, 12)
    res = _homogenised_roots(SOIL, mass, f0, a, b, freq)
    k0 = res["k"][0]
    assert np.all(np.isfinite(k0)) and np.all(k0.imag == 0)
    for f, k in zip(freq, k0.real, strict=True):
        w = 2 * np.pi * f
        z = oscillator_stiffness(w, mass, 2 * np.pi * f0)
        kt2, kl2 = (w / SOIL.ct) ** 2, (w / SOIL.cl) ** 2

        def closed(K, w=w, z=z, kt2=kt2, kl2=kl2):
            alpha = np.sqrt(K**2 - kl2)
            return rayleigh_function(K, w, SOIL.cl, SOIL.ct).real + alpha * kt2 * z / (
                SOIL.mu * a * b
            )

        kr = w / SOIL.cr
        ref = brentq(
            lambda K: float(np.real(closed(K))), kr * (1 + 1e-12), np.pi / a, xtol=1e-15, rtol=1e-15
        )
        assert k == pytest.approx(ref, rel=1e-8)


def test_leaky_root_against_full_complex_root():
    """A backward-leaky root of the 3-D lattice (second band, folded harmonic in the shear cone)
    agrees with scipy's secant iteration on the full complex dispersion function
    1/Z - Sigma(K) (lattice summed directly at complex K, no closed-form/rest split, no
    Taylor step); K'' > 0 and the loss is booked backward (physics.md section 5)."""
    from optgrade.dispersion import lattice_sum
    from optgrade.resonators import rod_stiffness

    a, b, h = 8e-3, 4e-3, 12e-3
    freq = np.array([230e3, 250e3])
    lm = direct_local_modes(ALU, PIN, b, h, a, 0.0, freq)
    k = lm.k[0, 0]
    assert np.all(np.isfinite(k)) and np.all(k.imag > 0)
    for f, kk in zip(freq, k, strict=True):
        w = 2 * np.pi * f
        z = rod_stiffness(w, PIN, h)

        def d(K, w=w, z=z):
            return 1.0 / z - lattice_sum(K, w, ALU, a, b, PIN.radius)

        ref = newton(d, kk.real * (1 + 1e-4), tol=1e-12, maxiter=100)
        assert kk.real == pytest.approx(ref.real, rel=1e-9)
        assert kk.imag == pytest.approx(ref.imag, rel=1e-3)
    np.testing.assert_allclose(lm.shares[0, 2:4, 0].sum(axis=0), 1.0, atol=1e-4)
    assert np.all(lm.angle[0, 2, 0] < 0)


def test_lower_branch_leaves_rayleigh_line_and_slows():
    """Below the rod resonance the lower branch starts on the Rayleigh line and slows
    (K/kR grows) towards the resonance (physics.md section 5, expected behaviour)."""
    cell = Cell(ALU, PIN, height=8e-3, spacing=4e-3, row_pitch=3e-3)
    f1 = rod_resonances(8e-3, 1e-3, 70e9, 2700.0)[0]
    freq = np.linspace(0.02, 0.9, 12) * f1
    bands = solve_bands(cell, freq)
    k = bands.branches[0].k
    ratio = k.real / (2 * np.pi * freq / ALU.cr)
    finite = np.isfinite(ratio)
    assert finite[:6].all()
    assert ratio[0] == pytest.approx(1.0, abs=2e-3)
    assert np.all(np.diff(ratio[finite]) > 0)
    assert np.all(k.imag[finite] == 0)  # lossless and bound


def test_gap_at_resonance_and_upper_branch_above():
    """No surface branch just above the rod resonance (hybridisation gap), then a branch that
    emerges from the shear line below the Rayleigh line (physics.md section 5)."""
    cell = Cell(ALU, PIN, height=8e-3, spacing=5e-3, row_pitch=3e-3)
    f1 = rod_resonances(8e-3, 1e-3, 70e9, 2700.0)[0]
    bands = solve_bands(cell, np.array([0.99, 1.01, 1.3, 1.5]) * f1)
    lower, upper = bands.branches
    assert np.isnan(lower.k[1:]).all()
    kr = 2 * np.pi * bands.freq / ALU.cr
    kt = 2 * np.pi * bands.freq / ALU.ct
    assert np.all(upper.k.real[2:] < kr[2:]) and np.all(upper.k.real[2:] > kt[2:] * 0.95)
    assert bands.resonances[0] == pytest.approx(f1)


def test_material_loss_booked_as_absorbed():
    """A lossy rod on a bound branch gives K'' > 0 entirely absorbed; the first-order share
    agrees with the full complex root: K''(lossy) - K''(lossless) over K''(lossy)
    (physics.md section 5, first-order partition)."""
    freq = np.array([80e3, 120e3])
    lossy = Rod(70e9, 2700.0, 1e-3, loss_factor=0.01)
    lm = direct_local_modes(ALU, lossy, 3e-3, 8e-3, 4e-3, 0.0, freq)
    k = lm.k[0, 0]
    assert np.all(k.imag > 0)
    np.testing.assert_allclose(lm.shares[0, 4, 0], 1.0)


def test_leaky_shares_against_complex_roots():
    """On a leaky branch with rod loss, the absorbed share from the first-order split matches
    the full complex roots: (K''_lossy - K''_lossless)/K''_lossy within 5 %."""
    cell_args = (ALU, 4e-3, 12e-3, 8e-3, 0.0)
    freq = np.array([230e3, 245e3])
    sub, b, h, a, m = cell_args
    lossless = direct_local_modes(sub, PIN, b, h, a, m, freq)
    lossy_rod = Rod(70e9, 2700.0, 1e-3, loss_factor=0.003)
    lossy = direct_local_modes(sub, lossy_rod, b, h, a, m, freq)
    k0, k1 = lossless.k[0, 0], lossy.k[0, 0]
    ok = np.isfinite(k0) & np.isfinite(k1) & (k0.imag > 0)
    assert ok.any()
    absorbed_exact = (k1.imag - k0.imag) / k1.imag
    np.testing.assert_allclose(lossy.shares[0, 4, 0][ok], absorbed_exact[ok], atol=0.05)
    # the lossless leaky root radiates backward (folded harmonic), no absorption
    assert np.all(lossless.shares[0, 4, 0][ok] < 1e-4)
    np.testing.assert_allclose(lossless.shares[0, 2:4, 0][ok].sum(axis=0), 1.0, atol=1e-4)


def test_bands_object_and_gaps():
    cell = Cell(ALU, PIN, height=8e-3, spacing=5e-3, row_pitch=3e-3)
    f1 = rod_resonances(8e-3, 1e-3, 70e9, 2700.0)[0]
    freq = np.linspace(0.8, 1.2, 9) * f1
    bands = solve_bands(cell, freq)
    assert len(bands.branches) == 2
    for br in bands.branches:
        assert br.k.shape == freq.shape and br.shares.shape == (5, 9)
    assert any(lo <= f1 * 1.01 <= hi + 1e-9 for lo, hi in bands.gaps) or np.isfinite(
        bands.branches[1].k[5]
    )
    assert any("bending" in w for w in bands.warnings)
    with pytest.raises(ValueError):
        solve_bands(cell, freq, model="nonsense")
