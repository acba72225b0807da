"""Independent finite-element check of the 2-D line dispersion model (issue 3, "Accuracy").

The reference is a plane-strain Bloch cell assembled with the general-purpose finite-element
library scikit-fem (tests/fem_bloch_cell.py; T. Gustafsson, G. D. McBain, J. Open Source Softw.
5(52), 2369, 2020): substrate strip of one spacing, clamped bottom, Bloch-periodic sides, the
resonator row as an axial bar coupled by uniform traction over its footprint. It shares no
code with optgrade's dispersion engine (only the material numbers).

Bench-scale cell (an invented bench rig): aluminium substrate cL = 6320 m/s, cT = 3130 m/s,
rho = 2700 kg/m^3 and aluminium rods E = 70 GPa, rho_r = 2700 kg/m^3 (handbook values, from
memory), rod diameter 1 mm, row pitch 3 mm, height 6 mm, spacing 4 mm; and the same cell with a
20 mg head mass per rod.

FE resolution used here (convergence and depth study in docs/fem-check.md): P2 triangles, 0.5 mm
at the surface (29.5 elements per shear wavelength at the 212 kHz rod resonance), 3 mm deep
down, four local refinements at the strip edges; strip depth H = 0.10 m = 6.8 shear wavelengths
at 212 kHz, 2.6 at the lowest frequency used (82 kHz), and at least 8.5 decay lengths
1/sqrt(K^2 - kT^2) of the slowest-decaying (shear) part of every surface mode computed.
"""

from __future__ import annotations

import numpy as np
import pytest
from fem_bloch_cell import build_cell, rayleigh_speed_ratio, solve_cell
from scipy.optimize import brentq

# bench-scale cell, SI (handbook aluminium values from memory, see module docstring)
RHO, CL, CT = 2700.0, 6320.0, 3130.0
ROD_E, ROD_RHO, ROD_D = 70e9, 2700.0, 1e-3
SPACING, ROW_PITCH, HEIGHT = 4e-3, 3e-3, 6e-3
HEAD_MASS = 2e-5
MESH = dict(h_surface=SPACING / 8, h_deep=3e-3, n_edge_refinements=4)
DEPTH = 0.10

#: Bloch wavenumbers (fractions of pi/a) on the lower branch, all below the gap
K_ROD = np.pi / SPACING * np.array([0.4, 0.6, 0.7, 0.8, 0.9, 0.95, 1.0])
K_HEAD = np.pi / SPACING * np.array([0.25, 0.3, 0.4, 0.6, 0.8, 0.9, 1.0])

TOL_K = 0.02  # the requirement: 2 % in K


def _cell(head_mass: float, depth: float = DEPTH, **mesh):
    opts = dict(MESH, **mesh)
    return build_cell(density=RHO, cl=CL, ct=CT, spacing=SPACING, depth=depth,
                      rod_modulus=ROD_E, rod_density=ROD_RHO, rod_diameter=ROD_D,
                      rod_height=HEIGHT, row_pitch=ROW_PITCH, head_mass=head_mass, **opts)


@pytest.fixture(scope="module")
def fe_rod():
    """FE lower-branch modes of the rod cell (no head mass)."""
    return solve_cell(_cell(0.0), K_ROD)


@pytest.fixture(scope="module")
def fe_head():
    """FE lower-branch modes of the rod cell with a 20 mg head mass."""
    return solve_cell(_cell(HEAD_MASS), K_HEAD)


def test_rayleigh_ratio_closed_form():
    """The FE helper's Rayleigh root reproduces the exact value at nu = 0.25.

    cR/cT = sqrt(2 - 2/sqrt(3)) = 0.919402 for cL = sqrt(3) cT (Lord Rayleigh 1885;
    J. D. Achenbach, Wave Propagation in Elastic Solids, 1973).
    """
    assert rayleigh_speed_ratio(np.sqrt(3.0), 1.0) == pytest.approx(
        np.sqrt(2.0 - 2.0 / np.sqrt(3.0)), abs=1e-9)
    assert rayleigh_speed_ratio(np.sqrt(3.0), 1.0) == pytest.approx(0.919402, abs=1e-6)


