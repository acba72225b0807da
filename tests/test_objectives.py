"""Design goals: registry, each goal against a hand computation, weighted sum, and the
'one new file + one registration' extension path."""

from __future__ import annotations

import dataclasses
import re
import sys
import textwrap
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from search_helpers import CHANNELS, clone, fake_study, fake_trace

from optgrade import objectives
from optgrade.errors import StudyError
from optgrade.layout import layout_from_cells

STUDY_FILE = Path(__file__).resolve().parent.parent / "studies" / "bench_backward_shear.toml"


def _trace(f, **fractions):
    fr = {c: np.zeros_like(f) for c in CHANNELS}
    fr.update({k: np.asarray(v, float) for k, v in fractions.items()})
    fr["transmitted_surface"] = 1.0 - sum(v for k, v in fr.items() if k != "transmitted_surface")
    nan = {c: np.full_like(f, np.nan) for c in CHANNELS}
    return SimpleNamespace(frequency=f, fractions=fr, position=dict(nan), angle=dict(nan),
                           eps_max=np.zeros_like(f), is_adiabatic=np.ones(f.size, bool))


F = np.array([100e3, 150e3, 200e3, 250e3])
LAYOUT = layout_from_cells(np.linspace(8e-3, 3e-3, 20), 3e-3, 1e-3, 0.0, 0.02e-3)
CTX = objectives.EvalContext()


def test_every_registered_goal_is_accepted_by_the_study_file():
    """The study file's [goal.weights] keys come from the goal registry: every built-in goal
    module registers its name, each is accepted as a weight, and an unknown one is refused with
    the field, the reason and the line."""
    from optgrade.study import study_from_text

    assert set(objectives.names()) == set(objectives.BUILTIN)
    for name in objectives.names():
        goal = objectives.get(name)
        assert goal.name == name and goal.direction in ("maximize", "minimize")
    with pytest.raises(KeyError, match="unknown goal"):
        objectives.get("nope")
    text = STUDY_FILE.read_text()

    def with_weights(lines: str) -> str:
        return re.sub(r"\[goal\.weights\]\n(.+\n)+", "[goal.weights]\n" + lines, text, count=1)

    # every name, written in reverse: kept in the canonical (BUILTIN) order, so the weighted
    # sum does not depend on the order of the keys in the file (far_face needs a block and a
    # far-face zone, given here)
    block = ('loss_factor = 0.0\nthickness = "60 mm"\n', '\n[goal.far_face]\nx_range = '
             '["0 mm", "50 mm"]\nmode = "target"\n')
    s = study_from_text(with_weights("".join(f"{n} = 0.5\n" for n in objectives.names()[::-1]))
                        .replace("loss_factor = 0.0\n", block[0], 1) + block[1])
    assert list(s.goal.weights) == list(objectives.BUILTIN)
    with pytest.raises(StudyError) as err:
        study_from_text(with_weights("channel = 1.0\nwrost = 1.0\n"))
    (msg,) = err.value.messages
    assert "goal.weights.wrost: unknown goal 'wrost'; did you mean 'worst'?" in msg
    assert msg.endswith(f"(line {text.splitlines().index('[goal.weights]') + 3})")


def test_channel_worst_blocking_by_hand():
    s = fake_study()
    tr = _trace(F, backward_shear=[0.2, 0.8, 0.6, 0.4], forward_shear=[0.1, 0.1, 0.0, 0.5])
    ch = objectives.get("channel").evaluate(tr, LAYOUT, s, CTX)
    assert ch.score == pytest.approx(0.5)
    assert ch.details["worst"] == pytest.approx(0.2)
    assert ch.details["worst_frequency_hz"] == 100e3
    assert ch.details["n_frequencies_meeting_required"] == 2  # 0.8, 0.6 >= 0.5
    assert objectives.get("worst").evaluate(tr, LAYOUT, s, CTX).score == pytest.approx(0.2)
    bl = objectives.get("blocking").evaluate(tr, LAYOUT, s, CTX)
    assert bl.score == pytest.approx(np.mean([0.3, 0.9, 0.6, 0.9]))
    # the "blocking" goal channel means 1 - transmitted in the channel goal too
    blk = objectives.get("channel").evaluate(tr, LAYOUT, clone(s, goal__channel="blocking"), CTX)
    assert blk.score == pytest.approx(bl.score)


