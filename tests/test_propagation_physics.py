"""The WKB march fed by the project's dispersion stage, checked against the band solver.

Issue 4 "Checks":

* uniform array: full transmission in a pass band apart from leakage, with the attenuation of
  the band solver's root for the same cell (exponential decay exp(-2 K'' L); e.g. J. D.
  Achenbach, *Wave Propagation in Elastic Solids*, 1973), and full reflection inside a gap
  (no propagating Bloch wave in a band gap: L. Brillouin, *Wave Propagation in Periodic
  Structures*, 1946);
* linear height grading at constant spacing: turning positions move monotonically with
  frequency and sit where the band solver, run independently cell by cell, loses the branch
  (WKB turning point, C. M. Bender and S. A. Orszag, 1978, ch. 10);
* property test over random valid layouts and frequencies (fractions partition the power);
* the eps flag rises when the same height change is packed into fewer cells (physics.md s. 6);
* table round trip (write, read, trace) gives identical fractions.

The band solver (``optgrade.dispersion._direct.solve_bands``) solves the Bloch relation
directly for one cell, independently of the surrogate tables the trace uses.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from optgrade.layout import layout_from_cells, read_table, write_table
from optgrade.propagation import CHANNELS, trace, trace_study

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "studies" / "bench_backward_shear.toml"

pytest.importorskip("optgrade.dispersion._surrogate")
from optgrade.dispersion._direct import Cell, solve_bands  # noqa: E402
from optgrade.dispersion._surrogate import surrogate_for_study  # noqa: E402
from optgrade.study import load_study  # noqa: E402


@pytest.fixture(scope="module")
def study():
    return load_study(BENCH)


@pytest.fixture(scope="module")
def surrogate(study):
    return surrogate_for_study(study)


def _cell(surrogate, study, height, spacing, head_mass=0.0):
    return Cell(surrogate.substrate, surrogate.rod, height, spacing, study.resonator.row_pitch,
                head_mass)


@pytest.mark.slow
def test_uniform_array_transmits_in_pass_band_and_reflects_in_gap(study, surrogate):
    height, spacing, n = 8e-3, 12e-3, 30
    freq = np.linspace(100e3, 200e3, 21)
    bands = solve_bands(_cell(surrogate, study, height, spacing), freq)
    k_low, k_up = bands.branches[0].k, bands.branches[1].k
    lay = layout_from_cells(np.full(n, height), spacing, study.resonator.diameter)
    tr = trace(lay, surrogate, freq)
    np.testing.assert_allclose(tr.total(), 1.0, atol=1e-9)

    # entry branch as the march picks it, from the band solver's roots
    k_band = np.where(np.isfinite(k_low), k_low, k_up)
    is_pass = np.isfinite(k_band)
    is_gap = ~is_pass
    assert is_pass.sum() >= 10 and is_gap.sum() >= 1  # both regimes are exercised
    # inside the gap: everything comes back at the entry
    np.testing.assert_allclose(tr.fractions["reflected_surface"][is_gap], 1.0, atol=1e-12)
    # pass band: nothing turns back except the entry step; what is not transmitted has leaked
    kr = 2 * np.pi * freq / study.substrate.cr
    r0 = ((k_band.real - kr) / (k_band.real + kr)) ** 2
    np.testing.assert_allclose(tr.fractions["reflected_surface"][is_pass], r0[is_pass],
                               rtol=2e-3, atol=1e-6)
    expected = (1 - r0) * np.exp(-2 * k_band.imag * lay.length)
    got = tr.fractions["transmitted_surface"][is_pass]
    # compare attenuation rates: K''_trace = -ln(T / (1 - R0)) / (2 L) against the band solver
    kpp_trace = -np.log(got / (1 - r0[is_pass])) / (2 * lay.length)
    np.testing.assert_allclose(kpp_trace, k_band.imag[is_pass], rtol=0.05, atol=1e-3)
    lossless = k_band.imag[is_pass] * lay.length < 1e-4
    np.testing.assert_allclose(got[lossless], expected[is_pass][lossless], rtol=1e-3)
    leaked = sum(tr.fractions[c] for c in CHANNELS[2:])
    np.testing.assert_allclose(leaked[is_pass], (1 - r0 - expected)[is_pass], atol=0.02)


@pytest.mark.slow
def test_linear_grading_turns_where_each_cell_loses_its_branch(study, surrogate):
    n, spacing = 16, 6e-3  # zone edge cR/(2a) ~ 240 kHz: no Bragg gap in the tested band
    heights = np.linspace(4e-3, 12e-3, n)  # short rods at the entry, as in the study
    freq = np.linspace(120e3, 190e3, 8)
    lay = layout_from_cells(heights, spacing, study.resonator.diameter)
    tr = trace(lay, surrogate, freq)
    assert np.all(tr.branch == 0)
    bands = [solve_bands(_cell(surrogate, study, h, spacing), freq) for h in heights]
    k_cells = np.array([[b.branches[0].k, b.branches[1].k] for b in bands])  # (n, 2, n_freq)
    # where the path ends, from each cell solved on its own: the lower branch from the entry,
    # the other branch from a cell where the followed one has none (a step onto the upper
    # branch once the rods pass their resonance, issue 13 item 3), the end where neither has
    turn = np.full(freq.size, -1)
    for f in range(freq.size):
        br = 0
        for j in range(n):
            if np.isfinite(k_cells[j, br, f]):
                continue
            if np.isfinite(k_cells[j, 1 - br, f]):
                br = 1 - br
                continue
            turn[f] = j
            break
    turned = turn >= 0
    assert turned.sum() >= 3  # the wave does turn inside the row at several frequencies
    np.testing.assert_allclose(tr.turning_position[turned], lay.x[turn[turned]], rtol=1e-12)
    assert np.all(np.isnan(tr.turning_position[~turned]))
    # what turns back must come out reflected or leak on the way (nothing transmitted)
    np.testing.assert_allclose(tr.fractions["transmitted_surface"][turned], 0.0, atol=0)


@pytest.mark.slow
def test_eps_rises_when_the_same_height_change_uses_fewer_cells(study, surrogate):
    freq = np.linspace(100e3, 140e3, 9)  # below every rod resonance of 4..7 mm rods
    eps = {}
    for n in (48, 24, 6):
        lay = layout_from_cells(np.linspace(4e-3, 7e-3, n), 6e-3, study.resonator.diameter)
        tr = trace(lay, surrogate, freq)
        assert np.all(tr.turning_position != tr.turning_position)  # all nan: passes through
        eps[n] = tr.eps_max
    assert np.all(eps[24] > eps[48]) and np.all(eps[6] > eps[24])
    # eps ~ dK per cell ~ 1/n: halving the cells roughly doubles it (within the grading's curvature)
    ratio = eps[24] / eps[48]
    assert np.all((ratio > 1.6) & (ratio < 2.6)), ratio
    # a strong grading (4 -> 11 mm, rod resonance down to ~115 kHz) at 95-104 kHz: the wave
    # slows towards the far end; spread over 64 cells it stays adiabatic, packed into 4 not
    freq = np.linspace(95e3, 104e3, 4)
    flags = {}
    for n in (64, 16, 4):
        lay = layout_from_cells(np.linspace(4e-3, 11e-3, n), 6e-3, study.resonator.diameter)
        tr = trace(lay, surrogate, freq)
        assert np.isnan(tr.turning_position).all()
        flags[n] = tr
    assert np.all(flags[16].eps_max > flags[64].eps_max)
    assert np.all(flags[4].eps_max > flags[16].eps_max)
    assert flags[64].is_adiabatic.all()
    assert not flags[4].is_adiabatic.all()


@settings(
    max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    n=st.integers(2, 24),
    seed=st.integers(0, 2**32 - 1),
    n_freq=st.integers(1, 16),
)
def test_random_valid_layouts_partition_the_power(study, surrogate, n, seed, n_freq):
    rng = np.random.default_rng(seed)
    h_lo, h_hi = study.layout.height
    a_lo, a_hi = study.layout.spacing
    heights = np.round(rng.uniform(h_lo, h_hi, n) / 5e-5) * 5e-5
    lay = layout_from_cells(heights, rng.uniform(a_lo, a_hi, n), study.resonator.diameter)
    freq = np.sort(rng.uniform(*study.goal.band, n_freq))
    tr = trace(lay, surrogate, freq)
    stack = np.array([tr.fractions[c] for c in CHANNELS])
    assert np.isfinite(stack).all()
    assert (stack >= 0).all() and (stack <= 1 + 1e-12).all()
    np.testing.assert_allclose(stack.sum(axis=0), 1.0, rtol=0, atol=1e-9)
    assert np.isfinite(tr.eps_max).all()
    for c in CHANNELS[2:6]:
        a = tr.angle[c][tr.fractions[c] > 0]
        assert np.all(np.isfinite(a) & (np.abs(a) <= 90))
        sign = 1 if c.startswith("forward") else -1
        assert np.all(sign * a >= -1e-9)  # angle sign matches the channel's direction


def test_table_round_trip_gives_identical_fractions(study, surrogate, tmp_path):
    lay = layout_from_cells(np.linspace(4e-3, 12e-3, 25), np.linspace(6e-3, 14e-3, 25),
                            study.resonator.diameter, height_tol=2e-5)
    path = write_table(lay, tmp_path / "t.csv", study_name=study.meta.name, material="al")
    back = read_table(path)
    a, b = trace_study(study, lay, surrogate), trace_study(study, back, surrogate)
    for c in CHANNELS:
        np.testing.assert_array_equal(a.fractions[c], b.fractions[c])
        np.testing.assert_array_equal(a.position[c], b.position[c])
    np.testing.assert_array_equal(a.eps_max, b.eps_max)
    assert a.frequency.size == study.goal.n_frequencies
