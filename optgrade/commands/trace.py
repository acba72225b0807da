"""``optgrade trace STUDY --layout TABLE.csv --out DIR``: where a layout sends the power.

Reads the study and a resonator table and computes, over the study's goal band, where the power
of an incident Rayleigh wave goes, with the propagation model ``--propagation`` (default the
study's ``goal.propagation``: ``scattering``, the exact multiple-scattering row model,
docs/physics.md section 13; ``wkb`` the adiabatic march, section 6). The local modes of every
cell and the WKB march through them are always computed beside it: they explain the result.
Writes

- ``DIR/trace.json``: ``frequency_hz``, ``fractions`` / ``position_m`` / ``angle_deg`` (one list
  per channel, aligned with ``frequency_hz``, null where a channel gets nothing), ``eps_max``,
  ``is_adiabatic``, ``propagation`` (the model's name), ``balance_error`` (1 - sum of the
  fractions computed independently, null where the model has none), ``wkb`` (the WKB march's
  fractions, positions and angles when the primary model is another one), and for site-scale
  studies a ``caution``;
- ``DIR/elevation.png``, ``DIR/dispersion.png`` (local modes, WKB turning points),
  ``DIR/channel_map.png`` (per-resonator shares where the model gives them),
  ``DIR/fractions.png`` (stacked fractions, the WKB march's overlaid as dashed lines).
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from optgrade._atomic import save_figure, write_json
from optgrade.commands import add_study_argument, open_layout, open_output_dir, open_study
from optgrade.errors import StudyError
from optgrade.study import SITE_CAUTION

if TYPE_CHECKING:  # pragma: no cover
    from rich.console import Console

    from optgrade.dispersion import LocalModes
    from optgrade.layout import Layout
    from optgrade.propagation import Trace
    from optgrade.study import Study
    from optgrade.verdict import Verdict

__all__ = ["SITE_CAUTION", "add_parser", "run", "run_trace"]

#: Printed and written for site-scale studies (docs/physics.md section 8).

FIGURES = ("elevation.png", "dispersion.png", "channel_map.png", "fractions.png")


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register ``optgrade trace``."""
    parser = subparsers.add_parser(
        "trace",
        help="trace a layout: channel fractions, conversion positions and figures",
        description=(
            "March a Rayleigh wave along a resonator layout (adiabatic/WKB model with the fast "
            "dispersion surrogate) over the study's goal band, and report where its power goes: "
            "transmitted, reflected, converted to forward/backward shear or compressional bulk "
            "waves, or absorbed. Writes DIR/trace.json and four figures."
        ),
    )
    add_study_argument(parser)
    parser.add_argument("--layout", required=True, metavar="TABLE.csv",
                        help="resonator table (columns index, x_mm, height_mm, diameter_mm, "
                             "head_mass_kg, height_tol_mm; '#' header lines allowed)")
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.add_argument("--model", choices=("lattice", "line"), default=None,
                        help="lattice sum to use (default: the study's goal.model)")
    parser.add_argument("--propagation", default=None, metavar="NAME",
                        help="propagation model that gives the numbers: 'scattering' (exact "
                             "multiple-scattering row model) or 'wkb' (adiabatic march, fast "
                             "screening); default: the study's goal.propagation")
    parser.add_argument("--no-figures", action="store_true", help="write trace.json only")
    parser.set_defaults(handler=run)
    return parser


def _rod_resonances(study: Study, layout: Layout) -> np.ndarray:
    """First axial resonance of each rod (Hz)."""
    from optgrade.resonators import rod_resonances

    r = study.resonator
    return np.array([
        rod_resonances(float(h), float(d), r.youngs_modulus, r.density, float(m))[0]
        for h, d, m in zip(layout.height, layout.diameter, layout.head_mass, strict=True)
    ])


def _wkb_picture(study: Study, layout: Layout, freq: np.ndarray, model: str | None,
                 console: Console | None) -> tuple[LocalModes, Trace]:
    """Local modes of every cell and the WKB march through them (the explanation)."""
    from optgrade.dispersion import surrogate_for_study
    from optgrade.propagation import march

    if console is not None:
        with console.status("building / loading the dispersion tables ..."):
            surrogate = surrogate_for_study(study, model=model)
    else:
        surrogate = surrogate_for_study(study, model=model)
    modes = surrogate.local_modes(layout.height, layout.spacing, layout.head_mass, freq)
    return modes, march(modes, layout.x, layout.spacing, freq, float(study.substrate.cr))


def _primary_trace(study: Study, layout: Layout, freq: np.ndarray, name: str, model: str | None,
                   console: Console | None) -> tuple[Trace, np.ndarray | None]:
    """The trace of the chosen propagation model and its per-resonator shares (or None)."""
    from optgrade.propagation import propagation_model

    kwargs = {} if model is None else {"model": model}
    pm = propagation_model(study, name, **kwargs)
    if console is not None:
        with console.status(f"tracing with the {name!r} propagation model ..."):
            return pm.trace_detail(layout, freq)
    return pm.trace_detail(layout, freq)


