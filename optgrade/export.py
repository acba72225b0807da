"""Exports of one search trial: machining table, drawing, figure sheet, result, report.

The set is written as a unit: every file is first written into a private staging folder inside
DIR; only when all of them exist is the old manifest ``export.json`` removed, the files moved into
place (``os.replace``) and the new manifest written last, with each file's size and sha256. A
set whose manifest is missing or does not match its files is incomplete
(:func:`check_export`): a kill or a full disk while writing leaves either the previous set with
its manifest or a set without one, never a silent mix of two trials.

Files of the set:

``table.csv``    machining table via :func:`optgrade.layout.write_table` (header: study name,
                 units, datum, material, date; plus trial, study hash and, at site scale, the
                 caution);
``layout.dxf``   workshop drawing (`optgrade.drawing`): plan of a few rows at the row pitch,
                 elevation with head masses, datums, hole table (every resonator's position,
                 height, head mass, tolerance as in table.csv), title block (millimetres);
``sheet.png``    figure sheet: elevation, plan, channel map, fractions against frequency,
                 optimisation history, Pareto front (multi-objective) or a summary panel;
``result.json``  predicted performance by frequency and channel, objective values, study hash,
                 trial number, fabrication check;
``report.txt``   short plain-text report, with the site-scale caution where it applies;
``export.json``  the manifest (written last).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import shutil
import tempfile
from decimal import Decimal
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from optgrade import __version__, fabrication, objectives, profiles, search
from optgrade._atomic import atomic_write
from optgrade.study import SITE_CAUTION
from optgrade.units import format_eng

if TYPE_CHECKING:  # pragma: no cover
    import optuna

    from optgrade.layout import Layout
    from optgrade.propagation import Trace
    from optgrade.study import Study

__all__ = ["EXPORT_FILES", "MANIFEST", "SITE_CAUTION", "ExportError", "check_export",
           "export_candidates", "export_layout", "export_trial"]

#: The files of an export set, in the order they are moved into place.
EXPORT_FILES = ("table.csv", "layout.dxf", "sheet.png", "result.json", "report.txt")
#: The manifest, written after every file of the set is in place.
MANIFEST = "export.json"
MANIFEST_FORMAT = 1


class ExportError(ValueError):
    """An export set that is incomplete or mixed (manifest missing or not matching)."""

#: How the report names the propagation model that gave the numbers.
_MODEL_WORDS = {"scattering": "exact multiple-scattering model of the finite row",
                "wkb": "fast surrogate, adiabatic WKB march"}

BENDING_NOTE = ("Rods are modelled in axial motion only; their bending modes (coupling to "
                "horizontal motion) are not represented.")


def _write_text(path: Path, text: str) -> Path:
    return atomic_write(path, lambda p: p.write_text(text, encoding="utf-8"))


def _clean(a: Any) -> list:
    return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, dtype=float)]


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if math.isfinite(float(obj)) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    return obj


# ---------------------------------------------------------------------------------------------
# DXF (optgrade.drawing)


def _length_text(value_m: float, unit: str = "mm") -> str:
    """A length (m) as the machining table writes it (shortest exact decimal), in mm or m."""
    from optgrade.layout import _shortest

    return _shortest(float(value_m), Decimal(1000 if unit == "mm" else 1))


def write_dxf(study: Study, layout: Layout, path: Path, *, trial_number: int | None,
              date: str) -> Path:
    """The workshop drawing of ``layout`` (`optgrade.drawing.write_dxf`) with the study's title
    block."""
    from optgrade.drawing import TitleBlock
    from optgrade.drawing import write_dxf as _draw

    title = TitleBlock(
        study=study.meta.name, trial=trial_number,
        rod_material=study.resonator.material or "custom (see study file)",
        substrate_material=study.substrate.material or "custom (see study file)",
        diameter_mm=_length_text(float(np.max(layout.diameter))),
        row_pitch_mm=_length_text(study.resonator.row_pitch),
        height_tolerance_mm=_length_text(study.fabrication.height_tolerance),
        date=date, package=f"optgrade {__version__}",
        caution=SITE_CAUTION if study.meta.scale == "site" else None,
    )
    return _draw(layout, path, row_pitch=study.resonator.row_pitch, title=title)


# ---------------------------------------------------------------------------------------------
# figure sheet


def write_sheet(path: Path, study: Study, layout: Layout, trace: Trace, *,
                history: tuple | None, pareto: tuple | None, summary: list[str],
                trial_number: int | None, spread: tuple | None = None, reach=None) -> Path:
    """Figure sheet PNG: layout, channel map, fractions, history, Pareto front or summary.

    Drawn on a bare :class:`matplotlib.figure.Figure` (no pyplot), so the caller's plotting
    backend is left alone."""
    from matplotlib.figure import Figure

    from optgrade.plotting import search as _plot_search
    from optgrade.plotting import trace as _plot_trace

    fig = Figure(figsize=_plot_search.figure_size(6))
    axes = fig.subplots(3, 2)
    ax = axes.ravel()
    _plot_trace.plot_elevation(ax[0], layout, title="elevation")
    scale, unit = _plot_trace.length_unit(float(layout.length))
    _plot_search.plot_plan(ax[1], layout.x, layout.diameter, study.resonator.row_pitch,
                           scale=1.0 / scale, unit=unit)
    _plot_trace.plot_channel_map(ax[2], trace, layout)
    _plot_trace.plot_fractions(ax[3], trace, goal_channel=study.goal.channel,
                               required=(float(study.goal.required_fraction)
                                         if study.goal.channel in trace.fractions else None),
                               spread=spread,
                               reachable=None if reach is None else np.asarray(reach.reachable))
    if history is not None and len(history[0]):
        _plot_search.plot_history(ax[4], history[0], history[1], chosen=trial_number)
    else:
        _plot_search.describe(ax[4], ["no optimisation history (single layout)"])
    if pareto is not None:
        values, is_front, names, chosen, numbers = pareto
        _plot_search.plot_pareto(ax[5], values, is_front, names, chosen=chosen,
                                 numbers=numbers)
    else:
        _plot_search.describe(ax[5], summary)
    fig.suptitle(f"{study.meta.name}: trial {trial_number}", fontsize=11)
    is_site = study.meta.scale == "site"
    fig.tight_layout(rect=(0, 0.04 if is_site else 0, 1, 1))
    if is_site:
        import textwrap

        fig.text(0.01, 0.005, "\n".join(textwrap.wrap(SITE_CAUTION, 190)), fontsize=8,
                 color="#8B0000", va="bottom")

    def save(p: Path) -> None:
        fig.savefig(p, dpi=110, format="png")

    return atomic_write(Path(path), save)


# ---------------------------------------------------------------------------------------------
# the export


def _summary_lines(study: Study, trace: Trace, values: dict, violations: list,
                   score: float) -> list[str]:
    f = np.asarray(trace.frequency, dtype=float)
    band = f"{format_eng(study.goal.band[0], 'Hz')}-{format_eng(study.goal.band[1], 'Hz')}"
    weights = {n: w for n, w in study.goal.weights.items() if w}
    top = _largest_score(weights)
    lines = [f"goal: {study.goal.channel} over {band} ({len(f)} frequencies), "
             f"required fraction {study.goal.required_fraction:g}",
             f"weighted score: {score:.4f} of at most {top:.4g}",
             "  = sum of weight x score: maximised goals add (each at most 1),",
             "    minimised penalties subtract (each at least 0)"]
    for name, v in values.items():
        obj = objectives.get(name)
        w = weights.get(name, 0.0)
        said = {"maximize": "maximised", "minimize": "minimised"}[obj.direction]
        lines.append(f"  {name}: {v.score:.4f} ({said}, weight {w:g}, adds "
                     f"{w * objectives.signed(obj, v.score):+.4f})")
    bad = ~np.asarray(trace.is_adiabatic, dtype=bool)
    lines.append(f"non-adiabatic frequencies (eps > 0.1): {int(bad.sum())} of {len(f)}")
    fab = "all limits met" if not violations else f"{len(violations)} violation(s)"
    lines.append(f"fabrication check: {fab}")
    return lines


def _largest_score(weights: dict[str, float]) -> float:
    """The largest weighted score the goals allow: every maximised goal at 1, every minimised
    penalty at 0; a composite goal (robustness: a quantile of the main score) at the largest
    main score."""
    main = sum(w for n, w in weights.items()
               if not objectives.get(n).is_composite and objectives.get(n).direction == "maximize")
    return float(sum(w * (main if objectives.get(n).is_composite else 1.0)
                     for n, w in weights.items() if objectives.get(n).direction == "maximize"))


def export_layout(
    study: Study,
    layout: Layout,
    out_dir: str | os.PathLike,
    *,
    context: objectives.EvalContext | None = None,
    trial_number: int | None = None,
    history: tuple | None = None,
    pareto: tuple | None = None,
    extra: dict[str, Any] | None = None,
) -> dict[str, Path]:
    """Trace ``layout`` and write the export set into ``out_dir`` as a unit (module docstring);
    returns the paths of its files (``table``, ``dxf``, ``sheet``, ``result``, ``report``,
    ``manifest``).

    ``context`` is the search's evaluation context (built for ``study`` when omitted)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=".export-", dir=out))
    try:
        staged = _write_set(study, layout, stage, context=context, trial_number=trial_number,
                            history=history, pareto=pareto, extra=extra)
        return _commit_set(out, staged, study=study.meta.name, trial=trial_number,
                           key=search.study_hash(study))
    finally:
        shutil.rmtree(stage, ignore_errors=True)


