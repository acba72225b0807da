"""A new ground and a new resonator type are each one class plus its registration.

Both toys below are defined and registered here, in the test file, the way a user would add a
part; a study names them in ``[substrate] kind`` / ``[resonator] kind`` and is traced through
the propagation stage (``PROPAGATION_MODELS`` -> WKB march -> `dispersion_for_study`, which
hands parts without compiled point functions to the direct band solver). Nothing else in the
package is told about them. Every registration is removed again after its test.

Rows are short (5 cells) and frequencies few (6), so the direct solver stays within seconds.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pytest
from scipy.optimize import brentq

from optgrade.channels import CHANNELS
from optgrade.dispersion import DirectDispersion, dispersion_for_study
from optgrade.ground import GROUNDS, Ground, Substrate, rayleigh_speed
from optgrade.layout import layout_from_cells
from optgrade.propagation import PROPAGATION_MODELS
from optgrade.resonators import RESONATORS, Resonator, Rod
from optgrade.study import study_from_text

# --------------------------------------------------------------------------- toy ground


@dataclass(frozen=True)
class ScaledHalfSpace(Ground):
    """Toy ground: an isotropic half-space whose vertical surface compliance is multiplied by
    the constant ``SCALE`` (a stiffer or softer ground with the same wave speeds)."""

    name: ClassVar[str] = "test_scaled_halfspace"
    SCALE: ClassVar[float] = 0.8
    density: float
    cl: float
    ct: float
    loss_factor: float = 0.0

    @classmethod
    def from_spec(cls, spec) -> ScaledHalfSpace:
        return cls(float(spec.density), float(spec.cl), float(spec.ct), float(spec.loss_factor))

    @property
    def _plain(self) -> Substrate:
        return Substrate(self.density, self.cl, self.ct, self.loss_factor)

    @property
    def cr(self) -> float:
        return rayleigh_speed(self.cl, self.ct)

    def compliance_sq(self, xi2, w):
        return self.SCALE * self._plain.compliance_sq(xi2, w)

    def pole_function(self, xi, w):
        # scaling G moves none of its poles
        return self._plain.pole_function(xi, w)

    def shear_share(self, xi2, w):
        # the radiated power scales as a whole; its shear/compressional split does not
        return self._plain.shear_share(xi2, w)

    @property
    def complex_mu(self) -> complex:
        # the static limit (1 - nu) / (mu xi) scales with G: report the modulus that gives it
        return self._plain.complex_mu / self.SCALE

    def lossless(self) -> ScaledHalfSpace:
        return type(self)(self.density, self.cl, self.ct)

    def with_loss(self, loss_factor: float) -> ScaledHalfSpace:
        return type(self)(self.density, self.cl, self.ct, float(loss_factor))


# --------------------------------------------------------------------------- toy resonator


@dataclass(frozen=True)
class PaddedRod(Resonator):
    """Toy resonator: the axial rod standing on a massless base pad of stiffness ``PAD`` (N/m).

    The pad carries the same force as the rod base, so the compliances add. In this package's
    sign convention (Z = force on the surface per unit base displacement, both into the solid;
    a rigid mass gives Z = +M w^2) a spring between surface and rod has Z_pad = -k, hence
    1/Z = 1/Z_rod + 1/Z_pad = 1/Z_rod - 1/k (for a rigid mass on the pad this is exactly the
    mass-spring oscillator M w^2 k / (k - M w^2)).
    """

    name: ClassVar[str] = "test_padded_rod"
    PAD: ClassVar[float] = 1e5
    youngs_modulus: float
    density: float
    diameter: float
    loss_factor: float = 0.0

    @classmethod
    def from_spec(cls, spec) -> PaddedRod:
        return cls(
            float(spec.youngs_modulus),
            float(spec.density),
            float(spec.diameter),
            float(spec.loss_factor),
        )

    @property
    def _rod(self) -> Rod:
        return Rod(self.youngs_modulus, self.density, self.diameter, self.loss_factor)

    def compliance(self, w, height, head_mass):
        return self._rod.compliance(w, height, head_mass) - 1.0 / self.PAD

    def resonances(self, height, head_mass=0.0, n_modes=1):
        """Roots of the frequency equation derived in `test_padded_rod_resonance`:
        x (tan x + mu x) = kappa (1 - mu x tan x), x = w L / c_r, kappa = k L / (E A),
        mu = M / m_rod; written times cos x, one root in each branch of tan x."""
        rod = self._rod
        kappa = self.PAD * height / (self.youngs_modulus * rod.area)
        mu = head_mass / (self.density * rod.area * height)

        def f(x):
            return x * (1.0 + kappa * mu) * np.sin(x) + (mu * x * x - kappa) * np.cos(x)

        edges = [1e-12] + [(n - 0.5) * np.pi for n in range(1, n_modes + 1)]
        brackets = zip(edges[:-1], edges[1:], strict=True)
        x = np.array([brentq(f, lo, hi, xtol=1e-15) for lo, hi in brackets])
        return x * rod.bar_speed / (2.0 * np.pi * height)


def _padded(pad: float) -> type[PaddedRod]:
    """A PaddedRod type with its own pad stiffness (N/m) and registry name."""
    return type(f"PaddedRod_{pad:.0e}", (PaddedRod,), {"PAD": pad, "name": f"test_pad_{pad:.0e}"})


# --------------------------------------------------------------------------- study and row

# Invented bench scenario: an aluminium block (handbook-like speeds) with a row of 1 mm pins.
STUDY = """
[study]
name = "toy_parts"
seed = 1
scale = "bench"

