"""``optgrade bands STUDY --height H --spacing A --out DIR``: band diagram of one cell.

Solves the Bloch dispersion of one resonator cell (the study's substrate and resonator material,
the given height, spacing and head mass) by direct root solves, and writes

- ``DIR/bands.json``: ``frequency_hz``; ``branches`` (objects with ``name``, ``k_real`` and
  ``k_imag`` in 1/m aligned with ``frequency_hz``, null where the branch does not exist,
  ``is_leaky``, ``is_first_order``, and where leaky the per-point channel ``shares`` and
  ``angle_deg``, null elsewhere); ``resonances_hz``, ``gaps_hz``, ``warnings``, the cell, and
  for site-scale studies a ``caution``;
- ``DIR/bands.csv``: one row per frequency and branch;
- ``DIR/bands.png``: the band diagram (`optgrade.plotting.bands.plot_bands`).

The same is available from Python as :func:`run_bands`.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from optgrade._atomic import write_text
from optgrade.commands import (
    add_study_argument,
    open_study,
    quantity_type,
    whole_number_type,
)
from optgrade.errors import StudyError
from optgrade.study import SITE_CAUTION
from optgrade.units import format_eng as _eng

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.dispersion import Cell
    from optgrade.study import Study

__all__ = ["add_parser", "run", "run_bands", "SITE_CAUTION"]

#: Printed and written for site-scale studies (docs/physics.md section 8).

RADIATING = ("forward_shear", "forward_compressional", "backward_shear", "backward_compressional")
SHARES = RADIATING + ("absorbed",)


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register ``optgrade bands``."""
    parser = subparsers.add_parser(
        "bands",
        help="band diagram of one resonator cell (bound and leaky branches)",
        description=(
            "Bloch dispersion of one cell of the resonator row: the study's substrate and "
            "resonator material with the given height, spacing and head mass. Finds the lower "
            "(surface) and upper branches, bound or leaky, with the split of their decay into "
            "forward/backward shear/compressional radiation and absorption, and draws the band "
            "diagram. Quantities take units, e.g. --height '8 mm' --fmax '200 kHz'."
        ),
    )
    add_study_argument(parser)
    parser.add_argument(
        "--height",
        required=True,
        type=quantity_type("length", "--height"),
        help="rod height, e.g. '8 mm'",
    )
    parser.add_argument(
        "--spacing",
        required=True,
        type=quantity_type("length", "--spacing"),
        help="cell length along the row, e.g. '10 mm'",
    )
    parser.add_argument(
        "--head-mass",
        default=0.0,
        type=quantity_type("mass", "--head-mass"),
        help="head mass, e.g. '500 kg' (default 0)",
    )
    parser.add_argument(
        "--fmin",
        default=None,
        type=quantity_type("frequency", "--fmin"),
        help="lowest frequency (default: the study's goal band)",
    )
    parser.add_argument(
        "--fmax",
        default=None,
        type=quantity_type("frequency", "--fmax"),
        help="highest frequency (default: the study's goal band)",
    )
    parser.add_argument("--points", default=161, type=whole_number_type("--points", 2),
                        help="number of frequencies")
    parser.add_argument(
        "--model",
        choices=("lattice", "line", "homogenised"),
        default=None,
        help="lattice sum (default: the study's goal.model)",
    )
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.add_argument("--no-figure", action="store_true", help="skip bands.png")
    return parser


def _cell_from_study(study: Study, height: float, spacing: float, head_mass: float) -> Cell:
    from optgrade.dispersion import Cell
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    s, r = study.substrate, study.resonator
    substrate = Substrate(float(s.density), float(s.cl), float(s.ct), float(s.loss_factor or 0))
    rod = Rod(
        float(r.youngs_modulus), float(r.density), float(r.diameter), float(r.loss_factor or 0)
    )
    return Cell(substrate, rod, float(height), float(spacing), float(r.row_pitch), float(head_mass))


def _check_inputs(height, spacing, head_mass, fmin, fmax, points, diameter) -> None:
    msgs = []
    if not height > 0:
        msgs.append("--height: must be positive")
    if not spacing > 0:
        msgs.append("--spacing: must be positive")
    elif spacing <= diameter:
        msgs.append(f"--spacing: must exceed the rod diameter ({_eng(diameter, 'm')})")
    if head_mass < 0:
        msgs.append("--head-mass: must not be negative")
    if not (0 < fmin < fmax):
        msgs.append("--fmin/--fmax: need 0 < fmin < fmax")
    if points < 2 or points > 20000:
        msgs.append("--points: must be between 2 and 20000")
    if msgs:
        raise StudyError(msgs)