def _file_record(path: Path) -> dict[str, Any]:
    data = path.read_bytes()
    return {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}


def _commit_set(out: Path, staged: dict[str, Path], *, study: str, trial: int | None,
                key: str) -> dict[str, Path]:
    """Move a complete staged set into ``out``: old manifest off, files in, manifest last."""
    records = {p.name: _file_record(p) for p in staged.values()}
    (out / MANIFEST).unlink(missing_ok=True)  # from here until the end the set is incomplete
    paths = {}
    for name, path in staged.items():
        final = out / path.name
        os.replace(path, final)
        paths[name] = final
    manifest = {"format": MANIFEST_FORMAT, "study": study, "trial": trial, "study_hash": key,
                "package_version": __version__, "files": records}
    paths["manifest"] = _write_text(out / MANIFEST, json.dumps(manifest, indent=1) + "\n")
    return paths


def check_export(out_dir: str | os.PathLike) -> dict[str, Any]:
    """The manifest of the export set in ``out_dir`` after checking every file against it.

    Raises
    ------
    ExportError
        No manifest (never finished, or interrupted while being replaced), an unreadable one,
        or a file missing or different from what the manifest records.
    """
    out = Path(out_dir)
    try:
        manifest = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
        files = manifest["files"]
    except FileNotFoundError:
        raise ExportError(f"{out}: no {MANIFEST}: the export set is incomplete (interrupted "
                          "or never finished); export again") from None
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ExportError(f"{out / MANIFEST}: unreadable manifest ({exc})") from None
    for name, rec in files.items():
        path = out / name
        if not path.is_file() or _file_record(path) != rec:
            raise ExportError(f"{path}: does not match {MANIFEST} (trial {manifest.get('trial')}"
                              "): the export set is mixed or damaged; export again")
    return manifest