@pytest.mark.slow
@pytest.mark.parametrize("cl_over_ct", [np.sqrt(3.0), CL / CT])
def test_bare_substrate_mode_on_rayleigh_line(cl_over_ct):
    """Without resonators the cell's lowest mode is the Rayleigh wave, w = cR K.

    Reference: Rayleigh equation (Lord Rayleigh 1885; Achenbach 1973): closed form
    cR/cT = sqrt(2 - 2/sqrt(3)) at nu = 0.25, root of the secular equation for aluminium
    (cL/cT = 6320/3130, handbook speeds from memory, cR/cT = 0.93315).
    """
    ct = CT
    cl = cl_over_ct * ct
    if np.isclose(cl_over_ct, np.sqrt(3.0)):
        cr = ct * np.sqrt(2.0 - 2.0 / np.sqrt(3.0))
    else:
        cr = ct * rayleigh_speed_ratio(cl, ct)
    model = build_cell(density=RHO, cl=cl, ct=ct, spacing=SPACING, depth=DEPTH,
                       h_surface=SPACING / 8, h_deep=3e-3)
    k = np.pi / SPACING * np.array([0.3, 0.5, 0.7, 1.0])
    modes = solve_cell(model, k)
    speed = 2.0 * np.pi * modes.lower / k
    np.testing.assert_allclose(speed / cr, 1.0, rtol=2e-4, atol=0.0)
    assert np.all(modes.surface_fraction[:, 0] > 0.95)


@pytest.mark.slow
def test_surface_mode_independent_of_depth(fe_rod):
    """True surface modes do not move when the clamped strip is made twice as deep.

    A box mode of the clamped strip would shift by roughly (H1/H2)^2; a surface mode decays as
    exp(-sqrt(K^2 - kT^2) z) and must not shift beyond 1e-5 (physics of bound modes below the
    shear line, e.g. Achenbach 1973, ch. 5).
    """
    deep = solve_cell(_cell(0.0, depth=2 * DEPTH), K_ROD[[0, 3, 6]])
    np.testing.assert_allclose(deep.lower, fe_rod.lower[[0, 3, 6]], rtol=1e-5)
    assert np.all(fe_rod.surface_fraction[:, 0] > 0.95)
    # every lower-branch point lies below the shear line (bound) and below the rod's
    # quarter-wave resonance c_r / (4 L) (thin-rod theory, physics.md section 4)
    assert np.all(2 * np.pi * fe_rod.lower < CT * K_ROD)
    assert np.all(fe_rod.lower < np.sqrt(ROD_E / ROD_RHO) / (4 * HEIGHT))


@pytest.mark.slow
def test_fe_mesh_converged(fe_rod):
    """Halving the surface element size moves the FE lower branch by less than 1e-5 in f.

    Self-convergence of the reference (measured table in docs/fem-check.md); the 2 % check
    below needs far less, but a reference must be converged well beyond the tolerance.
    """
    fine = solve_cell(_cell(0.0, h_surface=SPACING / 16), K_ROD[[1, 4]])
    np.testing.assert_allclose(fine.lower, fe_rod.lower[[1, 4]], rtol=1e-5)


def _line_root_k(f, head_mass):
    """Bloch wavenumber (1/m) of optgrade's line model at frequency f (Hz), lower branch."""
    from optgrade.dispersion import lattice_sum
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod, rod_compliance

    sub = Substrate(RHO, CL, CT)
    rod = Rod(ROD_E, ROD_RHO, ROD_D)
    w = 2.0 * np.pi * f

    def det(k):
        return np.real(rod_compliance(w, rod, HEIGHT, head_mass)
                       - lattice_sum(k, w, sub, SPACING, ROW_PITCH, rod.radius, model="line"))

    return brentq(det, w / sub.cr * (1 + 1e-9), np.pi / SPACING, xtol=1e-10)


def _line_root_f(k, head_mass, f_guess):
    """Frequency (Hz) of optgrade's line model at Bloch wavenumber k (1/m), lower branch."""
    from optgrade.dispersion import lattice_sum
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod, rod_compliance

    sub = Substrate(RHO, CL, CT)
    rod = Rod(ROD_E, ROD_RHO, ROD_D)

    def det(w):
        return np.real(rod_compliance(w, rod, HEIGHT, head_mass)
                       - lattice_sum(k, w, sub, SPACING, ROW_PITCH, rod.radius, model="line"))

    w0 = 2 * np.pi * f_guess
    return brentq(det, 0.8 * w0, min(1.2 * w0, sub.cr * k * (1 - 1e-9)), xtol=1e-6) / (2 * np.pi)


