"""Study loading and validation (optgrade.study).

Checks against outside references: the unit conversions (SI brochure), the isotropic relations
(Achenbach 1973), and the first axial rod resonance f1 = c_bar / (4 L) of a fixed-free bar
(R. D. Blevins, *Formulas for Natural Frequency and Mode Shape*, 1979; physics.md section 4),
which sets the band-reach rule.
"""

import math
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from optgrade.errors import StudyError
from optgrade.materials import get_material
from optgrade.study import (
    REACH_HIGH,
    REACH_LOW,
    Study,
    first_resonance_range,
    load_study,
    study_from_dict,
    study_from_text,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]
BASE = (ROOT / "tests" / "study_corpus" / "VALID_BASE.txt").read_text()


def _with(old: str, new: str) -> str:
    assert old in BASE
    return BASE.replace(old, new, 1)


@pytest.mark.parametrize("path", sorted((ROOT / "studies").glob("*.toml")), ids=lambda p: p.name)
def test_example_studies_load(path):
    study = load_study(path)
    assert isinstance(study, Study)
    assert "invented" in study.meta.description.lower()
    assert study.source_sha256 and len(study.source_sha256) == 64


def test_site_example_carries_the_caution():
    study = load_study(ROOT / "studies" / "site_ground_barrier.toml")
    assert study.meta.scale == "site"
    text = study.meta.description.lower()
    for phrase in ("simplified model", "layering", "qualified engineer", "local codes"):
        assert phrase in text


def test_resolved_values_are_si():
    """Units converted to SI (SI brochure): mm -> m, kHz -> Hz; library constants resolved."""
    study = study_from_text(BASE)
    assert study.resonator.diameter == pytest.approx(1e-3)
    assert study.layout.height == pytest.approx((4e-3, 12e-3))
    assert study.layout.height_step == pytest.approx(5e-5)
    assert study.goal.band == pytest.approx((100e3, 200e3))
    al = get_material("aluminium_6061")
    assert study.substrate.density == al.density
    assert study.substrate.youngs_modulus == al.youngs_modulus
    assert study.resonator.head_mass == (0.0, 0.0)
    assert study.goal.n_frequencies == 128
    assert study.meta.scale == "bench"
    assert study.search.batch_size == 4 * study.search.workers


def test_explicit_speeds_override_the_library():
    """Explicit cl, ct, density replace the library's; E and nu follow from the isotropic
    relations nu = (cL^2 - 2 cT^2)/(2 (cL^2 - cT^2)), E = 2 rho cT^2 (1 + nu) (Achenbach 1973)."""
    text = _with('[substrate]\nmaterial = "aluminium_6061"',
                 '[substrate]\nmaterial = "aluminium_6061"\ndensity = "2800 kg/m^3"\n'
                 'cl = "6000 m/s"\nct = "3000 m/s"')
    sub = study_from_text(text).substrate
    assert (sub.density, sub.cl, sub.ct) == (2800.0, 6000.0, 3000.0)
    nu = (6000.0**2 - 2 * 3000.0**2) / (2 * (6000.0**2 - 3000.0**2))
    assert sub.poisson == pytest.approx(nu)
    assert sub.youngs_modulus == pytest.approx(2 * 2800.0 * 3000.0**2 * (1 + nu))
    # Viktorov (1967): cR/cT ~ (0.87 + 1.12 nu)/(1 + nu) within 0.5 %
    assert sub.cr / sub.ct == pytest.approx((0.87 + 1.12 * nu) / (1 + nu), rel=0.005)


def test_explicit_modulus_overrides_only_what_is_given():
    text = _with('diameter = "1 mm"', 'diameter = "1 mm"\nyoungs_modulus = "200 GPa"')
    res = study_from_text(text).resonator
    assert res.youngs_modulus == 200e9
    assert res.density == get_material("aluminium_6061").density


def test_substrate_without_library_uses_modulus_and_poisson():
    text = _with('[substrate]\nmaterial = "aluminium_6061"',
                 '[substrate]\ndensity = "7850 kg/m^3"\nyoungs_modulus = "205 GPa"\npoisson = 0.29')
    sub = study_from_text(text).substrate
    assert sub.material is None
    assert sub.ct == pytest.approx(math.sqrt(205e9 / (2 * 7850 * 1.29)))


def test_scale_is_inferred_from_soil_or_low_band():
    soil = _with('[substrate]\nmaterial = "aluminium_6061"',
                 '[substrate]\nmaterial = "medium_sand"')
    assert "scale" not in soil
    assert study_from_text(soil).meta.scale == "site"
    assert study_from_text(BASE).meta.scale == "bench"


def test_single_value_ranges_mean_fixed():
    text = _with('spacing = ["6 mm", "16 mm"]', 'spacing = "8 mm"')
    assert study_from_text(text).layout.spacing == (8e-3, 8e-3)


def test_first_resonance_range_matches_quarter_wave_formula():
    """Without head mass f1 = c_bar / (4 L) (Blevins 1979; physics.md section 4)."""
    study = study_from_text(BASE)
    c_bar = study.resonator.bar_speed
    f_low, f_high = first_resonance_range(study.resonator, study.layout.height)
    assert f_low == pytest.approx(c_bar / (4 * 12e-3), rel=1e-6)
    assert f_high == pytest.approx(c_bar / (4 * 4e-3), rel=1e-6)


