"""Plausibility limits and bounded work of the command line (issue 17 part 4; docs/limits.md).

Every command refuses, in seconds and with exit status 2, work that the physics does not call
for or that this machine cannot hold:

- the study (:func:`check_study_work`, run by ``open_study`` for every command): the band against
  the rods' first axial resonances, the cell and the row against the wavelengths at the top of
  the band, and memory estimates of the dispersion-table build and of the exact row model
  before anything is allocated;
- a table against the study it is traced or verified with (:func:`fit_study_to_layout`: the
  study's layout limits widened to include it, refused only over the memory budget);
- the full-wave grid of ``verify`` (:func:`check_verify_plan`);
- output folders and journal files (:func:`check_output_dir`, :func:`check_journal_path`);
- worker counts (:func:`cap_jobs`).
"""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from optgrade.errors import StudyError

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

__all__ = [
    "BAND_ABOVE_RESONANCE", "BAND_BELOW_RESONANCE", "MAX_CELL_WAVELENGTHS",
    "MAX_CELL_UPDATES", "MAX_ROW_WAVELENGTHS", "cap_jobs", "check_journal_path",
    "fit_study_to_layout", "check_output_dir", "check_study_work", "check_verify_plan",
    "memory_budget",
]

#: The band may start at most this far below the lowest first rod resonance: well below it the
#: rods move as rigid masses and load the surface by (f / f1)^2 of their mass only (1 % at 0.1).
BAND_BELOW_RESONANCE = 0.1
#: ... and end at most this far above the highest one: the design works on the first axial
#: resonance; 10 x f1 lies beyond the fifth axial mode (9 f1) of the shortest rod.
BAND_ABOVE_RESONANCE = 10.0
#: Largest cell (spacing max, row pitch) in shear wavelengths at the top of the band. A graded
#: row works near the grating condition a ~ lambda_T / 2; cells of many wavelengths radiate
#: many diffraction orders per cell and the lattice sums grow as (a / lambda_T)(b / lambda_T).
MAX_CELL_WAVELENGTHS = 4.0
#: Longest row (layout.max_length) in Rayleigh wavelengths at the top of the band: the examples
#: use 26-42; the Green's tables and the full-wave grid grow with it.
MAX_ROW_WAVELENGTHS = 200.0
#: Most cell updates (grid cells x time steps, both runs) of one full-wave check: about 2 hours
#: at the measured 150 M updates/s of docs/fullwave.md (the bench demo needs 1e9-5e9).
MAX_CELL_UPDATES = 1e12
#: Relative slack of the table checks against the study's ranges (written tables are rounded).
_SLACK = 0.02


def memory_budget() -> int:
    """Half of this machine's physical memory (bytes): the most one command may plan to use."""
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover - not POSIX
        total = 8 << 30
    return int(total) // 2


def _gib(n: float) -> str:
    return f"{n / (1 << 30):.3g} GiB"


def _hz(f: float) -> str:
    from optgrade.units import format_eng

    return format_eng(f, "Hz")


def _m(x: float) -> str:
    return f"{x * 1e3:.4g} mm" if x < 1.0 else f"{x:.4g} m"


def lattice_table_bytes(study: Study, model: str | None = None) -> float:
    """Peak memory (bytes) of the dispersion-table build of ``study`` (the lattice sums of
    optgrade.dispersion._lattice over the surrogate's kappa x omega grid at the largest
    spacing): about five float/complex temporaries of 8-16 bytes per (kappa, omega, term)."""
    from optgrade.dispersion import _lattice as lat
    from optgrade.dispersion import _surrogate as sur

    model = model or study.goal.model
    if model == "homogenised":
        return 0.0
    a = float(study.layout.spacing[1])
    b = float(study.resonator.row_pitch)
    r = 0.5 * float(study.resonator.diameter)
    m_s = max(lat.default_harmonics(a, r, model), 2)
    n_s = int(math.ceil(m_s * b / a)) if model == "lattice" else 0
    kt_max = 2 * math.pi * float(study.goal.band[1]) / float(study.substrate.ct)
    x_dyn = max(lat._DYNAMIC_XR / r, lat._DYNAMIC_KT * kt_max)
    m_d = min(m_s, max(2, int(math.ceil(x_dyn * a / (2 * math.pi)))))
    n_d = min(n_s, int(math.ceil(x_dyn * b / (2 * math.pi)))) if model == "lattice" else 0
    terms = (2 * m_d + 1) * (2 * n_d + 1)
    return float(sur.N_KAPPA + 6) * sur.N_FREQ * terms * 64.0


