"""Layout profiles: shapes, quantisation, search space, and fabrication limits by construction."""

from __future__ import annotations

import numpy as np
import optuna
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.interpolate import PchipInterpolator
from search_helpers import clone, fake_study

from optgrade import fabrication, profiles


def _random_params(space, draw_float):
    out = {}
    for name, dist in space.items():
        u = draw_float()
        if isinstance(dist, optuna.distributions.IntDistribution):
            out[name] = int(round(dist.low + u * (dist.high - dist.low)))
        elif dist.log:
            out[name] = float(np.exp(np.log(dist.low) + u * np.log(dist.high / dist.low)))
        else:
            out[name] = dist.low + u * (dist.high - dist.low)
    return out


STUDY_VARIANTS = [
    fake_study(),
    fake_study(layout__profile="linear", layout__entry="short"),
    fake_study(layout__profile="height=power, spacing=spline", resonator__head_mass=(0.0, 0.02)),
    fake_study(layout__profile="height=free, spacing=free, head_mass=spline", layout__count=(4, 12),
               resonator__head_mass=(0.001, 0.005)),
    # site-scale posts on soil (invented): 0.3 m timber-like posts up to 6 m, 200 kg heads
    fake_study(layout__count=(8, 30), layout__height=(1.0, 6.0), layout__height_step=0.05,
               layout__spacing=(0.6, 2.0), layout__max_length=30.0,
               resonator__diameter=0.3, resonator__youngs_modulus=11e9, resonator__density=500.0,
               resonator__head_mass=(0.0, 200.0), fabrication__min_gap=0.2,
               fabrication__height_tolerance=0.02, fabrication__slenderness_max=25.0,
               layout__profile="height=spline, head_mass=power"),
    # buckling binds before the height range does (soft, slender rods)
    fake_study(resonator__youngs_modulus=2e6, resonator__density=1200.0,
               layout__height=(2e-3, 40e-3), fabrication__slenderness_max=None,
               resonator__head_mass=(0.0, 1e-4)),
]


@settings(max_examples=60, deadline=None)
@given(which=st.integers(0, len(STUDY_VARIANTS) - 1), data=st.data())
def test_every_profile_layout_satisfies_every_limit(which, data):
    """Property: any point of the search space gives a layout with no fabrication violation."""
    study = STUDY_VARIANTS[which]
    space = profiles.search_space(study)
    params = _random_params(space, lambda: data.draw(st.floats(0.0, 1.0)))
    layout = profiles.layout_from_params(study, params)
    assert fabrication.check_layout(study, layout) == []
    # heights are monotone with the tall end at the entry when entry == "tall"
    dh = np.diff(layout.height)
    assert np.all(dh <= 1e-15) if study.layout.entry == "tall" else np.all(dh >= -1e-15)


def test_linear_profile_is_exact_line_and_quantised():
    """Linear height profile: heights on the straight line, rounded to the 0.1 mm step."""
    s = fake_study(layout__profile="linear", layout__count=(21, 21), layout__spacing=(3e-3, 3e-3))
    p = {"height_start": 1.0, "height_end": 0.0}
    lay = profiles.layout_from_params(s, p)
    expect = np.round(np.linspace(12e-3, 2e-3, 21) / 1e-4) * 1e-4
    np.testing.assert_allclose(lay.height, expect, atol=1e-12)
    np.testing.assert_allclose(np.diff(lay.x), 3e-3)
    short = profiles.layout_from_params(clone(s, layout__entry="short"), p)
    np.testing.assert_allclose(short.height, expect[::-1], atol=1e-12)


def test_spline_profile_matches_scipy_pchip():
    """Spline profile equals scipy's PCHIP through the nested control values (no step)."""
    s = fake_study(layout__count=(30, 30), layout__height_step=0.0)
    p = {"height_c0": 0.9, "height_c1": 0.5, "height_c2": 0.8, "height_c3": 0.2}
    lay = profiles.layout_from_params(s, p)
    c = np.cumprod([0.9, 0.5, 0.8, 0.2])
    u = PchipInterpolator(np.linspace(0, 1, 4), c)(np.linspace(0, 1, 30))
    np.testing.assert_allclose(lay.height, 2e-3 + u * 10e-3, rtol=1e-12)


def test_power_profile_and_count_parameter():
    s = fake_study(layout__profile="power", layout__height_step=0.0)
    p = {"n_resonators": 17, "height_start": 1.0, "height_end": 0.0, "height_exponent": 2.0}
    lay = profiles.layout_from_params(s, p)
    assert lay.n_resonators == 17
    sgrid = np.linspace(0, 1, 17)
    np.testing.assert_allclose(lay.height, 2e-3 + 10e-3 * (1 - sgrid) ** 2, rtol=1e-12)


def test_count_capped_by_max_length_and_spacing_pulled_in():
    """Count range shrinks to what fits; long spacings are pulled towards the minimum."""
    s = fake_study(layout__max_length=0.05)
    assert profiles.count_range(s) == (10, 25)  # 0.05 m / 2 mm
    lay = profiles.layout_from_params(s, {"n_resonators": 20, "spacing_start": 1.0,
                                          "spacing_end": 1.0, "height_c0": 1.0, "height_c1": 0.5,
                                          "height_c2": 0.5, "height_c3": 0.5})
    assert lay.length <= 0.05 * (1 + 1e-9)
    assert fabrication.check_layout(s, lay) == []


def test_bad_profile_requests_name_the_field():
    with pytest.raises(profiles.ProfileError, match="layout.profile"):
        profiles.parse_profile("wiggly")
    with pytest.raises(profiles.ProfileError, match="layout.profile"):
        profiles.search_space(fake_study(layout__profile="free"))  # 40 resonators: too many
    with pytest.raises(profiles.ProfileError, match="layout.count"):
        profiles.search_space(fake_study(layout__max_length=0.005))


def test_suggest_on_trial_matches_space():
    s = fake_study(resonator__head_mass=(0.0, 0.01))
    st_ = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=1))
    trial = st_.ask()
    params = profiles.suggest(trial, s)
    assert set(params) == set(profiles.search_space(s))
    assert fabrication.check_layout(s, profiles.layout_from_params(s, params)) == []
