"""``optgrade verify STUDY --layout TABLE.csv --out DIR [--fast]``: full-wave check of a layout.

Runs the 2-D plane-strain full-wave solver (optgrade.fullwave._solver) on the layout, once with the
resonators and once on the bare substrate, splits the outgoing power into the trace.json
channels and compares them with the exact row model of the same 2-D line layout (multiple
scattering, docs/physics.md section 13: the primary comparison) and with the WKB trace of the
surrogate's line model beside it. Writes

- ``DIR/verify.json``: the trace.json keys (``frequency_hz``, ``fractions``, ``position_m``,
  ``angle_deg``) plus ``agreement`` (against the exact row model, per channel: mean absolute
  difference over the band and conversion-position difference in cells), ``agreement_wkb``
  (the same against the WKB trace), ``exact`` and ``wkb`` (the two traces), ``energy`` (box
  balance and direct-flux closure) and ``fullwave`` (grid, timing, diagnostics); a
  ``caution`` for site-scale studies;
- ``DIR/comparison.png`` (full-wave, exact row model and WKB trace per channel, 3-D lattice
  exact model dotted), ``DIR/snapshots.png`` (displacement field at four moments) and
  ``DIR/animation.gif`` (when Pillow is available);
- with ``substrate.thickness`` (a block): a second pair of runs on the block with a free far
  face (optgrade.fullwave._block), verify.json ``far_face`` (arrival positions and fractions
  at the far face against the exact model's map, and the measured downgoing flux with the
  later passes), ``DIR/far_face_check.png`` and ``DIR/block_snapshots.png`` (the whole block).

Every run checks itself (energy balance, closure, power into lossless rods, energy left at the
end; bounds in ``optgrade.fullwave._solver.CHECK_BOUNDS``). A run outside a bound is reported
as failed: ``"status": "failed"`` and a one-line ``reason`` in verify.json (figures still
written), the reason on the terminal, exit status 3. An unstable run (non-finite fields, or
energy growing after the source stopped) is stopped at once and reported the same way (no
fractions: null in verify.json, no figures). Successful runs carry ``"status": "ok"``.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade._atomic import save_figure, write_json
from optgrade.commands import add_study_argument, open_layout, open_output_dir, open_study

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

__all__ = ["EXIT_FAILED", "add_parser", "run", "run_verify"]

EXIT_FAILED = 3  # the full-wave run failed its own checks: no result to vouch for


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Register ``optgrade verify``."""
    parser = subparsers.add_parser(
        "verify",
        help="full-wave 2-D check of a layout against the exact row model and the WKB trace",
        description=(
            "Simulate the layout in the time domain (2-D plane strain, each row of rods "
            "smeared across the wave path, absorbing layers, broadband Rayleigh-wave source), "
            "split the outgoing power into the same channels as 'optgrade trace' and compare with "
            "the exact row model of the same 2-D line layout (and the WKB trace beside it). "
            "Writes DIR/verify.json, DIR/comparison.png, "
            "DIR/snapshots.png and DIR/animation.gif."
        ),
    )
    add_study_argument(parser)
    parser.add_argument("--layout", required=True, metavar="TABLE.csv",
                        help="resonator table (columns index, x_mm, height_mm, diameter_mm, "
                             "head_mass_kg, height_tol_mm; '#' header lines allowed)")
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.add_argument("--fast", action="store_true",
                        help="coarse grid (10 points per shortest Rayleigh wavelength instead "
                             "of 20): about 8x quicker, a few per cent less accurate")
    parser.add_argument("--no-animation", action="store_true", help="skip animation.gif")
    parser.add_argument("--no-lattice", action="store_true",
                        help="do not draw the exact model's 3-D lattice prediction beside the "
                             "line model")
    parser.set_defaults(handler=run)
    return parser