def run_trace(study: Study, layout: Layout, out: Path, *, model: str | None = None,
              propagation: str | None = None, is_figures: bool = True,
              console: Console | None = None) -> dict:
    """Trace ``layout`` for ``study`` and write trace.json (+ figures) into ``out``.

    The number comes from the propagation model ``propagation`` (default the study's
    ``goal.propagation``; ``"scattering"`` is the exact row model). The WKB march through
    every cell's local modes is always computed beside it: the dispersion figure shows those
    modes and turning points, the fractions figure overlays the WKB fractions, and trace.json
    carries them under ``"wkb"`` when the primary model is another one. Returns the JSON
    payload. The same function backs the command line.
    """
    from optgrade.propagation import PROPAGATION_MODELS, WKBMarch, study_frequencies

    name = propagation or study.goal.propagation
    is_wkb = issubclass(PROPAGATION_MODELS.get(name), WKBMarch)
    freq = study_frequencies(study)
    modes, wkb = _wkb_picture(study, layout, freq, model, console)
    from optgrade.propagation._farface import with_ray_estimate

    wkb = with_ray_estimate(wkb, study)  # the bare march has no far-face record
    if is_wkb:
        tr, shares = wkb, None
    else:
        tr, shares = _primary_trace(study, layout, freq, name, model, console)

    payload = {
        "study": study.meta.name,
        "n_resonators": layout.n_resonators,
        "length_m": layout.length,
        "model": model or study.goal.model,
        **tr.to_dict(),
    }
    from optgrade.verdict import verdict

    judged = verdict(study, layout, tr)
    payload = {"verdict": judged.to_dict(), **payload}
    if tr.far_face is not None:
        from optgrade.verdict import far_face_lines

        payload["verdict"]["far_face"] = far_face_lines(study, tr)
    if not is_wkb:
        w = wkb.to_dict()
        payload["wkb"] = {k: w[k] for k in ("fractions", "position_m", "angle_deg", "eps_max",
                                             "is_adiabatic", "branch", "turning_position_m")}
        off = wkb_disagreement(wkb, tr)
        payload["wkb"]["disagrees"] = [bool(v) for v in off]
        payload["wkb"]["disagreement_limit"] = WKB_DISAGREEMENT
    is_site = study.meta.scale == "site"
    if is_site:
        payload["caution"] = SITE_CAUTION
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / "trace.json", payload)
    if is_figures:
        _write_figures(study, layout, out, freq, modes, tr, None if is_wkb else wkb, shares)
    _summary(study, layout, freq, tr, wkb, is_wkb, console, out, is_figures, judged)
    return payload


#: Largest difference on any channel (fraction of the incident power) at which the WKB march
#: still counts as agreeing with the exact model at a frequency (issue 13 item 4).
WKB_DISAGREEMENT = 0.1


def wkb_disagreement(wkb: Trace, exact: Trace) -> np.ndarray:
    """Frequencies where the WKB march is off the exact model by more than
    `WKB_DISAGREEMENT` on any channel (bool per frequency)."""
    diff = np.max([np.abs(np.nan_to_num(wkb.fractions[c]) - np.nan_to_num(exact.fractions[c]))
                   for c in exact.fractions], axis=0)
    return diff > WKB_DISAGREEMENT