@pytest.mark.slow
@pytest.mark.parametrize("case", ["rod", "head_mass"])
def test_line_model_lattice_sum_matches_fe(case, fe_rod, fe_head):
    """optgrade's line model D = 1/Z - Sigma_line has its lower root at the FE (K, f) points.

    Issue 3 requirement: agreement within 2 % in K at >= 5 frequencies below the gap. The root
    K_line at each FE frequency (points below the zone edge) and the frequency f_line at each
    FE wavenumber (all points, the zone edge included) are found from `optgrade.dispersion._lattice
    .lattice_sum(model="line")` and `optgrade.resonators._rod.rod_compliance`. The points are
    chosen where the branch is far from the Rayleigh line, so the check discriminates.
    """
    modes, head = (fe_rod, 0.0) if case == "rod" else (fe_head, HEAD_MASS)
    k_fe, f_fe = modes.bloch_k, modes.lower
    below_edge = k_fe < np.pi / SPACING * (1 - 1e-9)
    k_line = np.array([_line_root_k(f, head) for f in f_fe[below_edge]])
    rel_k = np.abs(k_line / k_fe[below_edge] - 1.0)
    assert below_edge.sum() >= 5
    assert np.all(rel_k < TOL_K), rel_k
    f_line = np.array([_line_root_f(k, head, f) for k, f in zip(k_fe, f_fe, strict=True)])
    np.testing.assert_allclose(f_line, f_fe, rtol=1e-4)
    # non-trivial: at least three points sit more than 10 % off the Rayleigh line in K
    cr = rayleigh_speed_ratio(CL, CT) * CT
    assert np.sum(k_fe * cr / (2 * np.pi * f_fe) - 1.0 > 0.10) >= 3


@pytest.mark.slow
@pytest.mark.parametrize("case", ["rod", "head_mass"])
def test_solve_bands_line_lower_branch_matches_fe(case, fe_rod, fe_head):
    """`optgrade.dispersion.solve_bands(model="line")`: lower bound branch through the FE points.

    Issue 3 requirement, as the user sees it: at each FE frequency below the zone edge (>= 5
    per case, all below the gap) the band solver's branch 0 is bound (K'' = 0) and its K agrees
    with the FE wavenumber within 2 %. Reference: the scikit-fem cell (module docstring).
    """
    from optgrade.dispersion import Cell, solve_bands
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    modes, head = (fe_rod, 0.0) if case == "rod" else (fe_head, HEAD_MASS)
    below_edge = modes.bloch_k < np.pi / SPACING * (1 - 1e-9)
    k_fe, f_fe = modes.bloch_k[below_edge], modes.lower[below_edge]
    cell = Cell(Substrate(RHO, CL, CT), Rod(ROD_E, ROD_RHO, ROD_D), HEIGHT, SPACING,
                ROW_PITCH, head)
    bands = solve_bands(cell, f_fe, model="line")
    k_line = bands.branches[0].k
    assert k_fe.size >= 5
    assert np.all(np.isfinite(k_line)), k_line
    np.testing.assert_array_equal(np.imag(k_line), 0.0)
    rel_k = np.abs(np.real(k_line) / k_fe - 1.0)
    assert np.all(rel_k < TOL_K), rel_k


@pytest.mark.slow
def test_solve_bands_line_upper_branch_matches_fe(fe_rod):
    """Above the gap: the FE's second bound mode lies on a bound root of the line model.

    Beyond the issue's requirement (which is below the gap): between the rod resonance and the
    shear line, the upper branch (physics.md section 5, "a branch re-emerges from the shear
    line") of `solve_bands(model="line")` must pass through the FE points within 2 % in K.
    The engine may label the root branch 0 or 1 (its labels follow the Rayleigh pole); the
    nearest finite bound root is compared. Reference: the scikit-fem cell.
    """
    from optgrade.dispersion import Cell, solve_bands
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    upper = fe_rod.frequency[:, 1]
    use = np.isfinite(upper) & (fe_rod.bloch_k < np.pi / SPACING * (1 - 1e-9))
    k_fe, f_fe = fe_rod.bloch_k[use], upper[use]
    assert k_fe.size >= 5
    assert np.all(f_fe > 212e3) and np.all(2 * np.pi * f_fe < CT * k_fe)  # above f_rod, bound
    assert np.all(fe_rod.surface_fraction[use, 1] > 0.8)
    cell = Cell(Substrate(RHO, CL, CT), Rod(ROD_E, ROD_RHO, ROD_D), HEIGHT, SPACING,
                ROW_PITCH, 0.0)
    order = np.argsort(f_fe)
    bands = solve_bands(cell, f_fe[order], model="line")
    roots = np.stack([br.k for br in bands.branches])[:, np.argsort(order)]
    rel = np.abs(np.real(roots) / k_fe - 1.0)
    best = np.nanmin(np.where(np.imag(roots) == 0, rel, np.nan), axis=0)
    assert np.all(best < TOL_K), best


