"""``Trace.to_frame()``: the trace as a pandas DataFrame (optional extra ``optgrade[frames]``).

The trace used is the WKB march through three identical cells with a hand-made lossy mode, whose
answer is known in closed form: entry reflection R0 = ((K' - kR) / (K' + kR))^2 (the march's
impedance-step estimate, DEVELOPERS.md) and transmitted power (1 - R0) exp(-2 K'' L) (exponential
decay of power along the path; common practice), the rest split by the mode's shares.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass

import numpy as np
import pytest

from optgrade.channels import CHANNELS
from optgrade.propagation import march

CR = 2900.0  # m/s, invented Rayleigh speed
F = np.array([100e3, 120e3])
A = 5e-3  # m, cell length


@dataclass(frozen=True)
class _Modes:
    k: np.ndarray
    shares: np.ndarray
    angle: np.ndarray


def _trace():
    kr = 2 * np.pi * F / CR
    k = np.full((2, 3, F.size), np.nan + 1j * np.nan)
    k[0] = 1.2 * kr + 1j * 4.0  # K' = 1.2 kR, K'' = 4 1/m on the lower branch
    shares = np.zeros((2, 5, 3, F.size))
    shares[0, 2] = 0.75  # backward shear
    shares[0, 4] = 0.25  # absorbed
    angle = np.full((2, 4, 3, F.size), np.nan)
    angle[0, 2] = -0.5
    x = np.array([0.0, A, 2 * A])
    return march(_Modes(k, shares, angle), x, np.full(3, A), F, CR)


def test_to_frame_holds_every_channel_and_the_closed_form():
    pd = pytest.importorskip("pandas")
    tr = _trace()
    frame = tr.to_frame()
    assert isinstance(frame, pd.DataFrame)
    assert frame.index.name == "frequency_hz"
    assert np.array_equal(frame.index.to_numpy(), F)
    r0 = ((1.2 - 1.0) / (1.2 + 1.0)) ** 2
    t = (1 - r0) * np.exp(-2 * 4.0 * 3 * A)
    assert np.allclose(frame["transmitted_surface_fraction"], t, rtol=1e-12, atol=0)
    assert np.allclose(frame["reflected_surface_fraction"], r0, rtol=1e-12, atol=0)
    assert np.allclose(frame["backward_shear_fraction"], 0.75 * (1 - r0 - t), rtol=1e-12)
    total = frame[[f"{c}_fraction" for c in CHANNELS]].sum(axis=1)
    assert np.allclose(total, 1.0, rtol=0, atol=1e-12)
    for c in CHANNELS:
        assert np.array_equal(frame[f"{c}_fraction"], tr.fractions[c])
        assert np.array_equal(frame[f"{c}_position_m"], tr.position[c], equal_nan=True)
        assert np.array_equal(frame[f"{c}_angle_deg"], tr.angle[c], equal_nan=True)
    assert frame["is_adiabatic"].dtype == bool
    assert list(frame["branch"]) == [0, 0]
    assert np.array_equal(frame["phase_rad"], tr.phase, equal_nan=True)


def test_to_frame_without_pandas_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "pandas", None)  # import pandas now raises ImportError
    with pytest.raises(ImportError, match=r"optgrade\[frames\]"):
        _trace().to_frame()
