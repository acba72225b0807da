"""The WKB march against the full-wave check on held-out kinds of layout (issue 13).

Run by hand (not in CI; a few minutes on two shared cores):

    python benchmarks/wkb_against_fullwave.py [--quality fast|normal] [--json FILE] [--case NAME]

For each layout: the band-mean |WKB - full-wave| per channel (the WKB trace of the 2-D line
model, ``trace_study`` with the line surrogate), the same for the exact row model, and how well
the two validity flags cover the frequencies where the WKB march is off the full-wave by more
than 0.3 on some channel: ``eps > 0.1`` (the march's own adiabaticity indicator) and
``|WKB - exact| > 0.1`` on some channel (the flag trace.json carries as ``wkb.disagrees``).

Layouts (invented scenarios on the bench example's aluminium block and pins, band 100-200 kHz,
unless noted): the kinds the issue names: tall first, a step halfway, packed into half the
length, a row whose band crosses the rod anti-resonance of some of its rods, spacing longer than
a Rayleigh wavelength (grating regime), a short row, and the site example's posts with head
masses; plus the example's best layout.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import fullwave_agreement as fa  # noqa: E402


def _resonant(f_first_hz: np.ndarray, spacing_mm: float):
    """Pins whose first axial resonance c_bar / (4 L) runs through ``f_first_hz``."""
    def build(study):
        from optgrade.layout import layout_from_cells

        h = float(study.resonator.bar_speed) / (4.0 * np.asarray(f_first_hz))
        return layout_from_cells(h, spacing_mm * 1e-3, float(study.resonator.diameter), 0.0,
                                 0.02e-3)
    return build


#: wider layout limits for the held-out rows (they are not bound by the example's search limits)
WIDE = {"layout": {"spacing": ["3 mm", "17 mm"], "height": ["2 mm", "20 mm"]}}

CASES = (
    fa.Case("bench_best", "bench_backward_shear.toml", {},
            fa._table("bench_backward_shear_best.csv"), "bench example, best of its search"),
    fa.Case("tall_first", "bench_backward_shear.toml", WIDE, fa._pins(np.linspace(11, 5, 30), 8.0),
            "30 pins 11 -> 5 mm at 8 mm, tall end first"),
    fa.Case("step_halfway", "bench_backward_shear.toml", WIDE,
            fa._pins(np.r_[np.full(20, 6.0), np.full(20, 10.0)], 8.0),
            "40 pins, 6 mm then 10 mm, at 8 mm"),
    fa.Case("half_length", "bench_backward_shear.toml", WIDE, fa._pins(np.linspace(5, 11, 40), 4.0),
            "40 pins 5 -> 11 mm packed at 4 mm"),
    fa.Case("antiresonance", "bench_backward_shear.toml", WIDE,
            _resonant(np.linspace(260e3, 80e3, 40), 6.0),
            "40 pins, first resonance 260 -> 80 kHz along the row (tall end last), 6 mm"),
    fa.Case("grating", "bench_backward_shear.toml", WIDE, fa._pins(np.full(20, 4.0), 16.0),
            "20 short pins 4 mm at 16 mm (kR > 2 pi / a above about 180 kHz)"),
    fa.Case("short_row", "bench_backward_shear.toml", WIDE, fa._pins(np.linspace(11, 6, 6), 4.0),
            "6 pins 11 -> 6 mm at 4 mm"),
    fa.Case("site_heads", "site_ground_barrier.toml", {"substrate": {"loss_factor": 0.0}},
            fa._site_heads, "10 posts 3 m, head masses 0.8 -> 2.4 t at 2.5 m, lossless sand"),
)


def run_case(case, quality: str) -> dict:
    from optgrade.channels import CHANNELS
    from optgrade.dispersion import surrogate_for_study
    from optgrade.propagation import trace_study

    study = fa.study_of(case)
    layout = case.build(study)
    lo, hi = (float(v) for v in study.goal.band)
    freq = np.linspace(lo, hi, int(study.goal.n_frequencies))
    wkb = trace_study(study, layout, surrogate_for_study(study, model="line"))
    ex, _ = fa.exact_fractions(study, layout, freq)
    fw = fa.fullwave(study, layout, freq, quality)["fractions"]
    err_wkb = np.array([np.abs(np.asarray(wkb.fractions[c]) - fw[c]) for c in CHANNELS])
    err_ex = np.array([np.abs(ex[c] - fw[c]) for c in CHANNELS])
    disagree = np.max([np.abs(np.asarray(wkb.fractions[c]) - ex[c]) for c in CHANNELS],
                      axis=0) > 0.1
    eps_flag = ~np.asarray(wkb.is_adiabatic, bool)
    off = err_wkb.max(axis=0) > 0.3
    return {
        "case": case.name, "note": case.note, "n_freq": int(freq.size),
        "wkb_band_mean": dict(zip(CHANNELS, err_wkb.mean(axis=1).round(4).tolist(), strict=True)),
        "exact_band_mean": dict(zip(CHANNELS, err_ex.mean(axis=1).round(4).tolist(), strict=True)),
        "wkb_worst_channel": float(err_wkb.mean(axis=1).max()),
        "exact_worst_channel": float(err_ex.mean(axis=1).max()),
        "n_off_0.3": int(off.sum()),
        "flagged_by_disagreement": int((off & disagree).sum()),
        "flagged_by_eps": int((off & eps_flag).sum()),
        "n_disagree": int(disagree.sum()),
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quality", default="fast", choices=["fast", "normal"])
    p.add_argument("--json", metavar="FILE")
    p.add_argument("--case", action="append", choices=[c.name for c in CASES],
                   help="run only this layout (repeatable; default: all)")
    args = p.parse_args(argv)
    from optgrade.fullwave import _kernel

    _kernel.warm_up()
    rows = []
    print("| layout | WKB worst channel (band mean) | exact worst channel | points off > 0.3 "
          "| flagged by disagreement | flagged by eps |")
    print("| --- | --- | --- | --- | --- | --- |")
    for case in CASES:
        if args.case and case.name not in args.case:
            continue
        r = run_case(case, args.quality)
        rows.append(r)
        print(f"| {case.name} | {r['wkb_worst_channel']:.3f} | {r['exact_worst_channel']:.3f} | "
              f"{r['n_off_0.3']} of {r['n_freq']} | {r['flagged_by_disagreement']} | "
              f"{r['flagged_by_eps']} |", flush=True)
    off = sum(r["n_off_0.3"] for r in rows)
    by_d = sum(r["flagged_by_disagreement"] for r in rows)
    by_e = sum(r["flagged_by_eps"] for r in rows)
    print(f"total: {off} points off by > 0.3; disagreement flag covers {by_d} "
          f"({100 * by_d / max(off, 1):.0f} %), eps flag {by_e} ({100 * by_e / max(off, 1):.0f} %)")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
