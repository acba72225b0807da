"""The verdict line (issue 15 item 2): goal met or not, where, and which limits bind.

Worked examples built by hand: a stand-in trace whose wanted fraction is known at every
frequency (tests/search_helpers.fake_trace: backward shear 1/3 per rod resonance within 3 %),
and layouts placed on the study's limits on purpose.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from search_helpers import fake_trace

from optgrade.layout import layout_from_cells
from optgrade.study import load_study
from optgrade.verdict import frequency_ranges, verdict

BENCH = Path(__file__).resolve().parents[1] / "studies" / "bench_backward_shear.toml"


def test_frequency_ranges_are_the_runs_of_the_mask():
    f = np.arange(10.0)
    mask = np.array([0, 1, 1, 0, 0, 1, 0, 1, 1, 1], bool)
    assert frequency_ranges(f, mask) == [(1.0, 2.0), (5.0, 5.0), (7.0, 9.0)]
    assert frequency_ranges(f, np.zeros(10, bool)) == []


def test_verdict_counts_the_frequencies_meeting_the_requirement():
    """Rods resonating at 120, 150 kHz (c / 4h with c = 5000 m/s): each frequency within 3 %
    of a resonance converts 1/3 of the power (fake_trace), below the study's 60 %: not met
    anywhere; with required_fraction 0.3 it is met exactly where the stand-in converts."""
    study = load_study(BENCH)
    heights = 5000.0 / (4.0 * np.array([120e3, 150e3]))
    lay = layout_from_cells(heights, np.full(2, 10e-3), study.resonator.diameter)
    tr = fake_trace(study, lay)
    v = verdict(study, lay, tr)
    assert not v.is_met and v.meets.sum() == 0
    assert v.line().startswith("GOAL NOT MET: backward_shear >= 60% at 0 of 128")
    easy = study.model_copy(update={"goal": study.goal.model_copy(
        update={"required_fraction": 0.3})})
    v = verdict(easy, lay, tr)
    converts = tr.fractions["backward_shear"] >= 0.3
    assert converts.sum() > 0
    np.testing.assert_array_equal(v.meets, converts)
    assert v.to_dict()["n_met"] == int(converts.sum())
    assert "kHz" in v.line()


def test_binding_limits_name_the_key_and_the_change():
    """A row at the largest count, both height ends and the smallest spacing (bench study:
    count 20..60, height 4..12 mm, spacing 6..16 mm) lists those four limits; a row inside
    every range lists none."""
    study = load_study(BENCH)
    d = study.resonator.diameter
    on = layout_from_cells(np.linspace(4e-3, 12e-3, 60), np.full(60, 6e-3), d)
    keys = [lim.key for lim in verdict(study, on, fake_trace(study, on)).limits]
    assert keys.count("layout.count") == 1 and keys.count("layout.height") == 2
    assert "layout.spacing" in keys
    inside = layout_from_cells(np.linspace(5e-3, 11e-3, 30), np.full(30, 10e-3), d)
    assert verdict(study, inside, fake_trace(study, inside)).limits == []