def test_lossy_rayleigh_wavenumber_against_correspondence_principle():
    """Complex Rayleigh wavenumber of a damped half-space. With the same loss factor eta on both
    Lame moduli every speed scales by (1 - i eta)^(1/2) and the Rayleigh equation depends only
    on their (real) ratio, so by the elastic-viscoelastic correspondence principle (R. M.
    Christensen, *Theory of Viscoelasticity*, 1982, ch. 2 -- from memory)
    kR = kR0 (1 - i eta)^(-1/2), i.e. Im kR ~ (eta / 2) kR0. kR0 from the lossless root of
    optgrade.ground._halfspace (Achenbach 1973, sec. 5.11); the complex root must also zero the
    Rayleigh function of optgrade.ground._halfspace taken with the complex speeds."""
    from optgrade.ground import Substrate, rayleigh_function
    from optgrade.objectives._common import lossy_rayleigh_wavenumber

    f = np.array([30.0, 55.0, 80.0])
    for cl, ct, eta in [(6320.0, 3130.0, 0.0), (6320.0, 3130.0, 0.01), (400.0, 200.0, 0.04)]:
        sub = Substrate(1800.0, cl, ct, eta)
        k = lossy_rayleigh_wavenumber(f, *sub.complex_speeds)
        k0 = 2 * np.pi * f / sub.cr
        assert k == pytest.approx(k0 / np.sqrt(1 - 1j * eta), rel=1e-9)
        assert k.imag == pytest.approx(eta / 2 * k0, rel=eta + 1e-12, abs=1e-15)
        w = 2 * np.pi * f
        scale = np.abs(w / sub.complex_speeds[1]) ** 4
        assert np.all(np.abs(rayleigh_function(k, w, *sub.complex_speeds)) < 1e-8 * scale)


def test_blocking_lossless_is_plain_one_minus_transmitted():
    """Lossless substrate: T_bare = 1, so the insertion blocking is the old 1 - T_array, in the
    blocking goal and in the channel/worst goals with channel = "blocking"."""
    s = fake_study(goal__channel="blocking")
    assert s.substrate.loss_factor == 0.0
    tr = _trace(F, backward_shear=[0.2, 0.8, 0.6, 0.4])
    bl = objectives.get("blocking").evaluate(tr, LAYOUT, s, CTX)
    assert bl.score == pytest.approx(np.mean([0.2, 0.8, 0.6, 0.4]))
    assert bl.details["mean_bare_transmitted"] == 1.0
    assert objectives.get("channel").evaluate(tr, LAYOUT, s, CTX).score == pytest.approx(bl.score)
    assert objectives.get("worst").evaluate(tr, LAYOUT, s, CTX).score == pytest.approx(0.2)


def test_blocking_on_lossy_ground_discounts_the_bare_ground():
    """Lossy substrate, hand-built traces: a row that transmits exactly what the bare ground
    does over the same length, T_bare = exp(-2 Im kR L) with Im kR = kR0 Im (1 - i eta)^(-1/2)
    (correspondence principle, see above), blocks nothing; one that transmits half of it blocks
    0.5; the plain transmitted fraction stays in the details."""
    eta = 0.04
    s = fake_study(substrate__loss_factor=eta, goal__channel="blocking")
    from optgrade.ground import rayleigh_speed

    k0 = 2 * np.pi * F / rayleigh_speed(s.substrate.cl, s.substrate.ct)
    t_bare = np.exp(-2 * (k0 * (1 - 1j * eta) ** -0.5).imag * LAYOUT.length)
    assert np.all(t_bare < 0.9)  # the bare ground alone would look like "blocking" > 0.1
    for factor, expect in [(1.0, 0.0), (0.5, 0.5), (1.5, 0.0)]:
        tr = _trace(F, absorbed=1.0 - factor * t_bare)
        v = objectives.get("blocking").evaluate(tr, LAYOUT, s, CTX)
        assert v.score == pytest.approx(expect, abs=1e-9)
        assert v.details["mean_transmitted"] == pytest.approx(np.mean(factor * t_bare))
        ch = objectives.get("channel").evaluate(tr, LAYOUT, s, CTX)
        assert ch.score == pytest.approx(expect, abs=1e-9)


@pytest.mark.slow
def test_vanishing_resonators_on_lossy_site_ground_block_nothing():
    """Site example (soil loss factor 0.04, 60 m row): the bare ground alone transmits only a
    few per cent, so the plain 1 - transmitted is near 1 for any layout. A row of vanishing
    resonators (1 cm stubs, no head mass: first rod resonance far above the band) traced
    through the real surrogate and march must score ~0 insertion blocking (within 0.02)."""
    from pathlib import Path

    from optgrade.dispersion import surrogate_for_study
    from optgrade.propagation import trace_study
    from optgrade.study import load_study

    s = load_study(Path(__file__).resolve().parent.parent / "studies" /
                   "site_ground_barrier.toml")
    lay = layout_from_cells(np.full(30, 0.01), 2.0, 0.25, 0.0, 0.05)
    tr = trace_study(s, lay, surrogate_for_study(s))
    v = objectives.get("blocking").evaluate(tr, lay, s, CTX)
    assert v.details["mean_blocked_plain"] > 0.9
    assert v.score < 0.02


def test_angle_window_counts_only_power_inside():
    s = fake_study(goal__angle_window_deg=(-60.0, -30.0))
    tr = _trace(F, backward_shear=[0.5, 0.5, 0.5, 0.5])
    tr.angle["backward_shear"] = np.array([-70.0, -45.0, -30.0, np.nan])
    v = objectives.get("angle").evaluate(tr, LAYOUT, s, CTX)
    assert v.score == pytest.approx((0 + 0.5 + 0.5 + 0) / 4)


