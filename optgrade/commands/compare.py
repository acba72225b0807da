"""``optgrade compare STUDY TABLE... --out DIR``: several candidate layouts side by side.

Each table is traced with the study's propagation model (the exact row model by default) over
the study's band; the command prints one line per candidate (resonators, row length, the
wanted channel's band mean and worst value, how many frequencies meet ``required_fraction``,
the verdict) and writes ``compare.json``, ``compare.csv`` and ``compare.png`` (the wanted
fraction of every candidate against frequency with the required line, and their counts and
lengths). Issue 15 item 6.
"""

from __future__ import annotations

import argparse
import csv
import io
from pathlib import Path
from typing import Any

import numpy as np

from optgrade._atomic import save_figure, write_json, write_text
from optgrade.commands import add_study_argument, open_layout, open_output_dir, open_study
from optgrade.errors import StudyError

MAX_CANDIDATES = 12


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "compare",
        help="compare candidate layouts of one study (fractions, lengths, counts, verdicts)",
        description=(
            "Trace several machining tables of one study with its propagation model and show "
            "them side by side: one line each, compare.json, compare.csv and compare.png."
        ),
    )
    add_study_argument(parser)
    parser.add_argument("tables", nargs="+", metavar="TABLE.csv",
                        help=f"resonator tables to compare (2 to {MAX_CANDIDATES})")
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.set_defaults(handler=run)
    return parser


def compare_layouts(study: Any, layouts: list[Any], names: list[str]) -> list[dict[str, Any]]:
    """One summary per layout: traced with the study's model, judged by its verdict."""
    from optgrade.propagation import propagation_model
    from optgrade.verdict import verdict

    model = propagation_model(study)
    rows = []
    for name, layout in zip(names, layouts, strict=True):
        tr = model.trace(layout)
        v = verdict(study, layout, tr)
        rows.append({
            "name": name, "n_resonators": int(layout.x.size), "length_m": float(layout.length),
            "mean_wanted": float(np.mean(v.wanted)), "worst_wanted": float(np.min(v.wanted)),
            "n_met": int(v.meets.sum()), "n_frequencies": int(v.meets.size),
            "is_met": bool(v.is_met), "verdict": v.line(),
            "frequency_hz": [float(f) for f in v.frequency],
            "wanted": [float(w) for w in v.wanted], "propagation": tr.propagation,
        })
    return rows


def _plot(rows: list[dict[str, Any]], study: Any, path: Path) -> None:
    from matplotlib.figure import Figure

    from optgrade.plotting.trace import frequency_unit

    fig = Figure(figsize=(11, 4.8), layout="constrained")
    ax, ax2 = fig.subplots(1, 2, gridspec_kw={"width_ratios": [2.4, 1]})
    fs, unit = frequency_unit(max(max(r["frequency_hz"]) for r in rows))
    for r in rows:
        ax.plot(np.asarray(r["frequency_hz"]) / fs, r["wanted"], lw=1.4,
                label=f"{r['name']} (mean {r['mean_wanted']:.2f}, "
                      f"{r['n_met']}/{r['n_frequencies']} met)")
    ax.axhline(float(study.goal.required_fraction), color="#c1121f", ls=(0, (6, 3)), lw=1.2,
               label=f"required {float(study.goal.required_fraction):.0%}")
    ax.set_xlabel(f"frequency ({unit})")
    ax.set_ylabel(f"{study.goal.channel} (fraction of incident power)")
    ax.set_ylim(0, 1.02)
    ax.set_title(f"{study.meta.name}: wanted channel per candidate")
    ax.legend(fontsize=8, loc="best")
    names = [r["name"] for r in rows]
    y = np.arange(len(rows))
    lengths_mm = [1e3 * r["length_m"] for r in rows]
    scale, lunit = (1.0, "mm") if max(lengths_mm) < 5000 else (1e-3, "m")
    ax2.barh(y, [v * scale for v in lengths_mm], color="#7a9cc6")
    for yi, r in zip(y, rows, strict=True):
        ax2.text(0, yi, f" {r['n_resonators']} resonators", va="center", fontsize=8)
    ax2.set_yticks(y, names, fontsize=8)
    ax2.invert_yaxis()
    ax2.set_xlabel(f"row length ({lunit})")
    ax2.set_title("size")
    save_figure(fig, path)


def _csv(rows: list[dict[str, Any]]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["name", "n_resonators", "length_mm", "mean_wanted", "worst_wanted", "n_met",
                "n_frequencies", "goal_met"])
    for r in rows:
        w.writerow([r["name"], r["n_resonators"], f"{1e3 * r['length_m']:.3f}",
                    f"{r['mean_wanted']:.4f}", f"{r['worst_wanted']:.4f}", r["n_met"],
                    r["n_frequencies"], "yes" if r["is_met"] else "no"])
    return buf.getvalue()


def run(args: argparse.Namespace) -> int:
    """Entry point of ``optgrade compare``."""
    from rich.console import Console
    from rich.markup import escape

    from optgrade.study import SITE_CAUTION

    if not 2 <= len(args.tables) <= MAX_CANDIDATES:
        raise StudyError([f"TABLE: give 2 to {MAX_CANDIDATES} tables to compare, "
                          f"got {len(args.tables)}"])
    study = open_study(args.study)
    layouts = [open_layout(t, option_name=f"TABLE {t}") for t in args.tables]
    out = open_output_dir(args.out)
    names = [Path(t).stem for t in args.tables]
    if len(set(names)) != len(names):
        names = [f"{i + 1}: {n}" for i, n in enumerate(names)]
    rows = compare_layouts(study, layouts, names)
    out.mkdir(parents=True, exist_ok=True)
    payload: dict[str, Any] = {"study": study.meta.name, "channel": study.goal.channel,
                               "required_fraction": float(study.goal.required_fraction),
                               "candidates": rows}
    is_site = study.meta.scale == "site"
    if is_site:
        payload["caution"] = SITE_CAUTION
    write_json(out / "compare.json", payload)
    write_text(out / "compare.csv", _csv(rows))
    _plot(rows, study, out / "compare.png")
    console = Console(highlight=False, soft_wrap=True)
    console.print(f"[bold]{escape(study.meta.name)}[/]: {len(rows)} candidates, "
                  f"{study.goal.channel} >= {float(study.goal.required_fraction):.0%} wanted")
    console.print(f"  {'candidate':<28s} {'count':>5s} {'length':>10s} {'mean':>6s} "
                  f"{'worst':>6s} {'met':>9s}")
    for r in rows:
        length = (f"{1e3 * r['length_m']:.1f} mm" if r["length_m"] < 5.0
                  else f"{r['length_m']:.2f} m")
        console.print(f"  {escape(r['name'][:28]):<28s} {r['n_resonators']:>5d} {length:>10s} "
                      f"{r['mean_wanted']:6.3f} {r['worst_wanted']:6.3f} "
                      f"{r['n_met']:>4d}/{r['n_frequencies']:<4d}")
    for r in rows:
        console.print(f"  {escape(r['name'])}: {escape(r['verdict'])}")
    if is_site:
        console.print(f"[yellow]{SITE_CAUTION}[/]")
    console.print(f"wrote {out / 'compare.json'}, compare.csv, compare.png")
    return 0
