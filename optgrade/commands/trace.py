"""``optgrade trace STUDY --layout TABLE.csv --out DIR``: where a layout sends the power.

Reads the study and a resonator table, computes the local modes of every cell over the study's
goal band with the fast surrogate, marches the Rayleigh wave along the row (WKB, docs/physics.md
section 6) and writes

- ``DIR/trace.json``: ``frequency_hz``, ``fractions`` / ``position_m`` / ``angle_deg`` (one list
  per channel, aligned with ``frequency_hz``, null where a channel gets nothing), ``eps_max``,
  ``is_adiabatic``, and for site-scale studies a ``caution``;
- ``DIR/elevation.png``, ``DIR/dispersion.png``, ``DIR/channel_map.png``,
  ``DIR/fractions.png``.
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

    from optgrade.dispersion import Surrogate
    from optgrade.layout import Layout
    from optgrade.study import Study

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


def _build_surrogate(study: Study, model: str | None) -> Surrogate:
    from optgrade.dispersion import surrogate_for_study

    return surrogate_for_study(study, model=model)


def run_trace(study: Study, layout: Layout, out: Path, *, model: str | None = None,
              is_figures: bool = True, console: Console | None = None) -> dict:
    """Trace ``layout`` for ``study`` and write trace.json (+ figures) into ``out``.

    With the WKB march (``goal.propagation = "wkb"``) every cell's local modes are computed
    (the dispersion figure shows them) and marched; any other registered propagation model
    traces the layout itself and the dispersion figure is left out. Returns the JSON payload.
    The same function backs the command line.
    """
    from optgrade.propagation import (
        PROPAGATION_MODELS,
        WKBMarch,
        march,
        propagation_model,
        study_frequencies,
    )

    say = console.print if console is not None else (lambda *a, **k: None)
    freq = study_frequencies(study)
    cr = float(study.substrate.cr)
    modes = None
    if issubclass(PROPAGATION_MODELS.get(study.goal.propagation), WKBMarch):
        if console is not None:
            with console.status("building / loading the dispersion tables ..."):
                surrogate = _build_surrogate(study, model)
        else:
            surrogate = _build_surrogate(study, model)
        modes = surrogate.local_modes(layout.height, layout.spacing, layout.head_mass, freq)
        tr = march(modes, layout.x, layout.spacing, freq, cr)
    else:
        tr = propagation_model(study).trace(layout, freq)

    payload = tr.to_dict()
    payload = {
        "study": study.meta.name,
        "n_resonators": layout.n_resonators,
        "length_m": layout.length,
        "model": model or study.goal.model,
        **payload,
    }
    is_site = study.meta.scale == "site"
    if is_site:
        payload["caution"] = SITE_CAUTION
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / "trace.json", payload)

    if is_figures:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        from optgrade.plotting import trace as pt

        goal = study.goal.channel
        note = " (site scale: see caution in trace.json)" if is_site else ""
        fig, ax = plt.subplots(figsize=(9, 3.6), layout="constrained")
        pt.plot_elevation(ax, layout, title=f"{study.meta.name}: layout elevation{note}")
        save_figure(fig, out / "elevation.png")
        plt.close(fig)

        if modes is not None:
            fig, ax = plt.subplots(figsize=(9, 5.5), layout="constrained")
            pt.plot_local_dispersion(ax, layout, modes, freq, cr=cr,
                                     rod_resonance=_rod_resonances(study, layout), trace=tr)
            save_figure(fig, out / "dispersion.png")
            plt.close(fig)

        fig, ax = plt.subplots(figsize=(9, 5.5), layout="constrained")
        pt.plot_channel_map(ax, tr, layout)
        save_figure(fig, out / "channel_map.png")
        plt.close(fig)

        fig, ax = plt.subplots(figsize=(9, 4.5), layout="constrained")
        pt.plot_fractions(ax, tr, goal_channel=goal if goal in tr.fractions else None)
        save_figure(fig, out / "fractions.png")
        plt.close(fig)

    # summary
    mean = {c: float(np.mean(v)) for c, v in tr.fractions.items()}
    from optgrade.plotting.trace import frequency_unit

    fs, funit = frequency_unit(float(freq[-1]))
    say(f"[bold]{study.meta.name}[/]: {layout.n_resonators} resonators, length "
        f"{layout.length:.4g} m, {freq.size} frequencies {freq[0] / fs:.4g} .. "
        f"{freq[-1] / fs:.4g} {funit}")
    for c, v in mean.items():
        say(f"  band-mean {c:<24s} {v:7.3f}")
    n_bad = int(np.sum(~tr.is_adiabatic))
    say(f"  eps_max up to {float(np.max(tr.eps_max)):.3g}; {n_bad} of {freq.size} frequencies "
        "above 0.1 (outside the adiabatic model's validity)")
    if is_site:
        say(f"[yellow]{SITE_CAUTION}[/]")
    n_figures = len(FIGURES) - (modes is None)
    say(f"wrote {out / 'trace.json'}" + ("" if not is_figures else f" and {n_figures} figures"))
    return payload


def run(args: argparse.Namespace) -> int:
    """Entry point of ``optgrade trace``."""
    from rich.console import Console

    study = open_study(args.study)
    layout = open_layout(args.layout)
    out = open_output_dir(args.out)
    a_lo, a_hi = (float(v) for v in study.layout.spacing)
    bad = np.flatnonzero((layout.spacing < a_lo * 0.98) | (layout.spacing > a_hi * 1.02))
    if bad.size:
        i = int(bad[0])
        raise StudyError([
            f"--layout: {args.layout}: resonator {i}: cell length {layout.spacing[i] * 1e3:.6g} mm "
            f"is outside the study's layout.spacing range {a_lo * 1e3:.6g} .. {a_hi * 1e3:.6g} mm "
            f"({bad.size} cells outside); the dispersion tables cover only that range"
        ])
    d_study = float(study.resonator.diameter)
    console = Console(stderr=False, highlight=False)
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
    run_trace(study, layout, out, model=args.model, is_figures=not args.no_figures,
              console=console)
    return 0