def exact_model_bytes(n_frequencies: int, n_resonators: int) -> float:
    """Memory (bytes) of the exact row model's dense systems: one complex N x N matrix per
    frequency, with the solver's copy and the coupling terms about three of them."""
    return 3.0 * 16.0 * float(n_frequencies) * float(n_resonators) ** 2


def study_work_problems(study: Study) -> list[tuple[str, str]]:
    """(field, reason) for each limit of the module docstring that ``study`` breaks."""
    from optgrade.study import first_resonance_range

    out: list[tuple[str, str]] = []
    lo, hi = (float(v) for v in study.goal.band)
    f1_lo, f1_hi = first_resonance_range(study.resonator, study.layout.height)
    if lo < BAND_BELOW_RESONANCE * f1_lo:
        out.append(("goal.band", f"starts at {_hz(lo)}, below {BAND_BELOW_RESONANCE:g} x the "
                    f"lowest first rod resonance ({_hz(f1_lo)}): there the rods move as rigid "
                    "masses; raise the band minimum"))
    if hi > BAND_ABOVE_RESONANCE * f1_hi:
        out.append(("goal.band", f"ends at {_hz(hi)}, above {BAND_ABOVE_RESONANCE:g} x the "
                    f"highest first rod resonance ({_hz(f1_hi)}, beyond its fifth axial mode); "
                    "lower the band maximum or use shorter rods"))
    lam_t = float(study.substrate.ct) / hi
    lam_r = float(study.substrate.cr) / hi
    for field, size in (("layout.spacing", float(study.layout.spacing[1])),
                        ("resonator.row_pitch", float(study.resonator.row_pitch))):
        if size > MAX_CELL_WAVELENGTHS * lam_t:
            out.append((field, f"{_m(size)} is {size / lam_t:.3g} shear wavelengths at the top "
                        f"of the band ({_m(lam_t)} at {_hz(hi)}); at most "
                        f"{MAX_CELL_WAVELENGTHS:g} (a graded row works near half a wavelength)"))
    length = float(study.layout.max_length)
    if length > MAX_ROW_WAVELENGTHS * lam_r:
        out.append(("layout.max_length", f"{_m(length)} is {length / lam_r:.4g} Rayleigh "
                    f"wavelengths at the top of the band ({_m(lam_r)} at {_hz(hi)}); at most "
                    f"{MAX_ROW_WAVELENGTHS:g}"))
    if out:  # the estimates below assume a plausible study
        return out
    budget = memory_budget()
    need = lattice_table_bytes(study)
    if need > budget:
        out.append(("goal.band", f"the dispersion tables would need about {_gib(need)} while "
                    f"being built, more than half of this machine's memory ({_gib(budget)})"))
    n_max = int(study.layout.count[1])
    need = exact_model_bytes(study.goal.n_frequencies, n_max)
    if need > budget:
        out.append(("layout.count", f"the exact row model of {n_max} resonators at "
                    f"{study.goal.n_frequencies} frequencies needs about {_gib(need)}, more "
                    f"than half of this machine's memory ({_gib(budget)}); lower layout.count "
                    "max or goal.n_frequencies"))
    return out


def check_study_work(study: Study, source: str) -> None:
    """Raise StudyError (exit 2) naming each field whose limit the study breaks."""
    problems = study_work_problems(study)
    if problems:
        raise StudyError([f"{source}: {field}: {reason} (limits: docs/limits.md)"
                          for field, reason in problems])


