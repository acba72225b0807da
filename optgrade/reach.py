"""Reachability before the search: can any admissible cell do what the goal asks, per frequency?

From the dispersion stage (the study's surrogate tables), every cell the layout limits allow is
sampled on a grid (heights and spacings over their ranges, head masses over theirs) and its local
Bloch modes are solved over the band. For each frequency the best cell is kept by the fraction
a uniform row of that cell could deliver into the wanted channel, an estimate from the local
modes alone (docs/physics.md section 6: a mode decaying as exp(-K'' x) in power 2 K'' per unit
length over a row of N cells of length a gives up 1 - exp(-2 K'' a N) of what enters):

- radiating channel or ``absorbed``: share_c (1 - exp(-2 K'' a N_max)), share_c the part of K''
  going into the channel, N_max the most cells the limits allow (count and row length);
- ``blocking`` / ``reflected_surface``: 1 in a local gap (no root on either branch), otherwise
  1 - exp(-2 K'' a N_max) of the most strongly decaying branch;
- ``transmitted_surface``: exp(-2 K'' a N_max) of the least decaying branch.

A frequency is *reachable* when that estimate reaches ``goal.required_fraction``. The estimate
ignores the entry reflection, the grading and multiple scattering: it tells where no admissible
cell can open the channel (the search cannot succeed there whatever it tries), not that a layout
reaching it exists. ``limiting`` names the limit the best cell sits on (its height, spacing or
head mass at an end of its range), which is the limit to widen.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade.channels import DECAY

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.dispersion import Dispersion
    from optgrade.study import Study

__all__ = ["Reach", "reachability"]

#: Grid of the sampled cells: heights x spacings x head masses.
N_HEIGHT, N_SPACING, N_HEAD = 33, 17, 5


@dataclass(frozen=True)
class Reach:
    """Per frequency: reachable or not, the best estimated fraction, the limit that binds."""

    channel: str
    required: float
    frequency_hz: np.ndarray
    best_share: np.ndarray
    reachable: np.ndarray
    limiting: list[str | None]
    best_cell: np.ndarray  # (n_freq, 3): height m, spacing m, head mass kg of the best cell
    shear_speed: float = float("nan")  # m/s, for the grating-condition hint

    def lines(self) -> list[str]:
        """Human summary: the reachable and unreachable frequency ranges with the binding
        limit (frequencies in kHz or Hz)."""
        from optgrade.plotting.trace import frequency_unit
        from optgrade.units import format_eng
        from optgrade.verdict import frequency_ranges

        fs, unit = frequency_unit(float(np.max(self.frequency_hz)))

        def span(a: float, b: float) -> str:
            return f"{a / fs:.4g}-{b / fs:.4g} {unit}" if b > a else f"{a / fs:.4g} {unit}"

        out = []
        ok = frequency_ranges(self.frequency_hz, self.reachable)
        out.append(f"{self.channel} reachable (>= {self.required:.0%} estimated from the local "
                   f"modes of the best admissible cell) at "
                   + (", ".join(span(a, b) for a, b in ok) or "no frequency of the band"))
        for a, b in frequency_ranges(self.frequency_hz, ~self.reachable):
            sel = (self.frequency_hz >= a) & (self.frequency_hz <= b)
            lims = sorted({lim for lim, s in zip(self.limiting, sel, strict=True) if s and lim})
            best = float(np.max(self.best_share[sel]))
            why = f"; the best cell sits on {', '.join(lims)}" if lims else ""
            if best < 1e-9 and self.channel.startswith("backward"):
                need = self.shear_speed / (2.0 * a)
                why = (f"; no admissible cell radiates backward: it needs a spacing above half "
                       f"the shear wavelength ({format_eng(need, 'm')} at {span(a, a)})")
            out.append(f"  at {span(a, b)} no admissible cell reaches it (best estimate "
                       f"{best:.2f}){why}")
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"channel": self.channel, "required_fraction": self.required,
                "frequency_hz": self.frequency_hz.tolist(),
                "reachable": [bool(v) for v in self.reachable],
                "best_share": [float(v) for v in self.best_share],
                "limiting": self.limiting,
                "best_cell": {"height_m": self.best_cell[:, 0].tolist(),
                              "spacing_m": self.best_cell[:, 1].tolist(),
                              "head_mass_kg": self.best_cell[:, 2].tolist()},
                "method": "local modes of sampled admissible cells, uniform-row estimate "
                          "(optgrade/reach.py)"}


def _cells(study: Study) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    lim, res = study.layout, study.resonator
    h = np.linspace(*lim.height, N_HEIGHT)
    a = np.linspace(*lim.spacing, N_SPACING)
    heads = (np.linspace(*res.head_mass, N_HEAD) if res.head_mass[1] > res.head_mass[0]
             else np.array([float(res.head_mass[0])]))
    hh, aa, mm = np.meshgrid(h, a, heads, indexing="ij")
    return hh.ravel(), aa.ravel(), mm.ravel()


def _estimate(channel: str, k: np.ndarray, shares: np.ndarray, a: np.ndarray,
              n_max: np.ndarray) -> np.ndarray:
    """Estimated fraction per (cell, frequency) for ``channel`` (module docstring)."""
    decay = 2.0 * np.abs(np.nan_to_num(k.imag, nan=0.0)) * a[None, :, None] * n_max[None, :, None]
    kept = np.exp(-np.minimum(decay, 700.0))
    has = np.isfinite(k)
    gap = ~has.any(axis=0)
    if channel in ("blocking", "reflected_surface"):
        lost = np.where(has, 1.0 - kept, 0.0).max(axis=0)
        return np.where(gap, 1.0, lost)
    if channel == "transmitted_surface":
        return np.where(has, kept, 0.0).max(axis=0)
    c = DECAY.index(channel)
    share = np.nan_to_num(shares[:, c], nan=0.0)
    return np.where(has, share * (1.0 - kept), 0.0).max(axis=0)


def _limit_of(study: Study, cell: tuple[float, float, float]) -> str | None:
    """Which range end the cell sits on (the limit to widen), or None."""
    lim, res = study.layout, study.resonator
    out = []
    for key, value, (lo, hi) in (("layout.height", cell[0], lim.height),
                                 ("layout.spacing", cell[1], lim.spacing),
                                 ("resonator.head_mass", cell[2], res.head_mass)):
        if hi <= lo:
            continue
        tol = 1e-9 * (hi - lo)
        if value >= hi - tol:
            out.append(f"{key} max")
        elif value <= lo + tol:
            out.append(f"{key} min")
    return ", ".join(out) or None


def reachability(study: Study, dispersion: Dispersion | None = None,
                 freq: np.ndarray | None = None) -> Reach:
    """Reachability of the study's goal channel over its band (module docstring).

    ``dispersion`` defaults to the study's own (``dispersion_for_study``: surrogate tables,
    built or read from the cache).
    """
    from optgrade.propagation import study_frequencies

    if dispersion is None:
        from optgrade.dispersion import dispersion_for_study

        dispersion = dispersion_for_study(study)
    f = study_frequencies(study) if freq is None else np.asarray(freq, float)
    h, a, m = _cells(study)
    lim = study.layout
    n_max = np.minimum(lim.count[1], np.floor(lim.max_length / a)).astype(float)
    modes = dispersion.local_modes(h, a, m, f)
    est = _estimate(study.goal.channel, np.asarray(modes.k), np.asarray(modes.shares), a, n_max)
    best = np.argmax(est, axis=0)
    best_share = est[best, np.arange(f.size)]
    cells = np.stack([h[best], a[best], m[best]], axis=1)
    req = float(study.goal.required_fraction)
    reachable = best_share >= req
    limiting = [None if ok else _limit_of(study, tuple(c))
                for ok, c in zip(reachable, cells, strict=True)]
    if study.goal.channel.startswith("backward"):
        # Where no cell radiates backward at all the tie is broken by argmax at the first
        # cell, whose limits mean nothing; the physical limit is the grating condition
        # (module docstring of tests/test_reach.py): a bound Bloch wavenumber is at most pi/a,
        # so the folded harmonic enters the shear cone only for a > lambda_T / 2.
        dead = best_share < 1e-9
        for i in np.flatnonzero(dead):
            limiting[i] = "layout.spacing max"
    return Reach(study.goal.channel, req, f, best_share, reachable, limiting, cells,
                 float(study.substrate.ct))