def test_band_reach_rule_edges():
    """Band-reach rule: refused only when entirely below 0.2 x the lowest or entirely above
    2 x the highest first resonance (f1 = c_bar/(4 L), Blevins 1979)."""
    study = study_from_text(BASE)
    f_low, f_high = first_resonance_range(study.resonator, study.layout.height)

    def band(lo, hi):
        return _with('band = ["100 kHz", "200 kHz"]', f'band = ["{lo} Hz", "{hi} Hz"]')

    study_from_text(band(0.5 * REACH_LOW * f_low, 1.01 * REACH_LOW * f_low))  # just reaches
    with pytest.raises(StudyError, match="goal.band"):
        study_from_text(band(0.5 * REACH_LOW * f_low, 0.99 * REACH_LOW * f_low))
    study_from_text(band(0.99 * REACH_HIGH * f_high, 1.5 * REACH_HIGH * f_high))
    with pytest.raises(StudyError, match="goal.band"):
        study_from_text(band(1.01 * REACH_HIGH * f_high, 1.5 * REACH_HIGH * f_high))


def test_head_mass_lowers_the_reachable_band():
    """A tip mass lowers the first axial resonance ((kL) tan(kL) = m_rod/M, Blevins 1979),
    so a band unreachable by bare pins becomes valid with head masses."""
    low_band = _with('band = ["100 kHz", "200 kHz"]', 'band = ["5 kHz", "15 kHz"]')
    with pytest.raises(StudyError, match="entirely below"):
        study_from_text(low_band)
    study = study_from_text(low_band.replace('row_pitch = "4 mm"',
                                             'row_pitch = "4 mm"\nhead_mass = ["0 g", "2 g"]'))
    f_low, _ = first_resonance_range(study.resonator, study.layout.height)
    assert f_low < 0.2 * 105e3


def test_all_defects_reported_together():
    text = _with('diameter = "1 mm"', 'diameter = "1"').replace('trials = 100', 'trials = 0')
    with pytest.raises(StudyError) as info:
        study_from_text(text, source="x.toml")
    joined = "\n".join(info.value.messages)
    assert "x.toml: resonator.diameter:" in joined
    assert "x.toml: search.trials:" in joined


def test_messages_carry_line_numbers():
    text = _with('entry = "short"', 'entry = "middle"')
    with pytest.raises(StudyError) as info:
        study_from_text(text, source="s.toml")
    (message,) = info.value.messages
    line = int(message.rsplit("(line ", 1)[1].rstrip(")"))
    assert text.splitlines()[line - 1].startswith("entry")


def test_missing_file_and_directory(tmp_path):
    with pytest.raises(StudyError, match="no such file"):
        load_study(tmp_path / "absent.toml")
    with pytest.raises(StudyError, match="directory"):
        load_study(tmp_path)


def test_study_is_frozen():
    study = study_from_text(BASE)
    with pytest.raises(Exception):  # noqa: B017 - pydantic raises its ValidationError
        study.goal.n_frequencies = 3  # type: ignore[misc]


def test_to_si_dict_is_json_ready():
    import json

    data = study_from_text(BASE).to_si_dict()
    text = json.dumps(data, allow_nan=False)
    assert json.loads(text)["goal"]["band"] == [100e3, 200e3]


_WEIRD = st.one_of(
    st.integers(-10**12, 10**12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(max_size=12),
    st.sampled_from(["1 mm", "0 Hz", "-3 kHz", "1e40 m", "5 kg/m^3", "2 GPa", "30 deg", "nan Hz",
                     "mm", "1 mm mm", "3 m/s", "1/0 m", "1e-30 kg"]),
    st.lists(st.sampled_from(["1 mm", "2 mm", 3, "9 kHz", "x"]), max_size=4),
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
)


@settings(max_examples=150, deadline=None)
@given(section=st.sampled_from(["study", "substrate", "resonator", "layout", "goal",
                                "fabrication", "search"]),
       key=st.sampled_from(["name", "seed", "material", "density", "cl", "ct", "poisson",
                            "diameter", "row_pitch", "head_mass", "count", "height",
                            "height_step", "spacing", "band", "channel", "weights", "min_gap",
                            "trials", "objectives", "storage", "zzz"]),
       value=_WEIRD)
def test_any_single_bad_value_gives_study_error_not_a_crash(section, key, value):
    """Property: replacing any one value by arbitrary data yields a valid Study or a StudyError
    whose every message names the source and a field path, never another exception."""
    data = tomllib.loads(BASE)
    data[section][key] = value
    try:
        study_from_dict(data, source="fuzz.toml")
    except StudyError as exc:
        assert exc.messages
        for message in exc.messages:
            assert message.startswith("fuzz.toml: ")
            assert len(message.split(": ")) >= 3


@pytest.mark.parametrize("value, fragment", [
    ("60 %", "0.6 for 60 %"), ("60%", "0.6 for 60 %"), (60, "if you meant 60 %, write 0.6"),
    ("0.6", "not a string"),
])
def test_fraction_written_as_percentage_gets_a_clear_message(value, fragment):
    """Issue 15 item 8: a percentage (or a number as a string) for a fraction field is refused
    naming the field and the fraction it probably means (was pydantic's 'Input should be a
    valid number' / 'less than or equal to 1')."""
    from optgrade.study import study_from_dict, tomllib

    path = Path(__file__).resolve().parents[1] / "studies" / "bench_backward_shear.toml"
    data = tomllib.loads(path.read_text())
    data["goal"]["required_fraction"] = value
    with pytest.raises(StudyError, match="goal.required_fraction") as info:
        study_from_dict(data)
    assert fragment in str(info.value)