[substrate]
kind = "{ground}"
density = "{density} kg/m^3"
cl = "6320 m/s"
ct = "3130 m/s"
loss_factor = 0.01

[resonator]
kind = "{resonator}"
material = "aluminium_6061"
loss_factor = 0.001
diameter = "1 mm"
row_pitch = "4 mm"

[layout]
count = [5, 5]
height = ["6 mm", "10 mm"]
height_step = "0.05 mm"
spacing = ["6 mm", "10 mm"]
profile = "linear"
max_length = "100 mm"
entry = "short"

[goal]
band = ["120 kHz", "200 kHz"]
n_frequencies = 6
channel = "backward_shear"
model = "lattice"
propagation = "wkb"

[fabrication]
min_gap = "2 mm"
"""

ROW = layout_from_cells(
    np.array([6.0, 7.0, 8.0, 9.0, 10.0]) * 1e-3, np.array([6.0, 7.0, 8.0, 9.0, 10.0]) * 1e-3, 1e-3
)


def _study(ground: str = "halfspace", resonator: str = "axial_rod", density: float = 2700.0):
    return study_from_text(STUDY.format(ground=ground, resonator=resonator, density=density))


def _trace(study, dispersion=None):
    """Trace ROW through the study's registered propagation model (the WKB march)."""
    model = PROPAGATION_MODELS.get(study.goal.propagation)(study, dispersion=dispersion)
    return model.trace(ROW)


def _max_difference(t1, t2) -> float:
    """Largest absolute difference over fractions, positions (m), angles (deg), eps, phase."""
    out = 0.0
    for part in ("fractions", "position", "angle"):
        for c in CHANNELS:
            a, b = getattr(t1, part)[c], getattr(t2, part)[c]
            assert np.array_equal(np.isnan(a), np.isnan(b)), (part, c)
            out = max(out, float(np.nanmax(np.abs(a - b), initial=0.0)))
    for attr in ("eps_max", "turning_position", "entry_reflection", "phase"):
        a, b = getattr(t1, attr), getattr(t2, attr)
        assert np.array_equal(np.isnan(a), np.isnan(b)), attr
        out = max(out, float(np.nanmax(np.abs(a - b), initial=0.0)))
    return out


@pytest.fixture
def registered():
    """Register toy classes for one test and remove them afterwards (also on failure)."""
    added = []

    def add(registry, cls):
        registry.register(cls)
        added.append((registry, cls.name))
        return cls

    yield add
    for registry, name in added:
        registry.unregister(name)
        assert name not in registry.names()


# --------------------------------------------------------------------------- (a) ground