def fit_study_to_layout(study: Study, layout: Layout, path: str | os.PathLike,
                        option: str = "--layout") -> tuple[Study, list[str]]:
    """The study to trace or verify ``layout`` with, and notes on what was changed for it.

    A measured or hand-made layout is not bound by the search's limits: where its row count,
    length, cell lengths or heights lie outside the study's layout limits, those limits are
    widened to include it (so the dispersion tables are built for the cells it has; a note says
    which and that the tables take time). What is refused (StudyError, exit 2) is what this
    machine cannot do: the exact row model of the layout over the memory budget. The table's
    header study name is quoted when it names another study."""
    from optgrade.layout import read_header

    n = int(layout.n_resonators)
    lay = study.layout
    update: dict = {}
    notes: list[str] = []
    if n > int(lay.count[1]):
        update["count"] = (int(lay.count[0]), n)
        notes.append(f"{n} resonators, more than the study's layout.count maximum "
                     f"{int(lay.count[1])}")
    if float(layout.length) > float(lay.max_length) * (1 + _SLACK):
        update["max_length"] = float(layout.length)
        notes.append(f"row length {_m(float(layout.length))} exceeds the study's "
                     f"layout.max_length {_m(float(lay.max_length))}")
    a_lo, a_hi = (float(v) for v in lay.spacing)
    sp = np.asarray(layout.spacing, dtype=float)
    if sp.min() < a_lo * (1 - _SLACK) or sp.max() > a_hi * (1 + _SLACK):
        new = (min(a_lo, float(sp.min())), max(a_hi, float(sp.max())))
        update["spacing"] = new
        notes.append(f"cell lengths {sp.min() * 1e3:.6g} .. {sp.max() * 1e3:.6g} mm reach "
                     f"outside the study's layout.spacing range {a_lo * 1e3:.6g} .. "
                     f"{a_hi * 1e3:.6g} mm; tables are built for {new[0] * 1e3:.6g} .. "
                     f"{new[1] * 1e3:.6g} mm")
    h_lo, h_hi = (float(v) for v in lay.height)
    tol = float(study.fabrication.height_tolerance)
    hh = np.asarray(layout.height, dtype=float)
    if hh.min() < h_lo * (1 - _SLACK) - tol or hh.max() > h_hi * (1 + _SLACK) + tol:
        new = (min(h_lo, float(hh.min())), max(h_hi, float(hh.max())))
        update["height"] = new
        notes.append(f"heights {hh.min() * 1e3:.6g} .. {hh.max() * 1e3:.6g} mm reach outside "
                     f"the study's layout.height range {h_lo * 1e3:.6g} .. {h_hi * 1e3:.6g} mm;"
                     f" the rods' range is taken as {new[0] * 1e3:.6g} .. {new[1] * 1e3:.6g} mm")
    reasons: list[str] = []
    need = exact_model_bytes(study.goal.n_frequencies, n)
    if need > memory_budget():
        reasons.append(f"the exact row model of {n} resonators needs about {_gib(need)}, "
                       "more than half of this machine's memory")
    widened = study
    if update:
        widened = study.model_copy(update={"layout": lay.model_copy(update=update)})
        # the widened limits must still be work this tool can do (cells of many wavelengths,
        # table sizes: docs/limits.md); the limit the layout pushed is named with its reason
        reasons += [f"{field} (widened from the study's to include the layout): {reason}"
                    for field, reason in study_work_problems(widened)]
    if reasons:
        try:
            named = read_header(path).get("study")
        except Exception:  # noqa: BLE001 - the header is only quoted in the message
            named = None
        whose = ""
        if named and named != study.meta.name:
            whose = f" (its header names the study {named!r}, not {study.meta.name!r})"
        raise StudyError([f"{option}: {path}: does not fit the study{whose}: {r}"
                          for r in reasons])
    if not update:
        return study, []
    notes = [f"{option}: {path}: {t}" for t in notes]
    notes.append(f"{option}: the layout is traced with the study's limits widened to include "
                 "it (a table outside the search's limits is not refused); new dispersion "
                 "tables may take a few minutes")
    return widened, notes


