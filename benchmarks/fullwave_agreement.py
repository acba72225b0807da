"""Agreement of the full-wave check with the exact row model (issue 14).

Run by hand (not in CI; about 10-20 min for everything on two shared cores):

    python benchmarks/fullwave_agreement.py [--quality fast normal] [--only NAME ...]
                                            [--json FILE]

For every layout below, the same 2-D line idealisation is computed twice:

- the full-wave check (``optgrade.fullwave``: staggered-grid time-domain run with the rows
  smeared along y, a run with the rods and a reference run on the bare substrate, channel split
  from the receiver box), on the fast and/or normal grid, with its self-checks;
- the exact multiple-scattering row model (``propagation_model(study, "scattering",
  model="line")``, docs/physics.md section 13): strips of width d, forces per unit length
  Z / b, the same axial rods and head masses.

Printed per layout: the band-mean absolute difference per channel, mean over the study's
frequencies of |full-wave - exact| (the issue's target: <= 0.03 per channel on the normal grid),
the full-wave's box energy balance and self-check result, and, on a lossless substrate, the
independent bulk split from the radiation of the run's own rod base forces
(``rod_force_radiation``): the largest band-mean difference between that split and the
receiver-line split.

Layouts (all invented scenarios, not real rigs or sites):

- ``bench_best``, ``site_best``: the best trials of a search of the two example studies
  (benchmarks/layouts/*_best.csv; the site example has a lossy substrate, eta 0.04);
- four held-out layouts written here, never searched for: ``uniform_in_gap`` (24 equal pins
  whose resonance, 101 kHz, sits at the bottom of the band, so the band lies in and above the
  hybridisation gap), ``graded_36`` (36 pins 5 -> 11 mm at 10 mm), ``tall_first`` (30 pins
  11 -> 5 mm at 8 mm, the tall end meets the wave first), all on the bench example's block,
  pins and band; ``site_heads`` (10 spruce posts 3 m with steel head masses 800 -> 2400 kg at
  2.5 m on the site example's sand, substrate without loss, post loss 0.02 kept).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10 (the tomli backport)
    import tomli as tomllib

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
TARGET = 0.03  # issue 14: band-mean |full-wave - exact| per channel, normal grid


@dataclass(frozen=True)
class Case:
    """One layout: the study it belongs to, study overrides, and how to build the layout."""

    name: str
    study_file: str
    overrides: dict[str, dict[str, Any]]
    build: Callable[[Any], Any]
    note: str


def _table(name: str) -> Callable[[Any], Any]:
    def build(study: Any) -> Any:
        from optgrade.layout import read_table

        return read_table(HERE / "layouts" / name)
    return build


def _pins(heights_mm: np.ndarray, spacing_mm: float) -> Callable[[Any], Any]:
    def build(study: Any) -> Any:
        from optgrade.layout import layout_from_cells

        return layout_from_cells(np.asarray(heights_mm) * 1e-3, spacing_mm * 1e-3,
                                 float(study.resonator.diameter), 0.0, 0.02e-3)
    return build


def _site_heads(study: Any) -> Any:
    from optgrade.layout import layout_from_cells

    n = 10
    return layout_from_cells(np.full(n, 3.0), 2.5, float(study.resonator.diameter),
                             np.linspace(800.0, 2400.0, n), 0.05)


CASES = (
    Case("bench_best", "bench_backward_shear.toml", {}, _table("bench_backward_shear_best.csv"),
         "bench example, best of its search (59 pins)"),
    Case("site_best", "site_ground_barrier.toml", {}, _table("site_ground_barrier_best.csv"),
         "site example, best of its search (16 posts, lossy sand)"),
    Case("uniform_in_gap", "bench_backward_shear.toml", {}, _pins(np.full(24, 12.5), 8.0),
         "24 pins 12.5 mm at 8 mm (resonance 101 kHz)"),
    Case("graded_36", "bench_backward_shear.toml", {}, _pins(np.linspace(5, 11, 36), 10.0),
         "36 pins 5 -> 11 mm at 10 mm"),
    Case("tall_first", "bench_backward_shear.toml", {}, _pins(np.linspace(11, 5, 30), 8.0),
         "30 pins 11 -> 5 mm at 8 mm, tall end first"),
    Case("site_heads", "site_ground_barrier.toml", {"substrate": {"loss_factor": 0.0}},
         _site_heads, "10 posts 3 m, head masses 800 -> 2400 kg at 2.5 m, lossless sand"),
)


def study_of(case: Case) -> Any:
    """The case's study: the example study file with the case's overrides."""
    from optgrade.study import study_from_dict

    path = ROOT / "studies" / case.study_file
    data = tomllib.loads(path.read_text())
    for section, values in case.overrides.items():
        data[section].update(values)
    return study_from_dict(data, source=str(path))


def exact_fractions(study: Any, layout: Any, freq: np.ndarray) -> tuple[dict, float]:
    """Channel fractions of the exact row model (line variant) and its largest balance
    residual (nan on a lossy substrate)."""
    from optgrade.propagation import propagation_model

    res = propagation_model(study, "scattering", model="line").result(layout, freq)
    bal = res.balance_error
    return res.trace.fractions, float(np.nanmax(np.abs(bal))) if np.isfinite(bal).any() \
        else float("nan")


def exact_fractions_kelvin_voigt(study: Any, layout: Any, freq: np.ndarray) -> dict:
    """The exact row model with the full-wave's loss law instead of a constant loss factor:
    Kelvin-Voigt damping, exact at the band centre f_c, so eta(f) = eta f / f_c for the
    substrate and the rods (optgrade.fullwave._solver.substrate_tau). One frequency at a
    time (each needs its own Green's table): the same idealisation on both sides, to separate
    the solvers' agreement from the difference of the two loss laws."""
    from optgrade.channels import CHANNELS

    fc = 0.5 * (float(study.goal.band[0]) + float(study.goal.band[1]))
    out = {c: np.zeros(freq.size) for c in CHANNELS}
    for i, f in enumerate(freq):
        s = study.model_copy(update={
            "substrate": study.substrate.model_copy(
                update={"loss_factor": float(study.substrate.loss_factor) * f / fc}),
            "resonator": study.resonator.model_copy(
                update={"loss_factor": float(study.resonator.loss_factor) * f / fc})})
        one, _ = exact_fractions(s, layout, np.array([f]))
        for c in CHANNELS:
            out[c][i] = one[c][0]
    return out


def fullwave(study: Any, layout: Any, freq: np.ndarray, quality: str) -> dict[str, Any]:
    """One full-wave check (run, reference, split, self-checks) without the surrogate."""
    from optgrade.fullwave import _solver as fw

    medium = fw.medium_of(study)
    rods = fw.rods_of(study, layout)
    band = (float(study.goal.band[0]), float(study.goal.band[1]))
    t = time.perf_counter()
    grid, run, ref, split = fw.run_pair(medium, rods, band, freq, float(layout.length),
                                        quality=quality)
    wall = time.perf_counter() - t
    checks, reasons = fw.self_checks(split, run, medium, rods, quality)
    out = {"fractions": split.fractions, "wall_s": wall, "grid": [grid.nx, grid.nz],
           "h_m": grid.h, "steps": run.n_steps + ref.n_steps,
           "balance": checks.get("energy balance"), "failed": reasons, "rod_force": None}
    if medium.loss_factor == 0:
        out["rod_force"] = fw._radiation_summary(run, rods, grid, medium, split)
    return out


def compare_case(case: Case, qualities: list[str]) -> dict[str, Any]:
    """Full-wave (each quality) against the exact model for one case."""
    from optgrade.channels import CHANNELS

    study = study_of(case)
    layout = case.build(study)
    lo, hi = (float(v) for v in study.goal.band)
    freq = np.linspace(lo, hi, int(study.goal.n_frequencies))
    t = time.perf_counter()
    ex, ex_bal = exact_fractions(study, layout, freq)
    row: dict[str, Any] = {"case": case.name, "note": case.note, "n": int(layout.n_resonators),
                           "n_freq": int(freq.size), "exact_s": time.perf_counter() - t,
                           "exact_balance": ex_bal,
                           "exact_mean": {c: float(np.mean(ex[c])) for c in CHANNELS}}
    lossy = float(study.substrate.loss_factor) > 0 or float(study.resonator.loss_factor) > 0
    kv = exact_fractions_kelvin_voigt(study, layout, freq) if lossy else None
    for q in qualities:
        fwr = fullwave(study, layout, freq, q)
        diff = {c: float(np.mean(np.abs(fwr["fractions"][c] - ex[c]))) for c in CHANNELS}
        if kv is not None:
            diff_kv = {c: float(np.mean(np.abs(fwr["fractions"][c] - kv[c]))) for c in CHANNELS}
            row.setdefault("kelvin_voigt", {})[q] = {"mean_abs_difference": diff_kv,
                                                     "max_channel": max(diff_kv.values())}
            print(f"  {case.name} {q}: against the exact model with the full-wave's "
                  f"Kelvin-Voigt loss law: largest channel difference "
                  f"{max(diff_kv.values()):.3f}", flush=True)
        rf = fwr["rod_force"]
        row[q] = {
            "mean_abs_difference": diff, "max_channel": max(diff.values()),
            "fullwave_mean": {c: float(np.mean(fwr["fractions"][c])) for c in CHANNELS},
            "wall_s": fwr["wall_s"], "grid": fwr["grid"], "steps": fwr["steps"],
            "balance": fwr["balance"], "failed": fwr["failed"],
            "rod_force_split_max_difference": (max(rf["mean_abs_difference"].values())
                                               if rf else None),
            "rod_force_total": rf["total_band_mean"] if rf else None,
        }
        print(f"  {case.name} {q}: {fwr['wall_s']:.1f} s, largest channel difference "
              f"{row[q]['max_channel']:.3f}", flush=True)
    return row


SHORT = {"transmitted_surface": "T", "reflected_surface": "R", "forward_shear": "fS",
         "forward_compressional": "fP", "backward_shear": "bS", "backward_compressional": "bP",
         "absorbed": "abs"}


def markdown(rows: list[dict[str, Any]], qualities: list[str]) -> str:
    """The agreement table (band-mean |full-wave - exact| per channel)."""
    from optgrade.channels import CHANNELS

    head = ("| layout | grid | " + " | ".join(SHORT[c] for c in CHANNELS)
            + " | largest | box balance | rod-force split | wall |")
    lines = [head, "|" + " --- |" * (len(CHANNELS) + 6)]
    for r in rows:
        for q in qualities:
            g = r[q]
            bal = "lossy" if g["balance"] is None else f"{100 * g['balance']:.2f} %"
            rf = g["rod_force_split_max_difference"]
            lines.append(
                f"| {r['case']} | {q} | "
                + " | ".join(f"{g['mean_abs_difference'][c]:.3f}" for c in CHANNELS)
                + f" | {g['max_channel']:.3f} | {bal}{' FAILED' if g['failed'] else ''} | "
                + ("-" if rf is None else f"{rf:.3f}") + f" | {g['wall_s']:.0f} s |")
            kv = r.get("kelvin_voigt", {}).get(q)
            if kv:
                lines.append(
                    f"| {r['case']}, exact with the full-wave's loss law | {q} | "
                    + " | ".join(f"{kv['mean_abs_difference'][c]:.3f}" for c in CHANNELS)
                    + f" | {kv['max_channel']:.3f} | | | |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quality", nargs="+", default=["fast", "normal"],
                        choices=["fast", "normal"])
    parser.add_argument("--only", nargs="+", choices=[c.name for c in CASES])
    parser.add_argument("--json", metavar="FILE", help="also write every figure as JSON")
    args = parser.parse_args(argv)

    from optgrade.fullwave import _kernel

    _kernel.warm_up()
    rows = []
    for case in CASES:
        if args.only and case.name not in args.only:
            continue
        print(f"{case.name}: {case.note} (load average {os.getloadavg()[0]:.1f})", flush=True)
        rows.append(compare_case(case, args.quality))
    print()
    print(markdown(rows, args.quality))
    for q in args.quality:
        worst = max(r[q]["max_channel"] for r in rows)
        print(f"{q}: largest band-mean channel difference {worst:.3f} (target {TARGET} on the "
              "normal grid)")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