def test_adiabaticity_penalty_threshold():
    """eps above 0.1 is outside the adiabatic model's validity (physics.md sec. 6)."""
    tr = _trace(F)
    tr.eps_max = np.array([0.05, 0.1, 0.2, 0.4])
    v = objectives.get("adiabaticity").evaluate(tr, LAYOUT, fake_study(), CTX)
    assert v.score == pytest.approx((0 + 0 + 1 + 3) / 4)
    assert v.details["n_non_adiabatic"] == 2
    assert objectives.get("adiabaticity").direction == "minimize"


def test_compactness_by_hand():
    s = fake_study(resonator__head_mass=(0.0, 0.01))
    lay = layout_from_cells(np.full(10, 5e-3), 3e-3, 1e-3, 0.002)
    v = objectives.get("compactness").evaluate(_trace(F), lay, s, CTX)
    rod = 7850 * np.pi * 1e-6 / 4 * 5e-3
    m_max = 40 * (7850 * np.pi * 1e-6 / 4 * 12e-3 + 0.01)
    expect = np.mean([0.030 / 0.12, 10 / 40, (10 * rod + 0.02) / m_max])
    assert v.score == pytest.approx(expect)


def test_weighted_score_signs():
    ov = objectives.ObjectiveValue
    vals = {"channel": ov(0.7), "adiabaticity": ov(0.5)}
    assert objectives.weighted_score(vals, {"channel": 1.0, "adiabaticity": 0.2}) == \
        pytest.approx(0.7 - 0.1)


def test_robustness_quantile_over_machining_errors():
    """Zero tolerance: robustness equals the nominal score. With a tolerance the 10 % quantile
    is at most the mean over draws, and the same seed gives the same value (deterministic)."""
    s = fake_study(goal__weights={"channel": 1.0, "robustness": 0.5})
    ctx = objectives.EvalContext(trace_fn=lambda lay: fake_trace(s, lay), seed=7)
    lay0 = layout_from_cells(np.linspace(8e-3, 3e-3, 30), 3e-3, 1e-3, 0.0, 0.0)
    nominal = objectives.main_score(fake_trace(s, lay0), lay0, s, ctx)
    r0 = objectives.get("robustness").evaluate(fake_trace(s, lay0), lay0, s, ctx)
    assert r0.score == pytest.approx(nominal)
    lay = layout_from_cells(np.linspace(8e-3, 3e-3, 30), 3e-3, 1e-3, 0.0, 0.3e-3)
    r1 = objectives.get("robustness").evaluate(fake_trace(s, lay), lay, s, ctx)
    r2 = objectives.get("robustness").evaluate(fake_trace(s, lay), lay, s, ctx)
    assert r1.score == r2.score
    assert r1.score <= r1.details["mean"] + 1e-12
    assert r1.details["min"] <= r1.score


def test_new_goal_is_one_file_and_one_registration(tmp_path, monkeypatch):
    """A goal in a new module registers itself and joins the weighted score by name."""
    (tmp_path / "spread_goal.py").write_text(textwrap.dedent('''
        import numpy as np
        from optgrade.objectives import Objective, ObjectiveValue, register

        @register
        class Spread(Objective):
            name = "spread"
            direction = "minimize"

            def evaluate(self, trace, layout, study, context):
                f = np.asarray(trace.fractions["backward_shear"])
                return ObjectiveValue(float(f.std()), {})
    '''))
    monkeypatch.syspath_prepend(str(tmp_path))
    import spread_goal  # noqa: F401  (the registration line)

    try:
        tr = _trace(F, backward_shear=[0.2, 0.8, 0.6, 0.4])
        s = fake_study(goal__weights={"channel": 1.0, "spread": 2.0})
        vals = objectives.evaluate_many(s.goal.weights, tr, LAYOUT, s, CTX)
        expect = 0.5 - 2.0 * np.std([0.2, 0.8, 0.6, 0.4])
        assert objectives.weighted_score(vals, s.goal.weights) == pytest.approx(expect)
    finally:
        objectives.GOALS.unregister("spread")
        sys.modules.pop("spread_goal", None)


@pytest.mark.slow
def test_interpolated_robustness_matches_full_traces():
    """Robustness from modes interpolated between h -/+ tol (the WKB model's way of tracing
    perturbed layouts, through the context) agrees with tracing every draw in full (real
    surrogate, bench example) within 0.01 of the score."""
    from optgrade import profiles, search
    from optgrade.study import load_study

    s = load_study(STUDY_FILE)
    ctx = search.make_context(s)
    assert ctx.trace_height_errors is not None
    full_ctx = dataclasses.replace(ctx, trace_height_errors=None)
    goal = objectives.get("robustness")
    rng = np.random.default_rng(5)
    for _ in range(2):
        params = profiles.centre_params(s)
        params.update({k: float(rng.uniform(0.1, 0.9)) for k in params if k != "n_resonators"})
        lay = profiles.layout_from_params(s, params)
        tr = ctx.trace_fn(lay)
        fast = goal.evaluate(tr, lay, s, ctx)
        full = goal.evaluate(tr, lay, s, full_ctx)
        assert fast.score == pytest.approx(full.score, abs=0.01)
        assert fast.details["nominal"] == pytest.approx(full.details["nominal"], abs=1e-12)