def run_verify(study: Study, layout: Layout, out: Path, *, is_fast: bool = False,
               is_animation: bool = True, is_lattice: bool = True, console: Any = None) -> dict:
    """Verify ``layout`` for ``study`` and write verify.json and the figures into ``out``.

    Returns the JSON payload. The same function backs the command line.
    """
    from rich.markup import escape

    from optgrade.fullwave._solver import rods_of, verify
    from optgrade.plotting import fullwave as pf
    from optgrade.study import SITE_CAUTION

    say = console.print if console is not None else (lambda *a, **k: None)
    ver = verify(study, layout, quality="fast" if is_fast else "normal",
                 progress=console is not None)
    lattice = None
    if is_lattice:
        try:
            from optgrade.propagation import propagation_model

            lattice = propagation_model(study, "scattering", model="lattice").trace(
                layout, ver.frequency)
        except Exception as exc:  # the figure is still useful without it
            say(f"[yellow]note[/]: no 3-D lattice prediction ({type(exc).__name__}: "
                f"{escape(str(exc))})")
    judged = _verdict_of(study, layout, ver)
    payload = {
        "verdict": judged.to_dict() if judged is not None else None,
        "study": study.meta.name,
        "n_resonators": int(layout.x.size),
        "length_m": float(layout.length),
        "model": "line (full-wave 2-D)",
        **ver.to_dict(),
    }
    if judged is not None:
        say(f"[bold]{escape(judged.line())}[/]")
    else:
        say("[bold red]NO VERDICT[/]: the full-wave run failed its own checks")
    is_site = getattr(study.meta, "scale", "bench") == "site"
    if is_site:
        payload["caution"] = SITE_CAUTION
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / "verify.json", payload)
    if ver.run is None:  # stopped as unstable: nothing to draw
        say(f"[bold red]FAILED[/]: {ver.reason}")
        say(f"wrote {escape(str(out / 'verify.json'))} (status failed; no figures)")
        return payload

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rods = rods_of(study, layout)
    fig = plt.figure(figsize=(13, 6.2), layout="constrained")
    pf.plot_comparison(fig, ver, lattice)
    note = " (site scale: see caution in verify.json)" if is_site else ""
    if ver.status != "ok":
        note += " - FAILED its own checks, not a result (see verify.json)"
    fig.suptitle(f"{study.meta.name}: full-wave 2-D check against the exact row model and the "
                 f"WKB trace{note}")
    save_figure(fig, out / "comparison.png")
    plt.close(fig)

    run_rec, grid = ver.run, ver.grid
    _snapshot_sheet(out / "snapshots.png", run_rec, grid, rods)
    n_files = 3
    if is_animation:
        tmp = out / ".animation.tmp.gif"
        if pf.write_animation(tmp, run_rec.snapshots, run_rec.snapshot_times, grid, rods):
            os.replace(tmp, out / "animation.gif")
            n_files += 1
        else:
            say("[yellow]note[/]: no GIF writer (Pillow) available; animation skipped")

    if getattr(study.substrate, "thickness", None) is not None:
        n_files += _block_check(study, layout, out, payload, is_fast, say)
        write_json(out / "verify.json", payload)
    say(f"[bold]{escape(study.meta.name)}[/]: {layout.x.size} resonators, {ver.frequency.size} "
        f"frequencies, grid {grid.nx} x {grid.nz} (h = {grid.h * 1e3:.3g} mm), "
        f"{ver.info['n_steps']} steps in {ver.info['seconds']:.1f} s")
    bound = ver.info["checks"]["bounds"]["balance"]
    if ver.info["max_balance_error"] is not None:
        say(f"  energy balance within {100 * ver.info['max_balance_error']:.2f} % of the "
            f"incident power (bound {100 * bound:g} %)")
    else:
        say("  lossy substrate: the box energy balance measures the absorbed power (no "
            "separate balance check)")
    _say_channels(say, ver)
    if is_site:
        say(f"[yellow]{SITE_CAUTION}[/]")
    say(f"wrote {escape(str(out / 'verify.json'))} and {n_files - 1} figure files")
    if ver.status != "ok":
        say(f"[bold red]FAILED[/]: {ver.reason}")
    return payload


def _block_check(study: Study, layout: Layout, out: Path, payload: dict, is_fast: bool,
                 say: Any) -> int:
    """The far face of a block (substrate.thickness): the block run pair, verify.json
    ``far_face``, far_face_check.png and block_snapshots.png. Returns the figures written."""
    import matplotlib.pyplot as plt
    from rich.markup import escape

    from optgrade.fullwave._block import block_check
    from optgrade.fullwave._solver import UnstableRun, _plain_progress, rods_of
    from optgrade.plotting import fullwave as pf
    from optgrade.units import format_eng

    say(f"block: the layout on a {format_eng(study.substrate.thickness, 'm')} block with a free "
        "far face (with resonators and bare) ...")
    try:
        check = block_check(study, layout, quality="fast" if is_fast else "normal",
                            progress=_plain_progress())
    except UnstableRun as exc:
        payload["far_face"] = {"status": "failed", "reason": str(exc)}
        say(f"[bold red]block run FAILED[/]: {escape(str(exc))}")
        return 0
    agree = check.agreement
    payload["far_face"] = {"status": "ok", **agree}
    word = "within" if agree["is_within"] else "OUTSIDE"
    say(f"[bold]far face[/] (block {format_eng(study.substrate.thickness, 'm')}): first arrival "
        f"against the prediction {word} the limits: arrival off by up to "
        f"{agree['worst_arrival_difference_shear_wavelengths']:.2f} shear wavelengths (limit 1), "
        f"fraction by up to {agree['worst_fraction_difference']:.2f} (limit 0.1)")
    say(f"  all downgoing waves at the far face (first arrival and later passes): band mean "
        f"{agree['band_mean_downgoing_measured']:.2f} of the incident power, first arrival "
        f"{agree['band_mean_first_arrival']:.2f}; {escape(agree['leaves_out'])}")
    fig = plt.figure(figsize=(14, 5.2), layout="constrained")
    pf.plot_far_face_check(fig, check)
    fig.suptitle(f"{study.meta.name}: far face of the {format_eng(study.substrate.thickness, 'm')}"
                 " block, full-wave against the prediction")
    save_figure(fig, out / "far_face_check.png")
    plt.close(fig)
    _snapshot_sheet(out / "block_snapshots.png", check.run, check.grid, rods_of(study, layout),
                    title=f"the whole {format_eng(study.substrate.thickness, 'm')} block (free far "
                          "face at the bottom; side layers grey)")
    return 2


