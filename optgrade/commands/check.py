"""``optgrade check STUDY [--json]``: validate a study and show what it resolves to.

Prints the resolved study in SI (material constants, cL, cT, cR, the rods' bar speed, the first
rod resonance over the height range), the band in terms of wavelengths against spacing and row
pitch, and warnings a wave engineer would raise before any search. Exit 0 for a valid study,
2 for an invalid one.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from optgrade.commands import add_study_argument, open_study
from optgrade.study import SITE_CAUTION, Study, first_resonance_range
from optgrade.units import format_eng

__all__ = ["SITE_CAUTION", "add_parser", "derived_figures", "run", "study_warnings"]

#: Caution carried by every site-scale output (docs/physics.md section 8).

#: Standard gravity (m/s^2) for self-weight checks.
GRAVITY = 9.80665
#: Greenhill coefficient for a uniform column fixed at the base and free at the top under its own
#: weight, L_crit = (7.837 E I / (rho g A))^(1/3) (docs/physics.md section 8; A. G. Greenhill 1881;
#: S. P. Timoshenko and J. M. Gere, *Theory of Elastic Stability*, 1961, section 2.10).
GREENHILL = 7.837
#: Safety factor asked of the head-mass buckling check (our choice, common practice order).
BUCKLING_SAFETY = 3.0


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register ``optgrade check``."""
    parser = subparsers.add_parser(
        "check",
        help="validate a study file and print the resolved study",
        description=(
            "Validate a study file (TOML with units) and print the resolved study in SI: "
            "material constants, wave speeds, rod bar speed, first rod resonance over the height "
            "range, the band in wavelengths against spacing and row pitch, and warnings. "
            "Exit status 0 when valid, 2 when not (messages name the field and line)."
        ),
    )
    add_study_argument(parser)
    parser.add_argument(
        "--no-reach", action="store_true",
        help="skip the reachability estimate (it solves the local modes of the admissible "
             "cells; the first run builds the dispersion tables)",
    )
    parser.add_argument(
        "--json", action="store_true",
        help="print the resolved study in SI as JSON (plus 'derived' and 'warnings' keys)",
    )
    parser.set_defaults(handler=run)
    return parser


def greenhill_height(diameter: float, youngs_modulus: float, density: float) -> float:
    """Self-weight buckling height of a solid round post, fixed base, free top (m).

    L_crit = (7.837 E I / (rho g A))^(1/3) with I / A = d^2 / 16 for a solid circle
    (Greenhill 1881; Timoshenko and Gere 1961, section 2.10; docs/physics.md section 8).
    """
    return (GREENHILL * youngs_modulus * diameter**2 / (16.0 * density * GRAVITY)) ** (1.0 / 3.0)


def head_mass_buckling_load(diameter: float, youngs_modulus: float, height: float) -> float:
    """Euler load of a fixed-free column with the load at the free end (N).

    P_cr = pi^2 E I / (4 L^2), I = pi d^4 / 64 (Euler; Timoshenko and Gere 1961, section 2.1).
    """
    inertia = math.pi * diameter**4 / 64.0
    return math.pi**2 * youngs_modulus * inertia / (4.0 * height**2)


def derived_figures(study: Study) -> dict[str, Any]:
    """Numbers derived from a study that the check prints (SI)."""
    sub, res, lay, goal = study.substrate, study.resonator, study.layout, study.goal
    f_lo, f_hi = goal.band
    f1_low, f1_high = first_resonance_range(res, lay.height)
    return {
        "substrate_shear_modulus": sub.shear_modulus,
        "resonator_bar_speed": res.bar_speed,
        "first_resonance_hz": [f1_low, f1_high],
        "shear_wavelength": [sub.ct / f_lo, sub.ct / f_hi],
        "rayleigh_wavelength": [sub.cr / f_lo, sub.cr / f_hi],
        "compressional_wavelength": [sub.cl / f_lo, sub.cl / f_hi],
        "bar_wavelength": [res.bar_speed / f_lo, res.bar_speed / f_hi],
        "spacing_over_shear_wavelength": [lay.spacing[0] * f_lo / sub.ct,
                                          lay.spacing[1] * f_hi / sub.ct],
        "row_pitch_over_shear_wavelength": [res.row_pitch * f_lo / sub.ct,
                                            res.row_pitch * f_hi / sub.ct],
        "greenhill_height": greenhill_height(res.diameter, res.youngs_modulus, res.density),
        "slenderness": [lay.height[0] / res.diameter, lay.height[1] / res.diameter],
    }


