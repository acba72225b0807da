"""The verdict on a layout: is the goal met, on how much of the band, and which limits bind.

One line an engineer can act on, written at the top of every output that reports a number
(``optgrade trace``, report.txt, result.json): the wanted channel's fraction per frequency
(the same measure the search scores: `optgrade.objectives.wanted_fraction`; for ``blocking``
the insertion effect against the bare ground) against ``goal.required_fraction``, the
frequency ranges where it is met, and the layout limits the layout sits on (count or row length
at the study's maximum, heights or spacings at an end of their range) with what to change.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation import Trace
    from optgrade.study import Study

__all__ = ["BindingLimit", "Verdict", "binding_limits", "frequency_ranges", "verdict"]

#: A value within this share of its range's width from an end counts as sitting on that end.
AT_LIMIT = 0.01


@dataclass(frozen=True)
class BindingLimit:
    """A study limit the layout sits on: the study key, what it is, what to change."""

    key: str
    text: str
    advice: str

    def to_dict(self) -> dict[str, str]:
        return {"key": self.key, "text": self.text, "advice": self.advice}


@dataclass(frozen=True)
class Verdict:
    """Goal met or not, per frequency and overall (see the module docstring)."""

    channel: str
    required: float
    propagation: str
    frequency: np.ndarray
    wanted: np.ndarray
    meets: np.ndarray
    limits: list[BindingLimit] = field(default_factory=list)

    @property
    def is_met(self) -> bool:
        """Met at every frequency of the band."""
        return bool(self.meets.all())

    @property
    def share_met(self) -> float:
        """Share of the band's frequencies where the requirement is met (0..1)."""
        return float(self.meets.mean()) if self.meets.size else 0.0

    def line(self) -> str:
        """The one-line verdict, e.g. ``GOAL NOT MET: backward_shear >= 60 % at 75 of 128
        frequencies (121-185 kHz); mean 0.52, worst 0.01 at 100 kHz [exact row model]``."""
        from optgrade.plotting.trace import frequency_unit

        fs, unit = frequency_unit(float(np.max(self.frequency)))
        head = "GOAL MET" if self.is_met else "GOAL NOT MET"
        ranges = frequency_ranges(self.frequency, self.meets)
        where = ", ".join(f"{a / fs:.4g}-{b / fs:.4g} {unit}" if b > a else f"{a / fs:.4g} {unit}"
                          for a, b in ranges) or "nowhere"
        i = int(np.argmin(self.wanted))
        model = {"scattering": "exact row model", "wkb": "WKB march"}.get(
            self.propagation, f"{self.propagation} model")
        return (f"{head}: {self.channel} >= {self.required:.0%} at {int(self.meets.sum())} of "
                f"{self.meets.size} frequencies ({where}); mean {float(self.wanted.mean()):.2f}, "
                f"worst {float(self.wanted[i]):.2f} at {self.frequency[i] / fs:.4g} {unit} "
                f"[{model}]")

    def limit_lines(self) -> list[str]:
        """One line per binding limit: what binds and what to change."""
        return [f"{lim.text}: {lim.advice}" for lim in self.limits]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (frequencies in Hz)."""
        return {
            "is_met": self.is_met, "channel": self.channel, "required_fraction": self.required,
            "share_of_band_met": self.share_met, "n_met": int(self.meets.sum()),
            "n_frequencies": int(self.meets.size),
            "met_ranges_hz": [[float(a), float(b)] for a, b in
                              frequency_ranges(self.frequency, self.meets)],
            "mean": float(self.wanted.mean()), "worst": float(self.wanted.min()),
            "propagation": self.propagation, "line": self.line(),
            "binding_limits": [lim.to_dict() for lim in self.limits],
        }


def frequency_ranges(freq: np.ndarray, mask: np.ndarray) -> list[tuple[float, float]]:
    """Contiguous runs of ``mask`` as (first, last) frequency pairs (Hz)."""
    out, start = [], None
    for i, m in enumerate(np.asarray(mask, bool)):
        if m and start is None:
            start = i
        if start is not None and (not m or i == mask.size - 1):
            end = i if m else i - 1
            out.append((float(freq[start]), float(freq[end])))
            start = None
    return out


def _at_end(value: float, lo: float, hi: float) -> str | None:
    """"max" / "min" when ``value`` sits within AT_LIMIT of an end of [lo, hi], else None."""
    tol = AT_LIMIT * max(hi - lo, 1e-300)
    if hi > lo and value >= hi - tol:
        return "max"
    if hi > lo and value <= lo + tol:
        return "min"
    return None


def binding_limits(study: Study, layout: Layout) -> list[BindingLimit]:
    """The layout limits ``layout`` sits on, with advice (lengths in mm or m as they read)."""
    from optgrade.plotting.trace import length_unit

    lim = study.layout
    s, unit = length_unit(max(float(lim.max_length), float(lim.height[1])))
    out = []
    if layout.n_resonators >= lim.count[1]:
        out.append(BindingLimit("layout.count", f"count at its maximum ({lim.count[1]})",
                                "allow more resonators (raise the upper end of layout.count)"))
    if float(layout.length) >= (1.0 - AT_LIMIT) * float(lim.max_length):
        out.append(BindingLimit(
            "layout.max_length",
            f"row length {layout.length / s:.4g} {unit} at its maximum "
            f"{lim.max_length / s:.4g} {unit}",
            "a longer row has room for a gentler grading (raise layout.max_length)"))
    h = np.asarray(layout.height, float)
    for name, value in (("shortest", float(h.min())), ("tallest", float(h.max()))):
        end = _at_end(value, *lim.height)
        if end is not None and (name == "shortest") == (end == "min"):
            bound = lim.height[0] if end == "min" else lim.height[1]
            verb = "lower" if end == "min" else "raise"
            out.append(BindingLimit(
                "layout.height",
                f"{name} rod {value / s:.4g} {unit} at the {end} of layout.height "
                f"({bound / s:.4g} {unit})",
                f"{verb} that end of layout.height to reach "
                f"{'higher' if end == 'min' else 'lower'} rod resonances"))
    a = np.asarray(layout.spacing, float)
    for end, value in (("min", float(a.min())), ("max", float(a.max()))):
        if _at_end(value, *lim.spacing) == end:
            bound = lim.spacing[0] if end == "min" else lim.spacing[1]
            out.append(BindingLimit(
                "layout.spacing",
                f"spacing {value / s:.4g} {unit} at the {end} of layout.spacing "
                f"({bound / s:.4g} {unit})",
                f"{'lower' if end == 'min' else 'raise'} that end of layout.spacing"))
    return out


def verdict_of_fractions(study: Study, layout: Layout, frequency: np.ndarray,
                         fractions: dict[str, np.ndarray], propagation: str) -> Verdict:
    """The verdict on channel fractions that do not come as a `Trace` (the full-wave check's
    own split): the same judgement as `verdict`."""
    from types import SimpleNamespace

    return verdict(study, layout, SimpleNamespace(frequency=frequency, fractions=fractions,
                                                  propagation=propagation))


def verdict(study: Study, layout: Layout, trace: Trace) -> Verdict:
    """The verdict on ``layout`` from its ``trace`` (any propagation model)."""
    from optgrade.objectives import wanted_fraction

    wanted = np.nan_to_num(np.asarray(
        wanted_fraction(trace, study.goal.channel, layout, study), float), nan=0.0)
    req = float(study.goal.required_fraction)
    return Verdict(study.goal.channel, req, trace.propagation,
                   np.asarray(trace.frequency, float), wanted, wanted >= req,
                   binding_limits(study, layout))


def far_face_lines(study: Study, trace: Trace) -> list[str]:
    """The far-face verdict (a study with ``substrate.thickness``): where the converted power
    arrives on the block's far face and, with a ``[goal.far_face]`` zone, how much of it lands
    inside; empty for a half-space. Lengths in mm on the bench (docs/physics.md section 14)."""
    face = getattr(trace, "far_face", None)
    if face is None:
        return []
    from optgrade.channels import RADIATING
    from optgrade.propagation._farface import zone_fraction
    from optgrade.units import format_eng

    how = ("map from the exact model's forces" if face.method == "map"
           else "ray estimate: position + H tan(angle)")
    lines = [f"FAR FACE ({format_eng(face.depth, 'm')} block, first arrival; {how})"]
    zone = study.goal.far_face
    if zone is not None:
        inside = zone_fraction(face, trace.fractions, zone.x_range)
        mean = float(np.nanmean(inside)) if np.isfinite(inside).any() else 0.0
        ok = mean >= 0.5 if zone.mode == "target" else mean <= 0.5
        word = "inside" if zone.mode == "target" else "inside the avoided"
        from optgrade.plotting.trace import length_unit

        ls, lunit = length_unit(max(abs(float(v)) for v in zone.x_range))
        lines.append(
            f"  {'ZONE OK' if ok else 'ZONE NOT OK'}: {mean:.0%} of the converted power arrives "
            f"{word} zone {zone.x_range[0] / ls:.4g} .. {zone.x_range[1] / ls:.4g} {lunit} "
            "(band mean)")
    for c in RADIATING:
        frac = np.asarray(trace.fractions[c], float)
        if float(np.mean(frac)) < 0.01:
            continue
        arr = np.asarray(face.arrival[c], float)
        wts = np.where(np.isfinite(arr), frac, 0.0)
        if wts.sum() <= 0:
            continue
        mean_x = float(np.sum(np.nan_to_num(arr) * wts) / wts.sum())
        lo, hi = float(np.nanmin(arr)), float(np.nanmax(arr))
        lines.append(f"  {c}: band-mean {float(np.mean(frac)):.2f} of the incident power, "
                     f"arriving at {format_eng(mean_x, 'm')} (power-weighted; "
                     f"{format_eng(lo, 'm')} .. {format_eng(hi, 'm')} over the band)")
    lines.append("  left out: the reflection at the far face back to the top (second bounce) "
                 "and the side faces")
    return lines