def _write_set(study: Study, layout: Layout, out: Path, *, context, trial_number, history,
               pareto, extra) -> dict[str, Path]:
    """Write every file of the set into ``out`` (the staging folder)."""
    from optgrade.layout import write_table

    context = context or search.make_context(study)
    trace = _detailed_trace(study, layout, context)
    names = search.goal_names(study)
    values = objectives.evaluate_many(names, trace, layout, study, context)
    weights = {n: w for n, w in study.goal.weights.items() if w}
    score = objectives.weighted_score(values, weights)
    violations = fabrication.check_layout(study, layout)
    is_site = study.meta.scale == "site"
    key = search.study_hash(study)
    today = _dt.datetime.now(_dt.timezone.utc).date()

    header = [f"trial: {trial_number}", f"study hash (sha256): {key}",
              f"package: optgrade {__version__}"]
    if is_site:
        header.append(SITE_CAUTION)
    paths: dict[str, Path] = {}
    paths["table"] = Path(write_table(layout, out / "table.csv", study_name=study.meta.name,
                                      material=study.resonator.material or "custom",
                                      date=today, extra_header=header))
    paths["dxf"] = write_dxf(study, layout, out / "layout.dxf", trial_number=trial_number,
                             date=today.isoformat())
    summary = _summary_lines(study, trace, values, violations, score)
    rob = values.get("robustness")
    spread = None
    if rob is not None and "wanted_p10" in rob.details:
        spread = (np.asarray(rob.details["wanted_p10"]), np.asarray(rob.details["wanted_p90"]))
    reach = _reach_of(study, context, trace)
    paths["sheet"] = write_sheet(out / "sheet.png", study, layout, trace, history=history,
                                 pareto=pareto, summary=summary, trial_number=trial_number,
                                 spread=spread, reach=reach)
    if getattr(trace, "far_face", None) is not None and trace.far_face.flux is not None:
        paths["far_face"] = _write_far_face_figure(out / "far_face.png", study, trace)
    from optgrade.verdict import verdict

    judged = verdict(study, layout, trace)
    result = {
        "verdict": judged.to_dict(),
        "study": study.meta.name,
        "study_hash": key,
        "study_file_sha256": search.file_hash(study),
        "trial": trial_number,
        "package_version": __version__,
        "date": today.isoformat(),
        "scale": study.meta.scale,
        "weighted_score": score,
        "objectives": {n: {"score": v.score, "direction": objectives.get(n).direction,
                           "details": v.details} for n, v in values.items()},
        "fabrication": {"is_ok": not violations,
                        "violations": [v.to_dict() for v in violations]},
        "layout": {"n_resonators": int(layout.n_resonators), "length_m": float(layout.length),
                   "x_m": _clean(layout.x), "height_m": _clean(layout.height),
                   "head_mass_kg": _clean(layout.head_mass)},
        "performance": trace.to_dict(),
        "notes": [BENDING_NOTE] + ([SITE_CAUTION] if is_site else []),
    }
    if reach is not None:
        result["reach"] = reach.to_dict()
    if extra:
        result.update(extra)
    paths["result"] = _write_text(out / "result.json",
                                  json.dumps(_jsonable(result), indent=1) + "\n")
    paths["report"] = _write_text(out / "report.txt",
                                  _report(study, layout, trace, summary, violations, is_site,
                                          trial_number, reach))
    return paths