def _write_figures(study: Study, layout: Layout, out: Path, freq: np.ndarray, modes: LocalModes,
                   tr: Trace, wkb: Trace | None, shares: np.ndarray | None) -> None:
    """elevation.png, dispersion.png, channel_map.png, fractions.png."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from optgrade.plotting import trace as pt

    goal = study.goal.channel
    note = " (site scale: see caution in trace.json)" if study.meta.scale == "site" else ""
    fig, ax = plt.subplots(figsize=(9, 3.6), layout="constrained")
    pt.plot_elevation(ax, layout, title=f"{study.meta.name}: layout elevation{note}")
    save_figure(fig, out / "elevation.png")
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(9, 5.5), layout="constrained")
    pt.plot_local_dispersion(ax, layout, modes, freq, cr=float(study.substrate.cr),
                             rod_resonance=_rod_resonances(study, layout),
                             trace=wkb if wkb is not None else tr)
    save_figure(fig, out / "dispersion.png")
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(9, 5.5), layout="constrained")
    pt.plot_channel_map(ax, tr, layout, shares=shares)
    save_figure(fig, out / "channel_map.png")
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(9, 4.5), layout="constrained")
    pt.plot_fractions(ax, tr, goal_channel=goal if goal in tr.fractions else None,
                      compare=wkb, required=(float(study.goal.required_fraction)
                                             if goal in tr.fractions else None))
    save_figure(fig, out / "fractions.png")
    plt.close(fig)

    if tr.far_face is not None:
        zone = study.goal.far_face
        fig, ax = plt.subplots(figsize=(9, 5.5), layout="constrained")
        pt.plot_far_face(ax, tr, zone=None if zone is None else zone.x_range,
                         mode=None if zone is None else zone.mode)
        save_figure(fig, out / "far_face.png")
        plt.close(fig)


def _summary(study: Study, layout: Layout, freq: np.ndarray, tr: Trace, wkb: Trace,
             is_wkb: bool, console: Console | None, out: Path, is_figures: bool,
             judged: Verdict) -> None:
    """Verdict, band means per channel (model and WKB side by side), validity, balance."""
    if console is None:
        return
    from rich.markup import escape

    from optgrade.plotting.trace import frequency_unit, length_unit

    say = console.print
    say(f"[bold]{escape(judged.line())}[/]")
    for text in judged.limit_lines():
        say(f"  binding: {escape(text)}")
    fs, funit = frequency_unit(float(freq[-1]))
    ls, lunit = length_unit(float(layout.length))
    say(f"[bold]{escape(study.meta.name)}[/]: {layout.n_resonators} resonators, length "
        f"{layout.length / ls:.4g} {lunit}, {freq.size} frequencies {freq[0] / fs:.4g} .. "
        f"{freq[-1] / fs:.4g} {funit}; propagation model {tr.propagation!r}")
    say(f"  band-mean {'channel':<24s} {tr.propagation:>10s}" + ("" if is_wkb else "        wkb"))
    for c, v in tr.fractions.items():
        extra = "" if is_wkb else f" {float(np.mean(wkb.fractions[c])):10.3f}"
        say(f"  band-mean {c:<24s} {float(np.mean(v)):10.3f}{extra}")
    if tr.balance_error is not None and np.isfinite(tr.balance_error).any():
        say(f"  energy balance: |1 - sum of fractions| <= "
            f"{float(np.nanmax(np.abs(tr.balance_error))):.1e} over the band")
    n_bad = int(np.sum(~wkb.is_adiabatic))
    say(f"  WKB picture: eps_max up to {float(np.max(wkb.eps_max)):.3g}; {n_bad} of {freq.size} "
        "frequencies above 0.1 (outside the adiabatic march's validity)")
    if not is_wkb:
        n_off = int(np.sum(wkb_disagreement(wkb, tr)))
        say(f"  WKB march off the {tr.propagation} model by more than {WKB_DISAGREEMENT} on some "
            f"channel at {n_off} of {freq.size} frequencies (trace.json wkb.disagrees)")
    from optgrade.verdict import far_face_lines

    for text in far_face_lines(study, tr):
        say(escape(text))
    if study.meta.scale == "site":
        say(f"[yellow]{SITE_CAUTION}[/]")
    n_fig = len(FIGURES) + (tr.far_face is not None)
    say(f"wrote {out / 'trace.json'}" + ("" if not is_figures else f" and {n_fig} figures"))


def run(args: argparse.Namespace) -> int:
    """Entry point of ``optgrade trace``."""
    from rich.console import Console

    study = open_study(args.study)
    if args.propagation is not None:
        from optgrade.propagation import PROPAGATION_MODELS

        if args.propagation not in PROPAGATION_MODELS:
            raise StudyError([f"--propagation: unknown model {args.propagation!r}; known: "
                              + ", ".join(PROPAGATION_MODELS.names())])
    layout = open_layout(args.layout)
    out = open_output_dir(args.out)
    from optgrade.commands._limits import fit_study_to_layout

    # limits widened to the layout where it reaches outside them; memory (docs/limits.md)
    study, notes = fit_study_to_layout(study, layout, args.layout)
    d_study = float(study.resonator.diameter)
    console = Console(stderr=False, highlight=False, soft_wrap=True)
    for note in notes:
        console.print(f"[yellow]note[/]: {note}")
    from optgrade.fabrication import check_layout

    violations = check_layout(study, layout)  # advisory here: printed, the trace still runs
    for v in violations[:10]:
        where = "" if v.index is None else f" (resonator {v.index})"
        console.print(f"[yellow]fabrication[/]: {v.field}{where}: {v.reason}")
    if len(violations) > 10:
        console.print(f"[yellow]fabrication[/]: ... {len(violations) - 10} more limits broken")
    if not np.allclose(layout.diameter, d_study, rtol=1e-6):
        console.print(f"[yellow]warning[/]: table diameters differ from the study's "
                      f"{d_study * 1e3:.4g} mm; the dispersion tables use the study's diameter")
    run_trace(study, layout, out, model=args.model, propagation=args.propagation,
              is_figures=not args.no_figures, console=console)
    return 0