def study_warnings(study: Study, figures: dict[str, Any] | None = None) -> list[str]:
    """Warnings about a valid study (docs/physics.md sections 4.5, 5.8 and 8); lengths,
    frequencies and forces in engineering units (mm, kHz, kN)."""
    fig = figures or derived_figures(study)
    sub, res, lay, goal, fab = (study.substrate, study.resonator, study.layout, study.goal,
                                study.fabrication)
    e = format_eng
    f_lo, f_hi = goal.band
    out = []
    from optgrade.study import BLOCK_WARN_WAVELENGTHS, block_wavelengths

    n_lam = block_wavelengths(study)
    if n_lam is not None and n_lam < BLOCK_WARN_WAVELENGTHS:
        out.append(
            f"block thickness {e(sub.thickness, 'm')} is only {n_lam:.2f} Rayleigh wavelengths "
            f"at {e(f_lo, 'Hz')} (below {BLOCK_WARN_WAVELENGTHS:g}): the surface wave still "
            "feels the far face there, and the half-space dispersion the row is designed with "
            "is less accurate at the low end of the band"
        )
    shear_wavelength_top = sub.ct / f_hi
    if res.row_pitch > shear_wavelength_top:
        out.append(
            f"row pitch {e(res.row_pitch, 'm')} exceeds the shear wavelength at the band top "
            f"({e(shear_wavelength_top, 'm')}), i.e. 2 pi/b < kT: harmonics across the row "
            "radiate sideways into the bulk; reduce row_pitch"
        )
    bar_wavelength_top = res.bar_speed / f_hi
    if res.diameter > bar_wavelength_top / 5.0:
        out.append(
            f"rod diameter {e(res.diameter, 'm')} exceeds 1/5 of the bar wavelength at the band "
            f"top ({e(bar_wavelength_top / 5.0, 'm')}): thin-rod theory is outside its validity"
        )
    if lay.height[1] / res.diameter > fab.slenderness_max:
        out.append(
            f"tallest rod has slenderness {lay.height[1] / res.diameter:.3g} above the limit "
            f"{fab.slenderness_max:g}: heights above {e(fab.slenderness_max * res.diameter, 'm')} "
            "are not machinable under this limit"
        )
    l_crit = fig["greenhill_height"]
    if lay.height[1] > 0.5 * l_crit:
        out.append(
            f"tallest post ({e(lay.height[1], 'm')}) is above half the self-weight buckling "
            f"height (Greenhill, {e(l_crit, 'm')})"
        )
    if res.has_head_mass:
        load = res.head_mass[1] * GRAVITY
        p_cr = head_mass_buckling_load(res.diameter, res.youngs_modulus, lay.height[1])
        if load * BUCKLING_SAFETY > p_cr:
            out.append(
                f"heaviest head mass on the tallest post: weight {e(load, 'N')} against the "
                f"Euler load {e(p_cr, 'N')} of a fixed-free post (safety factor "
                f"{p_cr / load:.2g} < {BUCKLING_SAFETY:g})"
            )
    f1_low, f1_high = fig["first_resonance_hz"]
    if f_hi < f1_low:
        out.append(
            f"the whole band lies below the lowest first rod resonance ({e(f1_low, 'Hz')}): "
            "the rods only load the surface as masses; taller rods reach the band"
        )
    elif f_lo > f1_high:
        out.append(
            f"the whole band lies above the highest first rod resonance ({e(f1_high, 'Hz')}): "
            "shorter rods reach the band"
        )
    elif f_lo < f1_low or f_hi > f1_high:
        lo_gap = f"below {e(f1_low, 'Hz')}" if f_lo < f1_low else ""
        hi_gap = f"above {e(f1_high, 'Hz')}" if f_hi > f1_high else ""
        part = " and ".join(p for p in (lo_gap, hi_gap) if p)
        out.append(
            f"the rods' first resonances ({e(f1_low, 'Hz')} .. {e(f1_high, 'Hz')}) cover the "
            f"band only in part: no rod the limits allow resonates {part}; widen layout.height "
            "(or the head-mass range) if the goal needs resonant rods there"
        )
    if goal.channel.startswith("backward"):
        rayleigh_half = sub.cr / f_hi / 2.0
        if lay.spacing[1] < rayleigh_half:
            out.append(
                f"spacing max {e(lay.spacing[1], 'm')} is below half the Rayleigh wavelength at "
                f"the band top ({e(rayleigh_half, 'm')}): the slowed branch meets the Bragg "
                "condition K = pi/a before the folded harmonic enters the bulk-wave cone, so "
                "backward conversion is unlikely"
            )
    if sub.poisson <= 0.0:
        out.append(f"substrate Poisson ratio {sub.poisson:.3f} <= 0 is unusual; check cl and ct")
    out.append(
        "bending modes of the rods (coupling to horizontal motion) are outside the model; only "
        "axial (thin-rod) motion is represented"
    )
    if study.meta.scale == "site":
        out.append(SITE_CAUTION)
    return out