def _detailed_trace(study: Study, layout: Layout, context) -> Trace:
    """The layout's trace with everything the report shows: the search's model scores only the
    far-face zone (``far_face_detail`` False); the export asks for the whole map, then puts the
    model back as it was."""
    model = getattr(context, "model", None)
    thick = getattr(study.substrate, "thickness", None)
    if thick is None or model is None or getattr(model, "far_face_detail", True):
        return context.trace_fn(layout)
    model.far_face_detail = True
    try:
        return context.trace_fn(layout)
    finally:
        model.far_face_detail = False


def _write_far_face_figure(path: Path, study: Study, trace: Trace) -> Path:
    """far_face.png: where the converted waves reach the block's far face (with the zone)."""
    from matplotlib.figure import Figure

    from optgrade._atomic import save_figure
    from optgrade.plotting.trace import plot_far_face

    zone = study.goal.far_face
    fig = Figure(figsize=(9, 5.5), layout="constrained")
    ax = fig.add_subplot()
    plot_far_face(ax, trace, zone=None if zone is None else zone.x_range,
                  mode=None if zone is None else zone.mode,
                  title=f"{study.meta.name}: converted waves at the far face, block "
                        f"{format_eng(trace.far_face.depth, 'm')} (first arrival)")
    save_figure(fig, path)
    return path


def _reach_of(study: Study, context, trace: Trace):
    """The reachability estimate of the study's goal (optgrade/reach.py) on the trace's
    frequencies, shown beside the result; None for a stand-in pipeline (no physical model)."""
    if context is None or context.model is None:
        return None
    from optgrade.reach import reachability

    return reachability(study, freq=np.asarray(trace.frequency, dtype=float))