def _snapshot_sheet(path: Path, run: Any, grid: Any, rods: Any, title: str | None = None) -> None:
    """Four displacement snapshots of a run, one above the other (snapshots.png and the
    block's block_snapshots.png)."""
    import matplotlib.pyplot as plt

    from optgrade.plotting import fullwave as pf

    aspect = (grid.nz * grid.h + 1.15 * float(np.max(rods.height))) / (grid.nx * grid.h)
    # each panel: the image at the width the colour bar leaves (about 9.2 in), its title and
    # ticks (0.55 in); the sheet no taller than that, so no empty bands between the frames
    fig = plt.figure(figsize=(11, min(14.0, 0.7 + 4 * (9.6 * aspect + 0.42))),
                     layout="constrained")
    pf.plot_snapshots(fig, run.snapshots, run.snapshot_times, grid, rods)
    if title:
        fig.suptitle(title)
    save_figure(fig, path)
    plt.close(fig)


def _verdict_of(study: Study, layout: Layout, ver: Any) -> Any:
    """The verdict line (optgrade/verdict.py) on the full-wave's own fractions, or None when
    the run failed its self-checks (a failed run is not a result)."""
    if ver.status != "ok" or ver.fractions is None:
        return None
    from optgrade.verdict import verdict_of_fractions

    return verdict_of_fractions(study, layout, ver.frequency, ver.fractions, "full-wave 2-D")


def _say_channels(say: Any, ver: Any) -> None:
    """Band means per channel: full-wave, exact row model, WKB trace and the differences."""
    from optgrade.fullwave._solver import CHANNELS

    # columns: band means; band-mean |full-wave - model|; exact model's position difference
    say(f"  {'band mean':<24s} {'full-wave':>9s} {'exact':>7s} {'WKB':>7s}   "
        "|diff| exact/WKB cells")
    for c in CHANNELS:
        line = f"  {c:<24s} {float(np.mean(ver.fractions[c])):9.3f}"
        for tr in (ver.exact, ver.surrogate):
            line += (f" {float(np.nanmean(tr.fractions[c])):7.3f}" if tr is not None
                     else f" {'-':>7s}")
        diffs = [None if a is None else a[c]["mean_abs_difference"]
                 for a in (ver.agreement, ver.agreement_wkb)]
        line += "   " + " / ".join("  -  " if d is None else f"{d:.3f}" for d in diffs)
        if ver.agreement is not None and ver.agreement[c]["position_difference_cells"] is not None:
            line += f"   {ver.agreement[c]['position_difference_cells']:.1f}"
        say(line)
    if ver.agreement is None:
        say(f"[yellow]no exact-model comparison[/]: {ver.info.get('exact_error')}")
    if ver.agreement_wkb is None:
        say(f"[yellow]no WKB comparison[/]: {ver.info.get('surrogate_error')}")


def run(args: argparse.Namespace) -> int:
    """Entry point of ``optgrade verify``."""
    from rich.console import Console

    from optgrade.commands._limits import check_verify_plan, fit_study_to_layout

    study = open_study(args.study)
    layout = open_layout(args.layout)
    out = open_output_dir(args.out)
    # the table must fit the study, and the grid this machine (docs/limits.md)
    study, notes = fit_study_to_layout(study, layout, args.layout)
    check_verify_plan(study, layout, args.fast)
    console = Console(highlight=False, soft_wrap=True)
    for note in notes:
        console.print(f"[yellow]note[/]: {note}")
    payload = run_verify(study, layout, out, is_fast=args.fast,
                         is_animation=not args.no_animation, is_lattice=not args.no_lattice,
                         console=console)
    if payload.get("status") != "ok":
        import sys

        # the one-line reason also goes to stderr, for scripts that only read that
        print(f"optgrade verify: failed: {payload.get('reason')}", file=sys.stderr)
        return EXIT_FAILED
    return 0