def check_verify_plan(study: Study, layout: Layout, is_fast: bool) -> dict:
    """The full-wave grid of ``verify`` planned before anything is allocated; refuse (exit 2)
    a grid over the memory budget or over `MAX_CELL_UPDATES`. Returns the estimates."""
    from optgrade.fullwave._solver import medium_of, plan_grid, rods_of

    quality = "fast" if is_fast else "normal"
    band = (float(study.goal.band[0]), float(study.goal.band[1]))
    grid = plan_grid(medium_of(study), band, float(layout.length), float(np.min(layout.diameter)),
                     quality=quality, rods=rods_of(study, layout))
    cells = float(grid.nx) * float(grid.nz)
    updates = 2.0 * cells * grid.n_steps  # the run with the rods and the bare reference
    thickness = getattr(study.substrate, "thickness", None)
    if thickness is not None:  # a block: a second pair of runs (runs one at a time)
        block = plan_grid(medium_of(study), band, float(layout.length),
                          float(np.min(layout.diameter)), quality=quality,
                          rods=rods_of(study, layout), block_depth=float(thickness))
        block_cells = float(block.nx) * float(block.nz)
        updates += 2.0 * block_cells * block.n_steps
        cells = max(cells, block_cells)
    # both runs, measured with tracemalloc on the bench 30-rod fast grid (31,808 cells): 29 MB
    # without snapshots at 16 frequencies, 49 MB with the 40 snapshots verify keeps, 201 MB at
    # 128 frequencies; taken as per cell 930 B + 16 B per snapshot + 45 B per frequency
    need = cells * (930.0 + 16.0 * 40 + 45.0 * float(study.goal.n_frequencies))
    msgs = []
    if need > memory_budget():
        msgs.append(f"--layout: the {quality} full-wave grid ({grid.nx} x {grid.nz} cells) "
                    f"needs about {_gib(need)}, more than half of this machine's memory")
    if updates > MAX_CELL_UPDATES:
        msgs.append(f"--layout: the {quality} full-wave check needs {updates:.3g} cell updates "
                    f"({grid.nx} x {grid.nz} cells, {grid.n_steps} steps, two runs"
                    f"{', and two on the block' if thickness is not None else ''}), more than "
                    f"the limit {MAX_CELL_UPDATES:.0e} (about 2 hours); "
                    + ("shorten the row" if is_fast else "try --fast or shorten the row"))
    if msgs:
        raise StudyError(msgs)
    return {"nx": grid.nx, "nz": grid.nz, "n_steps": grid.n_steps, "bytes": need,
            "cell_updates": updates}


def _nearest_existing(path: Path) -> Path:
    p = path.absolute()
    while not p.exists() and p != p.parent:
        p = p.parent
    return p


def _writable_dir(folder: Path) -> str | None:
    """None if a file can be created in ``folder``, else the reason (a real probe: root passes
    permission bits, not read-only or immutable folders)."""
    try:
        fd, probe = tempfile.mkstemp(prefix=".optgrade-probe-", dir=folder)
    except OSError as exc:
        return exc.strerror or str(exc)
    os.close(fd)
    os.unlink(probe)
    return None


def check_output_dir(path: str | os.PathLike, option: str = "--out") -> Path:
    """An output folder that can be written: it may not exist yet (then the nearest existing
    folder above it must be writable); an existing file, a device such as /dev/null, or a
    folder that cannot be written is refused naming ``option`` (exit 2)."""
    out = Path(path)
    if out.exists() and not out.is_dir():
        kind = "a file" if out.is_file() else "not a folder (a device or other special file)"
        raise StudyError([f"{option}: {out} exists and is {kind}; give a folder"])
    base = _nearest_existing(out)
    if not base.is_dir():
        raise StudyError([f"{option}: {out}: {base} is not a folder"])
    reason = _writable_dir(base)
    if reason is not None:
        raise StudyError([f"{option}: {out}: cannot write in {base} ({reason})"])
    return out


def check_journal_path(url: str | None, option: str = "--storage") -> None:
    """A ``journal:PATH`` storage must be a regular file that can be appended to, or a new
    file in a writable folder (a folder or a read-only file is refused, exit 2)."""
    if not url or not url.startswith("journal:"):
        return
    path = Path(url[len("journal:"):].removeprefix("//"))
    if path.is_dir():
        raise StudyError([f"{option}: journal {path} is a folder; give a file path"])
    if path.exists():
        if not path.is_file():
            raise StudyError([f"{option}: journal {path} is not a regular file"])
        try:
            with open(path, "ab"):
                pass
        except OSError as exc:
            raise StudyError([f"{option}: journal {path} cannot be written "
                              f"({exc.strerror or exc})"]) from None
        return
    base = _nearest_existing(path.parent)
    reason = _writable_dir(base) if base.is_dir() else "not a folder"
    if reason is not None:
        raise StudyError([f"{option}: journal {path}: cannot write in {base} ({reason})"])


def usable_cores() -> int:
    """Cores this process may run on (affinity mask where the system has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def cap_jobs(n_jobs: int | None, default: int) -> tuple[int, str | None]:
    """Worker processes capped at the usable cores, with the note to print when capped (each
    worker holds its own copy of the tables: --jobs 64 on 2 cores ran out of memory)."""
    asked = int(default if n_jobs is None else n_jobs)
    cores = usable_cores()
    if asked > cores:
        return cores, (f"--jobs: {asked} worker processes asked for, {cores} cores usable: "
                       f"running {cores} (more workers only add memory, not speed)")
    return asked, None