def _json_ready(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    return value


def _print_human(study: Study, fig: dict[str, Any], warnings: list[str]) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(highlight=False, soft_wrap=False)
    if not console.is_terminal:
        console.width = 110
    sub, res, lay, goal, fab, srch = (study.substrate, study.resonator, study.layout, study.goal,
                                      study.fabrication, study.search)

    def mm(x: float) -> str:
        return f"{x * 1e3:.4g} mm" if x < 1.0 else f"{x:.4g} m"

    def hz(x: float) -> str:
        return f"{x / 1e3:.4g} kHz" if x >= 1e3 else f"{x:.4g} Hz"

    from rich.markup import escape  # names and paths are text, not markup (issue 17 part 3)

    console.print(f"[bold]{escape(study.meta.name)}[/bold]  ({study.meta.scale} scale, seed "
                  f"{study.meta.seed})  {escape(str(study.source_path or ''))}")
    table = Table(show_header=True, header_style="bold", title="resolved study (SI)")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    table.add_column("note")
    rows = [
        ("substrate", sub.material or "explicit", "half-space"),
        ("  density", f"{sub.density:.5g} kg/m^3", ""),
        ("  Young's modulus", f"{sub.youngs_modulus / 1e9:.5g} GPa", ""),
        ("  Poisson ratio", f"{sub.poisson:.4g}", ""),
        ("  cL", f"{sub.cl:.5g} m/s", "compressional"),
        ("  cT", f"{sub.ct:.5g} m/s", "shear"),
        ("  cR", f"{sub.cr:.5g} m/s", f"Rayleigh, cR/cT = {sub.cr / sub.ct:.5f}"),
        ("  loss factor", f"{sub.loss_factor:g}", ""),
        ("resonator", res.material or "explicit", "axial thin rod"),
        ("  Young's modulus", f"{res.youngs_modulus / 1e9:.5g} GPa", ""),
        ("  density", f"{res.density:.5g} kg/m^3", ""),
        ("  bar speed", f"{res.bar_speed:.5g} m/s", "sqrt(E/rho)"),
        ("  diameter", mm(res.diameter), ""),
        ("  row pitch", mm(res.row_pitch), "across the row"),
        ("  head mass", f"{res.head_mass[0]:.4g} .. {res.head_mass[1]:.4g} kg", ""),
        ("  first resonance", f"{hz(fig['first_resonance_hz'][0])} .. "
         f"{hz(fig['first_resonance_hz'][1])}", "tallest/heaviest .. shortest/lightest"),
        ("layout count", f"{lay.count[0]} .. {lay.count[1]}", f"profile {lay.profile}"),
        ("  height", f"{mm(lay.height[0])} .. {mm(lay.height[1])}",
         f"step {mm(lay.height_step)}"),
        ("  spacing", f"{mm(lay.spacing[0])} .. {mm(lay.spacing[1])}",
         f"max length {mm(lay.max_length)}"),
        ("  entry", lay.entry, "end the waves arrive at"),
        ("goal band", f"{hz(goal.band[0])} .. {hz(goal.band[1])}",
         f"{goal.n_frequencies} frequencies, model {goal.model}"),
        ("  channel", goal.channel, f"required fraction {goal.required_fraction:g}"),
        ("  weights", ", ".join(f"{k} {v:g}" for k, v in goal.weights.items()), ""),
        ("fabrication", f"gap {mm(fab.min_gap)}", f"height tol {mm(fab.height_tolerance)}, "
         f"slenderness <= {fab.slenderness_max:g}"),
        ("search", f"{srch.trials} trials", f"{srch.workers} workers, sampler {srch.sampler}, "
         f"objectives {', '.join(srch.objectives)}"),
    ]
    if goal.angle_window_deg is not None:
        rows.insert(-3, ("  angle window", f"{goal.angle_window_deg[0]:g} .. "
                         f"{goal.angle_window_deg[1]:g} deg", "from the surface normal"))
    for row in rows:
        table.add_row(*row)
    console.print(table)

    band = Table(show_header=True, header_style="bold",
                 title="band against the lattice (band bottom .. band top)")
    band.add_column("quantity")
    band.add_column("value", justify="right")
    band.add_row("shear wavelength", f"{mm(fig['shear_wavelength'][0])} .. "
                 f"{mm(fig['shear_wavelength'][1])}")
    band.add_row("Rayleigh wavelength", f"{mm(fig['rayleigh_wavelength'][0])} .. "
                 f"{mm(fig['rayleigh_wavelength'][1])}")
    band.add_row("bar wavelength in rods", f"{mm(fig['bar_wavelength'][0])} .. "
                 f"{mm(fig['bar_wavelength'][1])}")
    band.add_row("spacing min / shear wl (bottom)",
                 f"{fig['spacing_over_shear_wavelength'][0]:.3g}")
    band.add_row("spacing max / shear wl (top)",
                 f"{fig['spacing_over_shear_wavelength'][1]:.3g}")
    band.add_row("row pitch / shear wl", f"{fig['row_pitch_over_shear_wavelength'][0]:.3g} .. "
                 f"{fig['row_pitch_over_shear_wavelength'][1]:.3g}")
    band.add_row("Greenhill self-weight height", mm(fig["greenhill_height"]))
    console.print(band)
    if warnings:
        console.print("[bold]warnings and notes[/bold]")
        for text in warnings:
            style = "bold red" if text.startswith("CAUTION") else "yellow"
            console.print(f"  - {escape(text)}", style=style)
    console.print("[green]study is valid[/green]")


def run(args: argparse.Namespace) -> int:
    """Validate the study; print it (table or JSON). Returns 0 (errors raise StudyError)."""
    study = open_study(args.study)
    fig = derived_figures(study)
    warnings = study_warnings(study, fig)
    reach = None if args.no_reach else _reach(study, quiet=args.json)
    if args.json:
        payload = study.to_si_dict()
        payload["derived"] = fig
        payload["warnings"] = warnings
        if reach is not None:
            payload["reach"] = reach.to_dict()
        sys.stdout.write(json.dumps(_json_ready(payload), indent=2, allow_nan=False) + "\n")
    else:
        _print_human(study, fig, warnings)
        if reach is not None:
            from rich.console import Console
            from rich.markup import escape

            console = Console(highlight=False, soft_wrap=True)
            console.print("[bold]reachability[/bold] (before any search)")
            for line in reach.lines():
                console.print("  " + escape(line))
    return 0


def _reach(study: Study, *, quiet: bool) -> Any:
    """The reachability estimate (optgrade/reach.py), with a status line on a terminal."""
    from optgrade.reach import reachability

    if quiet:
        return reachability(study)
    from rich.console import Console

    with Console(stderr=True).status("reachability: local modes of the admissible cells ..."):
        return reachability(study)