def test_toy_ground_traces_like_the_equivalent_half_space(registered):
    """A registered toy ground runs through study validation, the dispersion factory and the
    WKB march, and gives the trace of the half-space it is equivalent to.

    Derivation: the half-space compliance is G = -alpha kT^2 / (mu R(xi)) with mu = rho cT^2
    (1 - i eta) (physics.md section 3; J. D. Achenbach, *Wave Propagation in Elastic Solids*,
    1973); alpha, kT and the Rayleigh function R depend on w, cL, cT and eta only. So at fixed
    speeds c G(rho) = G(rho / c) exactly, its static limit (1 - nu)/(mu xi) scales the same way,
    its poles (zeros of R) and the shear/compressional split of radiated power do not change,
    and the Bloch relation 1/Z = Sigma(K, w) is the same: the trace over the toy ground with
    density rho equals the trace over a real half-space with density rho / c.

    Tolerance 1e-9 (fractions, metres, degrees): the two runs differ only by rounding in
    c x G(rho) against G(rho / c) (relative 1e-16); the solver stops its root iterations at
    relative 1e-13 and the march is a smooth function of the roots, so 1e-9 leaves four orders
    of margin while a ground whose compliance were not used through the interface (the scale
    lost in any step) would differ by percent.
    """
    c = ScaledHalfSpace.SCALE
    registered(GROUNDS, ScaledHalfSpace)
    toy_study = _study(ground=ScaledHalfSpace.name, density=2700.0)
    real_study = _study(ground="halfspace", density=2700.0 / c)

    toy_dispersion = dispersion_for_study(toy_study)
    assert isinstance(toy_dispersion, DirectDispersion)
    assert isinstance(toy_dispersion.substrate, ScaledHalfSpace)

    toy = _trace(toy_study)
    real = _trace(real_study, DirectDispersion.from_study(real_study))
    np.testing.assert_array_equal(toy.branch, real.branch)
    assert _max_difference(toy, real) < 1e-9
    np.testing.assert_allclose(toy.total(), 1.0, atol=1e-9)
    # the check can fail: the same density without the scale gives another trace
    plain = _trace(toy_study, DirectDispersion.from_study(_study(density=2700.0)))
    assert max(np.max(np.abs(plain.fractions[k] - toy.fractions[k])) for k in CHANNELS) > 1e-3


def test_factory_keeps_the_compiled_surrogate_for_compiled_parts(registered, monkeypatch):
    """`dispersion_for_study` sends the half-space with the axial rod to the compiled surrogate
    and a part without compiled point functions to the direct solver (surrogate construction
    replaced by a marker here: building its tables is tested in tests/test_surrogate.py)."""
    import optgrade.dispersion._factory as factory

    monkeypatch.setattr(factory, "surrogate_for_study", lambda study, **kw: ("surrogate", kw))
    assert dispersion_for_study(_study(), model="line")[0] == "surrogate"
    registered(GROUNDS, ScaledHalfSpace)
    direct = dispersion_for_study(_study(ground=ScaledHalfSpace.name), model="line")
    assert isinstance(direct, DirectDispersion) and direct.model == "line"
    assert direct.cr == pytest.approx(Substrate(2700.0, 6320.0, 3130.0).cr, rel=1e-15)


# --------------------------------------------------------------------------- (b) resonator


def test_padded_rod_resonance():
    """Frequency equation of the padded rod and its soft-pad limit.

    Derivation: Z_rod = E A k_r (tan x + q) / (1 - q tan x), x = k_r L, q = M w^2 / (E A k_r)
    = mu x with mu = M / m_rod (thin-rod theory, physics.md section 4). The base-held resonance
    of the padded rod is the pole of Z, i.e. 1/Z = 1/Z_rod - 1/k = 0: Z_rod = k, or
    x (tan x + mu x) = kappa (1 - mu x tan x) with kappa = k L / (E A). Without head mass this
    is x tan x = kappa, the bar with a spring at one end and a free other end (R. D. Blevins,
    *Formulas for Natural Frequency and Mode Shape*, 1979, from memory). Soft pad: x tan x =
    x^2 + x^4/3 + 2 x^6/15 + ... gives x^2 = kappa - kappa^2/3 + 4 kappa^3/45 + O(kappa^4), so
    f / f_ms = x / sqrt(kappa) = sqrt(1 - kappa/3 + 4 kappa^2/45) + O(kappa^3) with the
    mass-spring value f_ms = sqrt(k / m_rod) / 2 pi (first order: f = f_ms (1 - kappa/6)).
    Stiff pad: x -> pi/2, the rod's quarter-wave resonance c_r / 4L.
    """
    height = 8e-3
    soft = _padded(1e5)(70e9, 2700.0, 1e-3)  # lossless, so the compliance is real
    rod = soft._rod
    kappa = soft.PAD * height / (rod.youngs_modulus * rod.area)
    assert kappa < 0.02
    f_res = soft.resonances(height, 0.0, n_modes=2)

    # (1) the resonator's own resonances are the zeros of its own compliance (scipy brentq on
    # Re 1/Z between the rod's own resonances, which bracket them)
    f_rod = rod.resonances(height, 0.0, n_modes=2)
    # 1/Z_rod has its pole (antiresonance, Z_rod = 0) at x = pi, i.e. twice the first rod
    # resonance; the second padded root lies between that pole and the second rod resonance
    brackets = [(1e-3 * f_rod[0], f_rod[0]), (2.0 * f_rod[0] * (1 + 1e-9), f_rod[1])]
    for f_n, (lo, hi) in zip(f_res, brackets, strict=True):

        def re_compliance(f):
            return float(soft.compliance(2 * np.pi * f, height, 0.0).real)

        assert f_n == pytest.approx(brentq(re_compliance, lo, hi, xtol=1e-9), rel=1e-9)

    # (2) the soft pad moves the first resonance to the mass-spring value
    m_rod = rod.density * rod.area * height
    f_ms = np.sqrt(soft.PAD / m_rod) / (2 * np.pi)
    assert f_res[0] < 0.2 * f_rod[0]
    assert f_res[0] / f_ms == pytest.approx(1.0 - kappa / 6.0, abs=kappa**2)
    second_order = np.sqrt(1 - kappa / 3 + 4 * kappa**2 / 45)
    assert f_res[0] / f_ms == pytest.approx(second_order, abs=kappa**3)

    # (3) a stiff pad leaves the quarter-wave rod resonance, also with a head mass
    stiff = _padded(1e16)(70e9, 2700.0, 1e-3)
    for head in (0.0, 2e-5):
        np.testing.assert_allclose(
            stiff.resonances(height, head, 2), rod.resonances(height, head, 2), rtol=1e-7
        )


