"""Small stand-ins shared by the search-area tests (fake studies and a fake trace).

Nothing here is part of the package: the fakes follow the contracts in DEVELOPERS.md so the
profiles, objectives and search loop can be tested without the dispersion stages.
"""

from __future__ import annotations

import copy
from types import SimpleNamespace

import numpy as np

from optgrade.channels import CHANNELS
from optgrade.propagation import Trace

__all__ = ["CHANNELS", "clone", "fake_pipeline", "fake_study", "fake_trace", "slow_pipeline"]


def fake_study(**over) -> SimpleNamespace:
    """An invented bench-scale study (aluminium block, steel pins), SI units, contract fields."""
    s = SimpleNamespace(
        meta=SimpleNamespace(name="fake", seed=7, description="invented test study", scale="bench"),
        substrate=SimpleNamespace(material="aluminium", density=2700.0, youngs_modulus=70e9,
                                  poisson=0.33, cl=6320.0, ct=3130.0, cr=2900.0, loss_factor=0.0),
        resonator=SimpleNamespace(material="steel", youngs_modulus=200e9, density=7850.0,
                                  poisson=0.29, loss_factor=0.0, diameter=1e-3, row_pitch=3e-3,
                                  head_mass=(0.0, 0.0), head_mass_step=1e-6),
        layout=SimpleNamespace(count=(10, 40), height=(2e-3, 12e-3), height_step=0.1e-3,
                               spacing=(2e-3, 4e-3), profile="spline", max_length=0.12,
                               entry="tall", position_step=0.1e-3),
        goal=SimpleNamespace(band=(100e3, 300e3), n_frequencies=32, channel="backward_shear",
                             required_fraction=0.5, angle_window_deg=None,
                             weights={"channel": 1.0}, model="lattice"),
        fabrication=SimpleNamespace(min_gap=0.5e-3, height_tolerance=0.02e-3, slenderness_max=20.0),
        search=SimpleNamespace(trials=40, workers=1, sampler="tpe", storage=None,
                               objectives=[], batch_size=4),
    )
    for key, value in over.items():
        section, name = key.split("__")
        setattr(getattr(s, section), name, value)
    return s


def clone(study, **over):
    s = copy.deepcopy(study)
    for key, value in over.items():
        section, name = key.split("__")
        setattr(getattr(s, section), name, value)
    return s


def fake_trace(study, layout, surrogate=None):
    """Stand-in for optgrade.propagation._wkb.trace_study with a simple, known answer.

    Each resonator of height h is taken to convert the surface wave to backward shear in a
    band around f_r = c / (4 h) (quarter-wave rod, c = 5000 m/s invented); a frequency is
    converted if some resonator sits within 3 % of it. Fractions sum to 1 by construction.
    """
    f = np.linspace(*study.goal.band, study.goal.n_frequencies)
    fr = 5000.0 / (4.0 * np.asarray(layout.height))
    hit = np.abs(f[:, None] / fr[None, :] - 1.0) < 0.03
    conv = np.clip(hit.sum(axis=1) / 3.0, 0.0, 0.9)
    fr_dict = {c: np.zeros_like(f) for c in CHANNELS}
    fr_dict["backward_shear"] = conv
    fr_dict["transmitted_surface"] = 1.0 - conv
    first = np.where(hit.any(axis=1), np.asarray(layout.x)[np.argmax(hit, axis=1)], np.nan)
    pos = {c: np.full_like(f, np.nan) for c in CHANNELS}
    pos["backward_shear"] = first
    ang = {c: np.full_like(f, np.nan) for c in CHANNELS}
    ang["backward_shear"] = np.where(conv > 0, -30.0 - 20.0 * (f - f[0]) / (f[-1] - f[0]), np.nan)
    eps = np.full_like(f, 0.05)
    return Trace(frequency=f, fractions=fr_dict, position=pos, angle=ang, eps_max=eps,
                 is_adiabatic=eps < 0.1, branch=np.zeros(f.size, np.int8),
                 turning_position=np.full_like(f, np.nan), entry_reflection=np.zeros_like(f),
                 phase=np.full_like(f, np.nan))


def fake_pipeline(study):
    """Stand-in for the (model, trace_fn) pair of optgrade.search.make_context (no model)."""
    return None, lambda layout: fake_trace(study, layout)


def slow_pipeline(study):
    """Like fake_pipeline but each trace takes 50 ms (to kill workers mid-run)."""
    import time

    def trace_fn(layout):
        time.sleep(0.05)
        return fake_trace(study, layout)

    return None, trace_fn
