"""WKB march along a graded row (optgrade.propagation._wkb), physics.md section 6.

Two groups of checks:

* The march fed with hand-built local modes (toy dispersion with a known answer), so that the
  bookkeeping is checked against closed forms independent of the dispersion stage:
  - constant attenuation K'': transmitted power exp(-2 K'' L) (exponential decay of power for a
    uniform attenuation constant; any wave text, e.g. J. D. Achenbach, *Wave Propagation in
    Elastic Solids*, 1973, attenuation of harmonic waves);
  - a turning point returns all remaining power (total reflection at a WKB turning point: C. M.
    Bender and S. A. Orszag, *Advanced Mathematical Methods for Scientists and Engineers*,
    1978, ch. 10, connection formulas);
  - the entry step reflects ((K1 - kR) / (K1 + kR))^2 (normal-incidence power reflection at an
    impedance step, e.g. L. E. Kinsler et al., *Fundamentals of Acoustics*, from memory; the
    impedance ~ wavenumber identification is our modelling choice, documented in the module).
* The march fed with the project's dispersion stage (surrogate / band solver): see
  tests/test_propagation_physics.py.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from optgrade.layout import layout_from_cells
from optgrade.propagation import CHANNELS, march

CR = 2900.0  # m/s, an aluminium-like Rayleigh speed (physics.md section 3, from memory)


def _modes(k_lower, k_upper=None, shares=None, angle=None):
    """LocalModes-like object from (n_cells, n_freq) arrays of the two branches."""
    k_lower = np.asarray(k_lower, dtype=complex)
    k_upper = np.full_like(k_lower, np.nan) if k_upper is None else np.asarray(k_upper, complex)
    n, f = k_lower.shape
    if shares is None:
        shares = np.zeros((2, 5, n, f))
        shares[:, 0] = 1.0  # all leakage to forward shear
    if angle is None:
        angle = np.zeros((2, 4, n, f))
        angle[:, 0] = np.radians(30.0)
        angle[:, 1] = np.radians(20.0)
        angle[:, 2] = np.radians(-40.0)
        angle[:, 3] = np.radians(-25.0)
    return SimpleNamespace(k=np.stack([k_lower, k_upper]), shares=shares, angle=angle)


def test_constant_attenuation_transmits_exp_minus_2_kpp_L():
    freq = np.linspace(10e3, 100e3, 7)
    lay = layout_from_cells(np.full(40, 5e-3), np.linspace(3e-3, 4e-3, 40), 1e-3)
    kr = 2 * np.pi * freq / CR
    kpp = 0.8  # 1/m
    k = np.broadcast_to(kr + 1j * kpp, (40, freq.size))  # K' = kR: no entry step
    shares = np.zeros((2, 5, 40, freq.size))
    shares[:, 0] = 0.6
    shares[:, 4] = 0.4
    tr = march(_modes(k, shares=shares), lay.x, lay.spacing, freq, CR)
    expected = np.exp(-2 * kpp * lay.length)
    np.testing.assert_allclose(tr.fractions["transmitted_surface"], expected, rtol=1e-13)
    np.testing.assert_allclose(tr.fractions["forward_shear"], 0.6 * (1 - expected), rtol=1e-12)
    np.testing.assert_allclose(tr.fractions["absorbed"], 0.4 * (1 - expected), rtol=1e-12)
    np.testing.assert_allclose(tr.fractions["reflected_surface"], 0.0, atol=1e-15)
    np.testing.assert_allclose(tr.total(), 1.0, atol=1e-12)
    np.testing.assert_allclose(tr.angle["forward_shear"], 30.0, rtol=1e-12)
    # power-weighted position of the leak: independent loop over cells
    p, num, den = 1.0, 0.0, 0.0
    for xj, aj in zip(lay.x, lay.spacing, strict=True):
        lost = p * (1 - np.exp(-2 * kpp * aj))
        num += lost * (xj + aj / 2)
        den += lost
        p -= lost
    np.testing.assert_allclose(tr.position["forward_shear"], num / den, rtol=1e-12)
    np.testing.assert_allclose(tr.phase, kr * lay.length, rtol=1e-12)
    assert tr.is_adiabatic.all() and np.all(tr.branch == 0)


def _toy_slowing(x, freq, f0, kpp):
    """Toy lower branch K = kR / sqrt(1 - (f / f0(x))^2) + i K'', no root where f >= f0(x)."""
    ratio = freq[None, :] / f0[:, None]
    kr = 2 * np.pi * freq[None, :] / CR
    with np.errstate(invalid="ignore", divide="ignore"):
        k = kr / np.sqrt(1 - ratio**2) + 1j * kpp
    return np.where(ratio < 1, k, np.nan + 0j)


def test_turning_point_returns_power_and_books_back_channels():
    n = 50
    lay = layout_from_cells(np.full(n, 5e-3), 2e-3, 1e-3)
    f0 = np.linspace(200e3, 100e3, n)  # local cut-off falls along the row
    freq = np.linspace(60e3, 180e3, 25)
    kpp = 0.5
    k = _toy_slowing(lay.x, freq, f0, kpp)
    tr = march(_modes(k), lay.x, lay.spacing, freq, CR)
    np.testing.assert_allclose(tr.total(), 1.0, atol=1e-12)

    j_turn = np.argmax(f0[:, None] <= freq[None, :], axis=0)
    is_turned = (f0[:, None] <= freq[None, :]).any(axis=0)
    x_t = np.where(is_turned, lay.x[j_turn], np.nan)
    np.testing.assert_array_equal(np.isnan(tr.turning_position), ~is_turned)
    np.testing.assert_allclose(tr.turning_position[is_turned], x_t[is_turned], rtol=1e-12)

    kr = 2 * np.pi * freq / CR
    k1 = k[0].real
    r0 = ((k1 - kr) / (k1 + kr)) ** 2
    one_way = np.exp(-2 * kpp * x_t)
    # forward leakage -> forward_shear, return leakage of the same harmonic -> backward_shear
    t = tr.fractions
    np.testing.assert_allclose(t["reflected_surface"][is_turned],
                               (r0 + (1 - r0) * one_way**2)[is_turned], rtol=1e-12)
    np.testing.assert_allclose(t["forward_shear"][is_turned],
                               ((1 - r0) * (1 - one_way))[is_turned], rtol=1e-12)
    np.testing.assert_allclose(t["backward_shear"][is_turned],
                               ((1 - r0) * one_way * (1 - one_way))[is_turned], rtol=1e-12)
    np.testing.assert_allclose(tr.angle["backward_shear"][is_turned], -30.0, rtol=1e-12)
    np.testing.assert_allclose(t["transmitted_surface"][is_turned], 0.0, atol=0)
    full = np.exp(-2 * kpp * lay.length)
    np.testing.assert_allclose(t["transmitted_surface"][~is_turned],
                               ((1 - r0) * full)[~is_turned], rtol=1e-12)
    # turning positions move towards the entry as the frequency rises
    assert np.all(np.diff(tr.turning_position[is_turned]) <= 0)
    # the slowing wave's K changes fastest just before the cut-off: eps largest near it
    assert tr.eps_max[is_turned].max() > tr.eps_max[~is_turned].max()


def test_branch_choice_and_entry_gap():
    n, freq = 10, np.array([1e3, 2e3, 3e3])
    lay = layout_from_cells(np.full(n, 1e-2), 1e-2, 1e-3)
    kr = 2 * np.pi * freq / CR
    lower = np.broadcast_to(1.5 * kr + 0.0j, (n, 3)).copy()
    upper = np.broadcast_to(0.9 * kr + 0.1j, (n, 3)).copy()
    lower[:, 1] = np.nan  # f2: lower branch absent -> follow upper
    lower[:, 2] = np.nan
    upper[:, 2] = np.nan  # f3: no branch at the entry: reflected at x = 0
    tr = march(_modes(lower, upper), lay.x, lay.spacing, freq, CR)
    assert list(tr.branch) == [0, 1, -1]
    np.testing.assert_allclose(tr.fractions["transmitted_surface"][0], 1 - (0.5 / 2.5) ** 2)
    np.testing.assert_allclose(tr.entry_reflection[1], (0.1 / 1.9) ** 2, rtol=1e-12)
    assert tr.fractions["reflected_surface"][2] == 1.0
    assert tr.position["reflected_surface"][2] == 0.0
    np.testing.assert_allclose(tr.total(), 1.0, atol=1e-12)


def test_eps_rises_when_the_same_change_is_packed_into_fewer_cells():
    """eps_j = |dK| / (a K^2) (physics.md s. 6): a steeper grading gives a larger eps."""
    freq = np.array([50e3])
    kr = 2 * np.pi * freq / CR
    eps = []
    for n in (80, 40, 20, 10):
        lay = layout_from_cells(np.full(n, 5e-3), 2e-3, 1e-3)
        k = (kr * np.linspace(1.0, 2.0, n))[:, None] + 0.0j  # same K change over n cells
        eps.append(march(_modes(k), lay.x, lay.spacing, freq, CR).eps_max[0])
        # closed form: max_j (kr / (n - 1)) / (a (kr s_j)^2) at s_j = 1 (first cell)
        np.testing.assert_allclose(eps[-1], 1 / ((n - 1) * 2e-3 * kr[0]), rtol=1e-12)
    assert all(e1 < e2 for e1, e2 in zip(eps, eps[1:], strict=False))


@settings(max_examples=150, deadline=None)
@given(
    n=st.integers(2, 40),
    n_freq=st.integers(1, 12),
    seed=st.integers(0, 2**32 - 1),
    gap_rate=st.floats(0, 0.6),
    kpp_scale=st.sampled_from([0.0, 1e-3, 1.0, 1e3, 1e8]),
)
def test_fractions_are_a_partition_for_any_local_modes(n, n_freq, seed, gap_rate, kpp_scale):
    """Invariant (physics.md s. 6): fractions in [0, 1], summing to 1 within 1e-9, no NaN."""
    rng = np.random.default_rng(seed)
    spacing = rng.uniform(1e-4, 1.0, n)
    lay = layout_from_cells(rng.uniform(1e-3, 1, n), spacing, 1e-3)
    freq = np.sort(rng.uniform(1.0, 1e6, n_freq))
    k = rng.uniform(0.1, 10, (2, n, n_freq)) * (2 * np.pi * freq / CR) + 1j * kpp_scale * (
        rng.uniform(-0.3, 1, (2, n, n_freq))  # negatives: backward-wave roots
    )
    k[rng.random((2, n, n_freq)) < gap_rate] = np.nan
    shares = rng.uniform(0, 1, (2, 5, n, n_freq))
    shares[rng.random(shares.shape) < 0.3] = 0.0
    shares[rng.random(shares.shape) < 0.05] = np.nan
    angle = rng.uniform(-np.pi / 2, np.pi / 2, (2, 4, n, n_freq))
    angle[rng.random(angle.shape) < 0.2] = np.nan
    tr = march(SimpleNamespace(k=k, shares=shares, angle=angle), lay.x, lay.spacing, freq, CR)
    stack = np.array([tr.fractions[c] for c in CHANNELS])
    assert np.isfinite(stack).all()
    assert (stack >= 0).all() and (stack <= 1 + 1e-12).all()
    np.testing.assert_allclose(stack.sum(axis=0), 1.0, rtol=0, atol=1e-9)
    assert np.isfinite(tr.eps_max).all()
    for c in CHANNELS:
        has_power = tr.fractions[c] > 0
        assert np.isfinite(tr.position[c][has_power]).all()
        assert np.isnan(tr.position[c][~has_power]).all()
        pos = tr.position[c][has_power]
        assert (pos >= 0).all() and (pos <= lay.length * (1 + 1e-12)).all()
    for c in ("forward_shear", "forward_compressional"):
        a = tr.angle[c]
        assert np.all(np.isnan(a) | (np.abs(a) <= 90 + 1e-9))


def test_shape_mismatch_is_refused():
    lay = layout_from_cells(np.full(5, 1e-2), 1e-2, 1e-3)
    k = np.ones((5, 3), complex)
    with pytest.raises(ValueError, match="modes.k has shape"):
        march(_modes(k), lay.x, lay.spacing, np.ones(4), CR)


def test_backward_wave_root_decays_at_abs_kpp():
    """A root K' - i|K''| (backward wave: phase against energy flow) decays like its
    +x power-carrying partner 2 pi/a - K' + i|K''| (symmetry of the Bloch relation,
    physics.md s. 5): the power decay uses |K''|."""
    freq = np.array([30e3, 60e3])
    lay = layout_from_cells(np.full(12, 5e-3), 3e-3, 1e-3)
    kr = 2 * np.pi * freq / CR
    k_pos = np.broadcast_to(kr + 0.7j, (12, 2))
    a = march(_modes(k_pos), lay.x, lay.spacing, freq, CR)
    b = march(_modes(np.conj(k_pos)), lay.x, lay.spacing, freq, CR)
    for c in CHANNELS:
        np.testing.assert_array_equal(a.fractions[c], b.fractions[c])
    np.testing.assert_allclose(b.fractions["transmitted_surface"],
                               np.exp(-2 * 0.7 * lay.length), rtol=1e-12)


def test_channel_map_with_nothing_to_show_says_so():
    """A trace in which no channel takes more than 0.5 % at a known position draws a note
    instead of an empty legend (matplotlib warns about an empty legend)."""
    import warnings
    from types import SimpleNamespace

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from optgrade.plotting.trace import plot_channel_map
    from optgrade.propagation import CHANNELS

    freq = np.linspace(100e3, 200e3, 8)
    empty = SimpleNamespace(
        frequency=freq,
        fractions={c: np.zeros(freq.size) for c in CHANNELS},
        position={c: np.full(freq.size, np.nan) for c in CHANNELS},
    )
    fig, ax = plt.subplots()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        plot_channel_map(ax, empty, SimpleNamespace(length=0.5))
    assert ax.get_legend() is None
    assert any("no channel" in t.get_text() for t in ax.texts)
    plt.close(fig)


def test_nothing_past_the_turning_point_or_on_the_other_branch_is_read():
    """The march reads the followed branch up to the first cell where neither branch has a
    root, the other branch at the entry cell and at that last cell (what its row request
    ``WKB_PATH`` relies on): filling every other point with other values changes nothing."""
    rng = np.random.default_rng(5)
    n, nf = 30, 9
    freq = np.linspace(20e3, 90e3, nf)
    lay = layout_from_cells(rng.uniform(3e-3, 9e-3, n), rng.uniform(2e-3, 4e-3, n), 1e-3)
    kr = 2 * np.pi * freq / CR
    k = (1.0 + rng.uniform(0, 0.5, (2, n, nf))) * kr + 1j * rng.uniform(0, 5, (2, n, nf))
    turn = rng.integers(1, n + 1, nf)  # first cell without a root (n: none)
    k[0, 0, :3] = np.nan  # three frequencies enter on the upper branch
    br = np.where(np.isfinite(k[0, 0]), 0, 1)
    for f in range(nf):
        if turn[f] < n:
            k[:, turn[f], f] = np.nan  # neither branch: the path ends there
    shares = rng.uniform(0, 1, (2, 5, n, nf))
    angle = rng.uniform(-1.5, 1.5, (2, 4, n, nf))
    ref = march(SimpleNamespace(k=k, shares=shares, angle=angle), lay.x, lay.spacing, freq, CR)
    unread = np.ones((2, n, nf), dtype=bool)
    for f in range(nf):
        unread[br[f], : turn[f] + 1, f] = False  # the turning cell is read (no root)
        if turn[f] < n:
            unread[:, turn[f], f] = False  # the other branch is tried there
        unread[:, 0, f] = False
    k2, sh2, an2 = k.copy(), shares.copy(), angle.copy()
    k2[unread] = rng.uniform(1, 2, unread.sum()) * 7e3 + 3e2j
    sh2.transpose(0, 2, 3, 1)[unread] = 0.3
    an2.transpose(0, 2, 3, 1)[unread] = 0.2
    other = march(SimpleNamespace(k=k2, shares=sh2, angle=an2), lay.x, lay.spacing, freq, CR)
    assert np.array_equal(ref.branch, other.branch) and (ref.branch[:3] == 1).all()
    for c in CHANNELS:
        np.testing.assert_array_equal(ref.fractions[c], other.fractions[c])
        np.testing.assert_array_equal(ref.position[c], other.position[c])
        np.testing.assert_array_equal(ref.angle[c], other.angle[c])
    np.testing.assert_array_equal(ref.eps_max, other.eps_max)
    np.testing.assert_array_equal(ref.phase, other.phase)


def test_trace_asks_the_dispersion_for_its_path_and_reads_its_rayleigh_speed():
    """`trace` asks the dispersion stage (`optgrade.dispersion.Dispersion`) for the march's row
    request ``WKB_PATH`` (or every point with ``path_only=False``) and takes cR from its ``cr``
    unless given: the entry step then reflects ((K1 - kR)/(K1 + kR))^2 with that kR (the
    normal-incidence impedance-step estimate of the module docstring)."""
    from optgrade.dispersion import Dispersion, RowPath
    from optgrade.propagation import WKB_PATH, trace

    freq = np.linspace(20e3, 60e3, 5)
    lay = layout_from_cells(np.full(6, 5e-3), np.full(6, 3e-3), 1e-3)
    kr = 2 * np.pi * freq / CR
    modes = _modes(np.broadcast_to(1.5 * kr, (6, freq.size)))

    class Toy:
        cr = CR
        paths: list = []

        def local_modes(self, height, spacing, head_mass, f, *, path=None):
            self.paths.append(path)
            return modes

    toy = Toy()
    assert isinstance(toy, Dispersion)
    tr = trace(lay, toy, freq)
    np.testing.assert_allclose(tr.entry_reflection, (0.5 / 2.5) ** 2, rtol=1e-12)
    trace(lay, toy, freq, path_only=False)
    tr2 = trace(lay, toy, freq, cr=2.0 * CR)  # kR halved: K1 = 3 kR
    np.testing.assert_allclose(tr2.entry_reflection, (2.0 / 4.0) ** 2, rtol=1e-12)
    assert toy.paths == [WKB_PATH, None, WKB_PATH]
    assert WKB_PATH == RowPath((0, 1))


def test_march_follows_a_branch_across_the_rayleigh_line_by_continuity():
    """Issue 13 item 2: one physical branch is labelled ``lower`` (K > kR) on one side of a rod
    anti-resonance and ``upper`` (K < kR) on the other. Synthetic lossless modes: branch 0 at
    K = 1.001 kR in cells 0-4, branch 1 at 0.999 kR in cells 5-9. The march continues across
    (transmitted = 1 - entry step; the label-following march turned the wave at cell 5 and
    reflected everything). A jump to 0.9 kR is a different branch: a step (issue 13 item 3)
    that passes t = 4 K_a K_b / (K_a + K_b)^2 (the normal-incidence impedance-step estimate,
    written out here) and reflects the rest back out at x = 0 (lossless cells)."""
    from types import SimpleNamespace

    from optgrade.propagation import march

    cr, f = 2900.0, 150e3
    kr = 2 * np.pi * f / cr
    n = 10
    x = np.arange(n) * 8e-3
    a = np.full(n, 8e-3)
    for k_upper, continues in ((0.999 * kr, True), (0.9 * kr, False)):
        k = np.full((2, n, 1), np.nan + 0j)
        k[0, :5, 0] = 1.001 * kr
        k[1, 5:, 0] = k_upper
        shares = np.zeros((2, 5, n, 1))
        shares[:, 4] = 1.0
        angle = np.full((2, 4, n, 1), np.nan)
        tr = march(SimpleNamespace(k=k, shares=shares, angle=angle), x, a, np.array([f]), cr)
        entry = float(tr.entry_reflection[0])
        if continues:
            assert abs(tr.fractions["transmitted_surface"][0] - (1 - entry)) < 1e-12
            assert np.isnan(tr.turning_position[0])
        else:
            ka, kb = 1.001 * kr, k_upper
            t = 4 * ka * kb / (ka + kb) ** 2
            assert abs(tr.fractions["transmitted_surface"][0] - (1 - entry) * t) < 1e-12
            assert abs(tr.fractions["reflected_surface"][0] - (entry + (1 - entry) * (1 - t))) \
                < 1e-12
            assert np.isnan(tr.turning_position[0])
            # the reflected power turned back at the step (cell 5) and at the entry (x = 0)
            want = x[5] * (1 - entry) * (1 - t) / tr.fractions["reflected_surface"][0]
            assert abs(tr.position["reflected_surface"][0] - want) < 1e-12
        assert tr.branch[0] == 0


def test_march_passes_a_height_step_between_branches_as_the_exact_model_does():
    """Issue 13 item 3: 40 pins, 6 mm then 10 mm at 8 mm on the bench block (band 100-200 kHz):
    between 126 and 210 kHz the short pins carry the lower branch and the tall ones (above
    their resonance) only the upper one. The march booked everything left as reflected at the
    step; with the step rule (a mismatch estimate, wave onto the other branch) it follows the
    exact row model (an independent solution: multiple scattering of the finite row).
    Worst channel's band-mean |WKB - exact|: 0.589 before, 0.138 after (measured)."""
    from pathlib import Path

    from optgrade.channels import CHANNELS
    from optgrade.layout import layout_from_cells
    from optgrade.propagation import propagation_model
    from optgrade.study import load_study

    s = load_study(Path(__file__).resolve().parents[1] / "studies" / "bench_backward_shear.toml")
    lay = layout_from_cells(np.r_[np.full(20, 6e-3), np.full(20, 10e-3)], 8e-3, 1e-3, 0.0, 2e-5)
    freq = np.linspace(100e3, 200e3, 128)
    wkb = propagation_model(s, "wkb").trace(lay, freq)
    ex = propagation_model(s, "scattering").trace(lay, freq)
    err = [np.mean(np.abs(np.asarray(wkb.fractions[c]) - np.asarray(ex.fractions[c])))
           for c in CHANNELS]
    assert max(err) < 0.25, dict(zip(CHANNELS, np.round(err, 3), strict=True))
    total = sum(np.asarray(wkb.fractions[c]) for c in CHANNELS)
    assert np.max(np.abs(total - 1)) < 1e-9