@pytest.mark.slow
@pytest.mark.parametrize("case", ["rod", "head_mass"])
def test_surrogate_line_lower_branch_matches_fe(case, fe_rod, fe_head, tmp_path):
    """`optgrade.dispersion.Surrogate(model="line").local_modes`: branch 0 through the FE points.

    The fast path the search and propagation stages use, checked against the same FE
    reference: bound and within 2 % in K at every FE frequency below the zone edge (>= 5).
    Tables are built in a temporary cache directory. Reference: the scikit-fem cell.
    """
    from optgrade.dispersion import Surrogate
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    modes, head = (fe_rod, 0.0) if case == "rod" else (fe_head, HEAD_MASS)
    below_edge = modes.bloch_k < np.pi / SPACING * (1 - 1e-9)
    k_fe, f_fe = modes.bloch_k[below_edge], modes.lower[below_edge]
    sur = Surrogate(Substrate(RHO, CL, CT), Rod(ROD_E, ROD_RHO, ROD_D), ROW_PITCH,
                    (0.75 * SPACING, 1.25 * SPACING), (60e3, 400e3), model="line",
                    cache_dir=tmp_path)
    k_sur = sur.local_modes(HEIGHT, SPACING, head, f_fe).k[0, 0]
    assert k_fe.size >= 5
    assert np.all(np.isfinite(k_sur)), k_sur
    np.testing.assert_array_equal(np.imag(k_sur), 0.0)
    rel_k = np.abs(np.real(k_sur) / k_fe - 1.0)
    assert np.all(rel_k < TOL_K), rel_k


@pytest.mark.slow
def test_solve_bands_line_wide_footprint_matches_fe():
    """A wide footprint (strip 2.5 mm in a 3 mm cell), where the strip factor matters most.

    Invented cell: aluminium as above, rod d = 2.5 mm, L = 4 mm, a = b = 3 mm. `solve_bands(
    model="line")` branch 0 must be bound and within 2 % in K of the FE at 7 frequencies below
    the gap. Reference: the scikit-fem cell. (Measured: 2.3e-4 in K at worst, see
    docs/fem-check.md.)
    """
    from optgrade.dispersion import Cell, solve_bands
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    d, height, a, b = 2.5e-3, 4e-3, 3e-3, 3e-3
    model = build_cell(density=RHO, cl=CL, ct=CT, spacing=a, depth=DEPTH,
                       h_surface=a / 8, h_deep=3e-3, n_edge_refinements=4,
                       rod_modulus=ROD_E, rod_density=ROD_RHO, rod_diameter=d,
                       rod_height=height, row_pitch=b)
    k_fe = np.pi / a * np.array([0.3, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95])
    modes = solve_cell(model, k_fe)
    f_fe = modes.lower
    assert np.all(modes.surface_fraction[:, 0] > 0.95)
    cell = Cell(Substrate(RHO, CL, CT), Rod(ROD_E, ROD_RHO, d), height, a, b, 0.0)
    k_line = solve_bands(cell, f_fe, model="line").branches[0].k
    assert np.all(np.isfinite(k_line)), k_line
    np.testing.assert_array_equal(np.imag(k_line), 0.0)
    rel_k = np.abs(np.real(k_line) / k_fe - 1.0)
    assert np.all(rel_k < TOL_K), rel_k
    # non-trivial: the branch is far from the Rayleigh line at most points
    cr = rayleigh_speed_ratio(CL, CT) * CT
    assert np.sum(k_fe * cr / (2 * np.pi * f_fe) - 1.0 > 0.10) >= 5