def _check_plausible(study: Study, height: float, spacing: float, head_mass: float,
                     fmax: float) -> None:
    """Physics limits of one cell (docs/limits.md): the top frequency against the rod's first
    axial resonance, the cell length and row pitch against the shear wavelength there. Outside
    them the lattice sums grow without bound (--fmax '1 THz' or --spacing '100 km' never
    ended)."""
    from optgrade.commands._limits import BAND_ABOVE_RESONANCE, MAX_CELL_WAVELENGTHS
    from optgrade.resonators import rod_resonances
    from optgrade.units import format_eng

    r = study.resonator
    f1 = float(rod_resonances(height, float(r.diameter), r.youngs_modulus, r.density,
                              head_mass)[0])
    msgs = []
    if fmax > BAND_ABOVE_RESONANCE * f1:
        msgs.append(f"--fmax: {format_eng(fmax, 'Hz')} is above {BAND_ABOVE_RESONANCE:g} x the "
                    f"rod's first axial resonance ({format_eng(f1, 'Hz')} for --height "
                    f"{height * 1e3:.4g} mm), beyond its fifth axial mode; lower --fmax")
    lam_t = float(study.substrate.ct) / fmax
    for option, size in (("--spacing", spacing), ("resonator.row_pitch", float(r.row_pitch))):
        if size > MAX_CELL_WAVELENGTHS * lam_t:
            msgs.append(f"{option}: {size * 1e3:.4g} mm is {size / lam_t:.3g} shear wavelengths "
                        f"at {format_eng(fmax, 'Hz')} ({lam_t * 1e3:.4g} mm); at most "
                        f"{MAX_CELL_WAVELENGTHS:g} (the lattice sums grow as the square)")
    if msgs:
        raise StudyError(msgs)


def _nan_to_none(x: np.ndarray, digits: int = 10) -> list:
    return [None if not np.isfinite(v) else float(f"{v:.{digits}g}") for v in np.asarray(x)]


def bands_to_json(bands, study_name: str, scale: str | None) -> dict:
    """The JSON document of `optgrade bands` (plain Python objects)."""
    cell = bands.cell
    branches = []
    for br in bands.branches:
        leaky = br.is_leaky & np.isfinite(br.k)
        shares = {
            name: _nan_to_none(np.where(leaky | (br.k.imag > 0), br.shares[i], np.nan))
            for i, name in enumerate(SHARES)
        }
        angles = {
            name: _nan_to_none(np.where(leaky, np.degrees(br.angle[i]), np.nan))
            for i, name in enumerate(RADIATING)
        }
        branches.append(
            {
                "name": br.name,
                "k_real": _nan_to_none(br.k.real),
                "k_imag": _nan_to_none(np.where(np.isfinite(br.k), br.k.imag, np.nan)),
                "is_leaky": [bool(v) for v in leaky],
                "is_first_order": [bool(v) for v in br.is_first_order],
                "shares": shares,
                "angle_deg": angles,
            }
        )
    doc = {
        "study": study_name,
        "model": bands.model,
        "cell": {
            "height_m": cell.height,
            "spacing_m": cell.spacing,
            "row_pitch_m": cell.row_pitch,
            "head_mass_kg": cell.head_mass,
            "rod_diameter_m": cell.rod.diameter,
        },
        "frequency_hz": [float(v) for v in bands.freq],
        "branches": branches,
        "resonances_hz": [float(v) for v in bands.resonances],
        "gaps_hz": [[lo, hi] for lo, hi in bands.gaps],
        "warnings": list(bands.warnings),
        "conventions": "exp(-i w t); K = K' + i K'' with K'' > 0 decaying along +x; "
        "angles from the surface normal, negative pointing back to the source",
    }
    if scale == "site":
        doc["caution"] = SITE_CAUTION
    return doc


