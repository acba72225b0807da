"""Reachability before the search (issue 15 item 1, optgrade/reach.py).

Checks against things outside the estimate itself:

- the grating condition for backward radiation from a periodic row (the folded harmonic
  K - 2 pi/a must enter the shear cone, |K - 2 pi/a| < kT; with the bound Bloch wavenumber at most
  pi/a this needs a > lambda_T / 2: the grating equation, any text on periodic gratings, e.g.
  Maradudin and Mills 1976 for surface waves; stated from memory): a study whose spacings all stay
  below half the shear wavelength at the band top can reach backward shear nowhere;
- the same estimate from the direct band solver (lattice sums summed exactly, no tables) at a
  few frequencies: the surrogate's tables must not change the answer;
- the JSON shape the issue asks for (``reach.frequency_hz``, ``reachable``, ``best_share``,
  ``limiting``).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import optgrade.reach as reach_mod
from optgrade.cli import main
from optgrade.dispersion import DirectDispersion
from optgrade.reach import reachability
from optgrade.study import load_study

STUDIES = Path(__file__).resolve().parents[1] / "studies"
BENCH = STUDIES / "bench_backward_shear.toml"


def _with(study, **layout):
    return study.model_copy(update={"layout": study.layout.model_copy(update=layout)})


def test_backward_shear_unreachable_below_the_grating_condition(monkeypatch):
    # a coarse cell grid through the direct band solver: no dispersion tables to build for
    # the narrowed spacing range (the estimate's logic is the same on any grid)
    monkeypatch.setattr(reach_mod, "N_HEIGHT", 7)
    monkeypatch.setattr(reach_mod, "N_SPACING", 4)
    study = load_study(BENCH)
    lam_t = study.substrate.ct / study.goal.band[1]
    tight = _with(study, spacing=(0.6e-3 + study.resonator.diameter, 0.45 * lam_t))
    r = reachability(tight, dispersion=DirectDispersion.from_study(tight),
                     freq=np.linspace(*study.goal.band, 9))
    assert not r.reachable.any()
    assert np.all(r.best_share < 1e-6), r.best_share
    assert all(lim is not None and "layout.spacing max" in lim for lim in r.limiting)


def test_bench_example_is_reachable_somewhere_and_names_a_limit_where_not():
    study = load_study(BENCH)
    r = reachability(study)
    assert r.reachable.any()
    assert r.frequency_hz.size == r.best_share.size == len(r.limiting)
    assert np.all((r.best_share >= 0) & (r.best_share <= 1 + 1e-12))
    for ok, lim in zip(r.reachable, r.limiting, strict=True):
        assert (lim is None) == bool(ok) or not ok


def test_surrogate_and_direct_solver_give_the_same_reachability(monkeypatch):
    monkeypatch.setattr(reach_mod, "N_HEIGHT", 7)
    monkeypatch.setattr(reach_mod, "N_SPACING", 4)
    study = load_study(BENCH)
    f = np.array([110e3, 150e3, 190e3])
    fast = reachability(study, freq=f)
    direct = reachability(study, dispersion=DirectDispersion.from_study(study), freq=f)
    np.testing.assert_allclose(fast.best_share, direct.best_share, atol=0.02)
    assert np.array_equal(fast.reachable, direct.reachable)


@pytest.mark.parametrize("name", ["bench_backward_shear.toml"])
def test_check_json_carries_reach(name, capsys):
    assert main(["check", str(STUDIES / name), "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    reach = payload["reach"]
    n = len(reach["frequency_hz"])
    assert n > 10
    assert len(reach["reachable"]) == len(reach["best_share"]) == len(reach["limiting"]) == n
    assert all(isinstance(v, bool) for v in reach["reachable"])


def test_check_prints_reachable_ranges_in_khz(capsys):
    assert main(["check", str(BENCH)]) == 0
    out = capsys.readouterr().out
    assert "reachability" in out
    assert "backward_shear reachable" in out and "kHz" in out
    assert "e+05 Hz" not in out