def _report(study: Study, layout: Layout, trace: Trace, summary: list[str], violations: list,
            is_site: bool, trial_number: int | None, reach=None) -> str:
    f = np.asarray(trace.frequency, dtype=float)
    # the same measure the search scored (blocking: insertion effect against bare ground)
    wanted = objectives.wanted_fraction(trace, study.goal.channel, layout, study)
    wanted = np.nan_to_num(wanted, nan=0.0)
    meets = wanted >= study.goal.required_fraction
    np.asarray(layout.height) * 1e3
    from optgrade.plotting.trace import length_unit
    from optgrade.verdict import verdict

    unit = length_unit(float(layout.length))[1]  # mm on the bench, m at site scale

    def ln(value_m: float) -> str:
        return f"{_length_text(value_m, unit)} {unit}"

    judged = verdict(study, layout, trace)
    lines = [
        judged.line(),
        *("  binding: " + t for t in judged.limit_lines()),
        "",
        f"optgrade {__version__} report: {study.meta.name}, trial {trial_number}",
        "",
        "ASKED",
        f"  send the incoming Rayleigh wave to: {study.goal.channel}",
        f"  band {format_eng(study.goal.band[0], 'Hz')} to {format_eng(study.goal.band[1], 'Hz')},"
        f" at least {study.goal.required_fraction:.0%} of the power at each frequency",
        "",
        "LAYOUT",
        f"  {layout.n_resonators} resonators, {ln(float(layout.x[-1]))} from the first to the "
        f"last axis (the drawing's overall dimension; with the last cell the row takes "
        f"{ln(round(layout.length, 12))})",
        f"  heights in table order {ln(float(layout.height[0]))} to "
        f"{ln(float(layout.height[-1]))} (range {ln(float(np.min(layout.height)))} to "
        f"{ln(float(np.max(layout.height)))}), diameter {ln(float(np.max(layout.diameter)))}, "
        f"row pitch {ln(study.resonator.row_pitch)}",
        "",
        "PREDICTED (" + _MODEL_WORDS.get(trace.propagation,
                                         f"propagation model {trace.propagation!r}") + ")",
        f"  wanted fraction: mean {wanted.mean():.3f}, worst {wanted.min():.3f} at "
        f"{format_eng(f[int(np.argmin(wanted))], 'Hz')}",
        f"  frequencies meeting the requirement: {int(meets.sum())} of {len(f)}",
    ]
    lines += ["  " + s for s in summary[1:]]
    from optgrade.verdict import far_face_lines

    face_lines = far_face_lines(study, trace)
    if face_lines:
        lines += ["", *face_lines]
    if reach is not None:
        lines += ["", "REACHABLE (estimate from the local modes of the admissible cells, before "
                  "any search)"] + ["  " + t.strip() for t in reach.lines()]
    warn = []
    bad = ~np.asarray(trace.is_adiabatic, dtype=bool)
    if trace.balance_error is not None and np.isfinite(trace.balance_error).any():
        worst = float(np.nanmax(np.abs(trace.balance_error)))
        if worst > 1e-6:
            warn.append(f"energy balance of the prediction off by up to {worst:.1e} of the "
                        "incident power (bound 1e-6): do not trust these numbers.")
    if bad.any():
        warn.append(f"{int(bad.sum())} frequencies are outside the adiabatic model's validity "
                    f"(eps > 0.1), e.g. {format_eng(f[bad][0], 'Hz')}: check them with "
                    "`optgrade verify`.")
    for v in violations:
        warn.append(f"fabrication: {v.field}: {v.reason} (resonator {v.index})")
    warn.append(BENDING_NOTE)
    lines += ["", "WARNINGS"] + ["  - " + w for w in warn]
    if is_site:
        lines += ["", SITE_CAUTION]
    return "\n".join(lines) + "\n"


def _history(ostudy: optuna.Study) -> tuple[np.ndarray, np.ndarray]:
    from optuna.trial import TrialState

    done = ostudy.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
    return (np.array([t.number for t in done]),
            np.array([t.user_attrs.get("score", np.nan) for t in done], dtype=float))


def _pareto(ostudy: optuna.Study, study: Study, number: int) -> tuple | None:
    from optuna.trial import TrialState

    if len(ostudy.directions) < 2:
        return None
    done = ostudy.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
    front = {t.number for t in ostudy.best_trials}
    vals = np.array([t.values[:2] for t in done], dtype=float)
    is_front = np.array([t.number in front for t in done])
    chosen = next((t.values[:2] for t in done if t.number == number), None)
    numbers = np.array([t.number for t in done], dtype=int)
    return vals, is_front, list(study.search.objectives[:2]), chosen, numbers