def bands_to_csv(bands) -> str:
    """CSV text of `optgrade bands`: one row per frequency and branch."""
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    wr.writerow(
        ["frequency_hz", "branch", "k_real_per_m", "k_imag_per_m", "is_leaky", "is_first_order"]
        + [f"share_{n}" for n in SHARES]
        + [f"angle_deg_{n}" for n in RADIATING]
    )
    for br in bands.branches:
        for j, f in enumerate(bands.freq):
            k = br.k[j]
            if not np.isfinite(k):
                wr.writerow([f"{f:.10g}", br.name, "", "", "", ""] + [""] * 9)
                continue
            ang = [("" if not np.isfinite(v) else f"{np.degrees(v):.6g}") for v in br.angle[:, j]]
            wr.writerow(
                [
                    f"{f:.10g}",
                    br.name,
                    f"{k.real:.10g}",
                    f"{k.imag:.6g}",
                    int(br.is_leaky[j]),
                    int(br.is_first_order[j]),
                ]
                + [f"{v:.6g}" for v in br.shares[:, j]]
                + ang
            )
    return buf.getvalue()


def run_bands(
    study: Study,
    height: float,
    spacing: float,
    out: str | os.PathLike,
    head_mass: float = 0.0,
    fmin: float | None = None,
    fmax: float | None = None,
    points: int = 161,
    model: str | None = None,
    figure: bool = True,
    progress=None,
):
    """Python API of `optgrade bands`: solve, write bands.json / bands.csv / bands.png.

    Returns the `optgrade.dispersion._direct.Bands`.
    """
    from optgrade.dispersion import solve_bands

    lo, hi = (float(v) for v in study.goal.band)
    fmin = lo if fmin is None else float(fmin)
    fmax = hi if fmax is None else float(fmax)
    _check_inputs(height, spacing, head_mass, fmin, fmax, points, float(study.resonator.diameter))
    _check_plausible(study, height, spacing, head_mass, fmax)
    from optgrade.commands._limits import check_output_dir

    check_output_dir(out)
    model = model or study.goal.model
    cell = _cell_from_study(study, height, spacing, head_mass)
    freq = np.linspace(fmin, fmax, int(points))
    bands = solve_bands(cell, freq, model=model, progress=progress)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    scale = study.meta.scale
    doc = bands_to_json(bands, study.meta.name, scale)
    write_text(out / "bands.json", json.dumps(doc, indent=1))
    write_text(out / "bands.csv", bands_to_csv(bands))
    if figure:
        from optgrade.plotting.bands import plot_bands

        title = None
        if scale == "site":
            head = f", head mass {head_mass:.4g} kg" if head_mass else ""
            title = (
                f"{model} model: post L = {_eng(height, 'm')}{head}, spacing {_eng(spacing, 'm')} "
                "- simplified model, verify with a qualified engineer"
            )
        plot_bands(bands, out / "bands.png", title=title)
    return bands


def run(args: argparse.Namespace) -> int:
    """Run ``optgrade bands``; input errors raise StudyError (exit 2)."""
    from rich.console import Console
    from rich.progress import Progress

    from optgrade.commands import open_output_dir

    study = open_study(args.study)
    open_output_dir(args.out)  # before the progress display: an existing file etc., exit 2
    console = Console(stderr=True, soft_wrap=True)
    with Progress(console=console, transient=True) as prog:
        task = prog.add_task("solving bands", total=args.points)

        def progress(done, total):
            prog.update(task, completed=done, total=total)

        bands = run_bands(
            study,
            args.height,
            args.spacing,
            args.out,
            head_mass=args.head_mass,
            fmin=args.fmin,
            fmax=args.fmax,
            points=args.points,
            model=args.model,
            figure=not args.no_figure,
            progress=progress,
        )
    n_leaky = sum(int(np.sum(b.is_leaky & np.isfinite(b.k))) for b in bands.branches)
    from optgrade.units import format_eng

    gaps = ", ".join(f"{format_eng(lo, 'Hz')} - {format_eng(hi, 'Hz')}"
                     for lo, hi in bands.gaps) or "none"
    from rich.markup import escape

    console.print(
        f"wrote {escape(str(Path(args.out) / 'bands.json'))}, bands.csv"
        + ("" if args.no_figure else ", bands.png")
    )
    console.print(
        f"rod resonance(s): {', '.join(format_eng(f, 'Hz') for f in bands.resonances[:2])}; "
        f"gaps: {gaps}; leaky points: {n_leaky}"
    )
    for w in bands.warnings:
        console.print(f"note: {escape(w)}")
    if study.meta.scale == "site":
        console.print(SITE_CAUTION)
    return 0