def test_toy_resonator_traces_like_the_rod_with_a_stiff_pad(registered):
    """A registered toy resonator runs through study validation, the dispersion factory and the
    WKB march. With a very stiff pad (k = 1e16 N/m, kappa = k L / (E A) > 1e9 on this row) the
    trace is the rod's: the pad moves each resonance by about 1/kappa < 1e-9 relative and
    changes 1/Z by 1/k = 1e-16 m/N against |1/Z_rod| ~ 1e-7 m/N away from the resonances, so
    1e-6 (fractions, metres, degrees) is a safe bound. With a soft pad (k = 1e5 N/m) the first
    resonance drops below the band (test_padded_rod_resonance) and the trace changes."""
    rod_study = _study()
    rod_trace = _trace(rod_study, DirectDispersion.from_study(rod_study))

    stiff = registered(RESONATORS, _padded(1e16))
    stiff_study = _study(resonator=stiff.name)
    assert isinstance(dispersion_for_study(stiff_study).rod, stiff)
    stiff_trace = _trace(stiff_study)
    np.testing.assert_array_equal(stiff_trace.branch, rod_trace.branch)
    assert _max_difference(stiff_trace, rod_trace) < 1e-6

    soft = registered(RESONATORS, _padded(1e5))
    soft_trace = _trace(_study(resonator=soft.name))
    np.testing.assert_allclose(soft_trace.total(), 1.0, atol=1e-9)
    change = max(np.max(np.abs(soft_trace.fractions[k] - rod_trace.fractions[k])) for k in CHANNELS)
    assert change > 0.05


def test_toy_resonator_reaches_the_exact_row_model(registered):
    """The exact row model takes the resonator's compliance from the registry, so a toy
    resonator type needs no change there: with the stiff pad (1/k = 1e-16 m/N against
    |1/Z_rod| ~ 1e-7 m/N) the exact trace is the rod's within 1e-6; with the soft pad it is
    not (a model that silently used the axial rod would give the rod's trace for both)."""
    from optgrade.propagation import propagation_model

    freq = np.linspace(120e3, 200e3, 6)

    def exact(study):
        return propagation_model(study, "scattering", cache_dir=False).trace(ROW, freq)

    rod = exact(_study())
    stiff = exact(_study(resonator=registered(RESONATORS, _padded(1e16)).name))
    soft = exact(_study(resonator=registered(RESONATORS, _padded(1e5)).name))
    assert stiff.propagation == "scattering"
    for c in CHANNELS:
        np.testing.assert_allclose(stiff.fractions[c], rod.fractions[c], atol=1e-6)
    assert max(np.max(np.abs(soft.fractions[c] - rod.fractions[c])) for c in CHANNELS) > 0.05


def test_exact_row_model_refuses_a_ground_it_has_no_green_function_for(registered):
    """The Green's tables hold the half-space only: a registered toy ground is refused with a
    message naming goal.propagation (it would otherwise be traced as a plain half-space)."""
    from optgrade.errors import StudyError
    from optgrade.propagation import propagation_model

    registered(GROUNDS, ScaledHalfSpace)
    with pytest.raises(StudyError, match="goal.propagation.*substrate.kind"):
        propagation_model(_study(ground=ScaledHalfSpace.name), "scattering", cache_dir=False)