def export_trial(
    study: Study,
    source: optuna.Study | str,
    trial_number: int,
    out_dir: str | os.PathLike,
    *,
    context: objectives.EvalContext | None = None,
) -> dict[str, Path]:
    """Export a stored trial: rebuild its layout from its parameters and write every file.

    ``source`` is an ``optuna.Study`` or a storage URL (the optuna study name is
    ``study.meta.name``).

    Raises
    ------
    optgrade.search.SearchError
        Unknown trial, or a trial without parameters.
    """
    if isinstance(source, str):
        source = search.load_search(study, source)
    trials = [t for t in source.get_trials(deepcopy=False) if t.number == trial_number]
    if not trials:
        raise search.SearchError("--trial", f"no trial {trial_number} in the stored study")
    trial = trials[0]
    if set(trial.params) != set(profiles.search_space(study)):
        raise search.SearchError("--trial", f"trial {trial_number} has no complete parameter "
                                 f"set (state {trial.state.name})")
    layout = profiles.layout_from_params(study, trial.params)
    extra = {"params": trial.params, "trial_state": trial.state.name,
             "stored_values": trial.values}
    return export_layout(study, layout, out_dir, context=context, trial_number=trial_number,
                         history=_history(source), pareto=_pareto(source, study, trial_number),
                         extra=extra)


#: scores within this of the best (relative to max(1, |best|)) count as a tie
TIE_TOL = 1e-9


def export_candidates(study: Study, source: optuna.Study | str, out_dir: str | os.PathLike,
                      n_best: int | None = None) -> dict[str, Any]:
    """Write the best ``n_best`` distinct layouts of a search (default ``search.keep_best``) as
    machining tables into ``out_dir/candidates/`` (``rank1_trial12.csv``, ...) with a summary
    ``candidates.csv``, for ``optgrade compare``. Layouts are distinct when their tables differ
    (two parameter sets that round to one layout are one candidate). Also reports how many
    finished trials tie at the best score: where most do, the goal does not tell the layouts
    apart and a secondary goal is suggested.

    Returns a dict with ``paths`` (the tables, best first), ``n_tied``, ``n_complete`` and
    ``advice`` (None, or the sentence about ties).
    """
    from optuna.trial import TrialState

    from optgrade.layout import write_table

    if isinstance(source, str):
        source = search.load_search(study, source)
    n_best = int(study.search.keep_best if n_best is None else n_best)
    space = set(profiles.search_space(study))
    scored = [(float(t.user_attrs["score"]), t.number, t) for t in
              source.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
              if "score" in t.user_attrs and np.isfinite(t.user_attrs["score"])
              and set(t.params) == space]
    scored.sort(key=lambda r: (-r[0], r[1]))
    out: dict[str, Any] = {"paths": [], "n_tied": 0, "n_complete": len(scored), "advice": None}
    if not scored:
        return out
    best = scored[0][0]
    tol = TIE_TOL * max(1.0, abs(best))
    out["n_tied"] = n_tied = sum(1 for r in scored if r[0] >= best - tol)
    if n_tied >= 3 and n_tied >= 0.5 * len(scored):
        others = [n for n in objectives.names() if n not in study.goal.weights][:3]
        out["advice"] = (f"{n_tied} of {len(scored)} finished trials tie at the best score "
                         f"{best:.4f}: the goal does not tell these layouts apart; add a "
                         "secondary goal with a small weight in [goal.weights]"
                         + (f" (e.g. {', '.join(others)})" if others else ""))
    if n_best <= 0:
        return out
    folder = Path(out_dir) / "candidates"
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob("rank*_trial*.csv"):  # a previous export's candidates
        old.unlink()
    kept: list[tuple[float, int, Layout]] = []
    for score, number, trial in scored:
        layout = profiles.layout_from_params(study, trial.params)
        if any(layout == k[2] for k in kept):
            continue
        kept.append((score, number, layout))
        if len(kept) >= n_best:
            break
    today = _dt.datetime.now(_dt.timezone.utc).date()
    lines = ["rank,trial,score,n_resonators,first_to_last_axis_mm,file"]
    for rank, (score, number, layout) in enumerate(kept, start=1):
        name = f"rank{rank}_trial{number}.csv"
        header = [f"candidate {rank} of the {len(kept)} best distinct layouts; trial: {number}; "
                  f"score {score:.6g}", f"study hash (sha256): {search.study_hash(study)}"]
        if study.meta.scale == "site":
            header.append(SITE_CAUTION)
        out["paths"].append(Path(write_table(layout, folder / name, study_name=study.meta.name,
                                             material=study.resonator.material or "custom",
                                             date=today, extra_header=header)))
        lines.append(f"{rank},{number},{score:.6g},{layout.n_resonators},"
                     f"{_length_text(float(layout.x[-1]))},{name}")
    comment = [f"# {out['advice']}"] if out["advice"] else []
    _write_text(folder / "candidates.csv", "\n".join(comment + lines) + "\n")
    return out
