"""Benchmark and accuracy tables of the finite-element Bloch cell against the line model.

Usage::

    python benchmarks/bench_fem_cell.py                 # timings (FE cell, line model, surrogate)
    python benchmarks/bench_fem_cell.py --accuracy      # FE vs line model, markdown table
    python benchmarks/bench_fem_cell.py --convergence   # FE mesh / depth study, markdown table

The FE model lives in tests/fem_bloch_cell.py (scikit-fem, a test extra). The cell is the
invented bench rig of tests/test_fem_bloch.py: aluminium substrate and rods (handbook values
from memory), d = 1 mm, b = 3 mm, L = 6 mm, a = 4 mm, optional 20 mg head mass.

Timings are wall-clock (time.perf_counter), best and median of --repeat runs, on a machine whose
two cores are shared with other jobs: expect noise of tens of percent.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from scipy.optimize import brentq

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from fem_bloch_cell import build_cell, rayleigh_speed_ratio, solve_cell  # noqa: E402

RHO, CL, CT = 2700.0, 6320.0, 3130.0
ROD_E, ROD_RHO, ROD_D = 70e9, 2700.0, 1e-3
SPACING, ROW_PITCH, HEIGHT = 4e-3, 3e-3, 6e-3
HEAD_MASS = 2e-5
MESH = dict(h_surface=SPACING / 8, h_deep=3e-3, n_edge_refinements=4)
DEPTH = 0.10
K_ROD = np.array([0.4, 0.6, 0.7, 0.8, 0.9, 0.95, 1.0])
K_HEAD = np.array([0.25, 0.3, 0.4, 0.6, 0.8, 0.9, 1.0])


def _cell(head_mass: float, depth: float = DEPTH, **mesh):
    opts = dict(MESH, **mesh)
    return build_cell(density=RHO, cl=CL, ct=CT, spacing=SPACING, depth=depth,
                      rod_modulus=ROD_E, rod_density=ROD_RHO, rod_diameter=ROD_D,
                      rod_height=HEIGHT, row_pitch=ROW_PITCH, head_mass=head_mass, **opts)


def _timed(fn, repeat: int):
    """Best and median wall time (s) of `repeat` calls, the CPU time (s) of the best, output."""
    runs, out = [], None
    for _ in range(repeat):
        c0, t0 = time.process_time(), time.perf_counter()
        out = fn()
        runs.append((time.perf_counter() - t0, time.process_time() - c0))
    best = min(runs)
    return best[0], statistics.median(r[0] for r in runs), best[1], out


def _engine():
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    return Substrate(RHO, CL, CT), Rod(ROD_E, ROD_RHO, ROD_D)


def _det(k, w, head_mass, model="line"):
    from optgrade.dispersion import lattice_sum
    from optgrade.resonators import rod_compliance

    sub, rod = _engine()
    return np.real(rod_compliance(w, rod, HEIGHT, head_mass)
                   - lattice_sum(k, w, sub, SPACING, ROW_PITCH, rod.radius, model=model))


def line_k(f: float, head_mass: float, model: str = "line") -> float:
    """Lower-branch root K (1/m) of D = 1/Z - Sigma at frequency f (Hz), nan if none."""
    sub, _ = _engine()
    w = 2 * np.pi * f
    lo, hi = w / sub.cr * (1 + 1e-9), np.pi / SPACING
    try:
        return brentq(lambda k: _det(k, w, head_mass, model), lo, hi, xtol=1e-10)
    except ValueError:
        return float("nan")


def line_f(k: float, head_mass: float, f_guess: float) -> float:
    """Lower-branch root f (Hz) of D = 1/Z - Sigma at Bloch wavenumber k (1/m)."""
    sub, _ = _engine()
    w0 = 2 * np.pi * f_guess
    hi = min(1.2 * w0, sub.cr * k * (1 - 1e-9))
    return brentq(lambda w: _det(k, w, head_mass), 0.8 * w0, hi, xtol=1e-6) / (2 * np.pi)


def _bands_k(freq: np.ndarray, head_mass: float) -> np.ndarray:
    """Branch 0 of optgrade.dispersion.solve_bands(model="line") at freq (Hz), nan if absent."""
    try:
        from optgrade.dispersion import Cell, solve_bands
    except ImportError:
        return np.full(freq.shape, np.nan, complex)
    sub, rod = _engine()
    cell = Cell(sub, rod, HEIGHT, SPACING, ROW_PITCH, head_mass)
    return solve_bands(cell, freq, model="line").branches[0].k


def _surrogate_k(freq: np.ndarray, head_mass: float) -> np.ndarray:
    """Branch 0 of the line-model surrogate at freq (Hz); nan if unavailable."""
    try:
        from optgrade.dispersion import Surrogate
    except ImportError:
        return np.full(freq.shape, np.nan, complex)
    sub, rod = _engine()
    sur = Surrogate(sub, rod, ROW_PITCH, (0.75 * SPACING, 1.25 * SPACING), (60e3, 400e3),
                    model="line", cache_dir=False)
    return sur.local_modes(HEIGHT, SPACING, head_mass, freq).k[0, 0]


def accuracy_table() -> None:
    """Print the FE vs line-model table (markdown)."""
    cr = rayleigh_speed_ratio(CL, CT) * CT
    for name, head, frac in (("rod, no head mass", 0.0, K_ROD),
                             ("rod + 20 mg head mass", HEAD_MASS, K_HEAD)):
        k = np.pi / SPACING * frac
        modes = solve_cell(_cell(head), k)
        k_bands = _bands_k(modes.lower, head)
        k_sur = _surrogate_k(modes.lower, head)
        print(f"\n#### {name}\n")
        print("| K a/pi | K (1/m) | f_FE (kHz) | K/kR - 1 | K_line (1/m) | K_line/K - 1 "
              "| K_bands/K - 1 | K_sur/K - 1 | f_line/f_FE - 1 | K_hom/K - 1 | surface share "
              "| bar share |")
        print("|---|---|---|---|---|---|---|---|---|---|---|---|")
        for i, (kk, f) in enumerate(zip(k, modes.lower, strict=True)):
            kl = line_k(f, head)
            kh = line_k(f, head, model="homogenised")
            fl = line_f(kk, head, f)
            off_rayleigh = kk * cr / (2 * np.pi * f) - 1
            print(f"| {frac[i]:.2f} | {kk:.1f} | {f / 1e3:.3f} | {off_rayleigh:+.3f}"
                  f" | {kl:.2f} | {kl / kk - 1:+.2e} | {k_bands[i].real / kk - 1:+.2e}"
                  f" | {k_sur[i].real / kk - 1:+.2e}"
                  f" | {fl / f - 1:+.2e} | {kh / kk - 1:+.2e}"
                  f" | {modes.surface_fraction[i, 0]:.4f} | {modes.bar_fraction[i, 0]:.3f} |")


def upper_table() -> None:
    """Print FE second bound modes (above the rod resonance) against solve_bands (markdown)."""
    from optgrade.dispersion import Cell, solve_bands

    frac = np.array([0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95])
    k = np.pi / SPACING * frac
    modes = solve_cell(_cell(0.0), k, n_modes=4)
    f2 = modes.frequency[:, 1]
    sub, rod = _engine()
    order = np.argsort(f2)
    bands = solve_bands(Cell(sub, rod, HEIGHT, SPACING, ROW_PITCH, 0.0), f2[order], model="line")
    roots = np.stack([br.k for br in bands.branches])[:, np.argsort(order)]
    print("\n#### upper branch, rod without head mass\n")
    print("| K a/pi | f_FE (kHz) | f_FE / (cT K / 2 pi) | branch | K_bands/K - 1 | surface share "
          "| bar share |")
    print("|---|---|---|---|---|---|---|")
    for i in range(frac.size):
        rel = np.abs(roots[:, i].real / k[i] - 1)
        j = int(np.nanargmin(rel))
        print(f"| {frac[i]:.2f} | {f2[i] / 1e3:.3f} | {2 * np.pi * f2[i] / (CT * k[i]):.4f} "
              f"| {j} | {roots[j, i].real / k[i] - 1:+.2e} | {modes.surface_fraction[i, 1]:.3f} "
              f"| {modes.bar_fraction[i, 1]:.3f} |")


def wide_table() -> None:
    """Print the wide-footprint cell (d = 2.5 mm, L = 4 mm, a = b = 3 mm): FE, solve_bands, and
    the line model with the engine's default harmonic count and with 100 harmonics."""
    from optgrade.dispersion import Cell, default_harmonics, lattice_sum, solve_bands
    from optgrade.resonators import Rod, rod_compliance

    d, height, a, b = 2.5e-3, 4e-3, 3e-3, 3e-3
    sub, _ = _engine()
    rod = Rod(ROD_E, ROD_RHO, d)
    frac = np.array([0.3, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95])
    k = np.pi / a * frac
    rows = {}
    for label, mesh in (("test mesh", dict(h_surface=a / 8, h_deep=3e-3, n_edge_refinements=4)),
                        ("fine mesh", dict(h_surface=a / 32, h_deep=1.5e-3,
                                           n_edge_refinements=5))):
        model = build_cell(density=RHO, cl=CL, ct=CT, spacing=a, depth=DEPTH, rod_modulus=ROD_E,
                           rod_density=ROD_RHO, rod_diameter=d, rod_height=height,
                           row_pitch=b, **mesh)
        rows[label] = (solve_cell(model, k).lower, model.stiffness.shape[0])
    f_fe = rows["test mesh"][0]
    k_bands = solve_bands(Cell(sub, rod, height, a, b, 0.0), f_fe, model="line").branches[0].k

    def f_line(kk, f0, n_harmonics):
        def det(w):
            return np.real(rod_compliance(w, rod, height, 0.0) - lattice_sum(
                kk, w, sub, a, b, rod.radius, model="line", n_harmonics=n_harmonics))

        w0 = 2 * np.pi * f0
        return brentq(det, 0.9 * w0, min(1.1 * w0, sub.cr * kk * (1 - 1e-12)),
                      xtol=1e-9) / (2 * np.pi)

    m_default = default_harmonics(a, rod.radius, "line")
    print(f"\n#### wide footprint: d = 2.5 mm, L = 4 mm, a = b = 3 mm "
          f"(engine default harmonics M = {m_default})\n")
    print(f"| K a/pi | f_FE test mesh, {rows['test mesh'][1]} DOFs (Hz) "
          f"| f_FE fine mesh, {rows['fine mesh'][1]} DOFs (Hz) | f_line default M (Hz) "
          "| f_line M = 100 (Hz) | K_bands/K - 1 (test mesh f) | K/kR - 1 |")
    print("|---|---|---|---|---|---|---|")
    cr = sub.cr
    for i in range(frac.size):
        f1, f2 = rows["test mesh"][0][i], rows["fine mesh"][0][i]
        print(f"| {frac[i]:.2f} | {f1:.1f} | {f2:.1f} | {f_line(k[i], f1, None):.1f} "
              f"| {f_line(k[i], f1, 100):.1f} | {k_bands[i].real / k[i] - 1:+.2e} "
              f"| {k[i] * cr / (2 * np.pi * f1) - 1:+.3f} |")


def convergence_table() -> None:
    """Print the FE mesh and depth study (markdown): lower-branch f at three K."""
    frac = np.array([0.4, 0.8, 1.0])
    k = np.pi / SPACING * frac
    lam_t = CT / (np.sqrt(ROD_E / ROD_RHO) / (4 * HEIGHT))  # shear wavelength at f_rod
    variants = [
        ("a/8, 3 mm, 0 refinements, H = 0.10 m", dict(n_edge_refinements=0)),
        ("a/8, 3 mm, 2 refinements, H = 0.10 m", dict(n_edge_refinements=2)),
        ("a/8, 3 mm, 4 refinements, H = 0.10 m (test mesh)", {}),
        ("a/16, 3 mm, 4 refinements, H = 0.10 m", dict(h_surface=SPACING / 16)),
        ("a/16, 1.5 mm, 5 refinements, H = 0.10 m", dict(h_surface=SPACING / 16, h_deep=1.5e-3,
                                                          n_edge_refinements=5)),
        ("a/8, 1.5 mm, 4 refinements, H = 0.10 m", dict(h_deep=1.5e-3)),
        ("a/8, 3 mm, 4 refinements, H = 0.15 m", dict(depth=0.15)),
        ("a/8, 3 mm, 4 refinements, H = 0.20 m", dict(depth=0.20)),
    ]
    print(f"\nshear wavelength at the rod resonance: {lam_t * 1e3:.2f} mm\n")
    print("| mesh (surface size, deep size, strip-edge refinements, depth) | DOFs "
          + "".join(f"| f at K a/pi = {x:.1f} (Hz) " for x in frac) + "| solve (s) |")
    print("|---|---|" + "---|" * frac.size + "---|")
    for label, opts in variants:
        depth = opts.pop("depth", DEPTH)
        model = _cell(0.0, depth=depth, **opts)
        t0 = time.perf_counter()
        modes = solve_cell(model, k)
        dt = time.perf_counter() - t0
        print(f"| {label} | {model.stiffness.shape[0]} "
              + "".join(f"| {f:.1f} " for f in modes.lower) + f"| {dt:.2f} |")


def timings(n_k: int, repeat: int) -> None:
    """Print the timing table: FE cell vs line-model direct solve vs surrogate."""
    k = np.pi / SPACING * np.linspace(0.3, 1.0, n_k)
    t_build, t_build_med, c_build, model = _timed(lambda: _cell(0.0), repeat)
    t_fe, t_fe_med, c_fe, modes = _timed(lambda: solve_cell(model, k), repeat)
    freq = modes.lower
    rows = [(f"FE cell: assemble ({model.stiffness.shape[0]} DOFs)", t_build, t_build_med,
             c_build, 1),
            (f"FE cell: {n_k} K-points (eigsh shift-invert)", t_fe, t_fe_med, c_fe, n_k)]

    try:
        from optgrade.dispersion import Cell, solve_bands

        sub, rod = _engine()
        cell = Cell(sub, rod, HEIGHT, SPACING, ROW_PITCH, 0.0)
        t, tm, c, _ = _timed(lambda: solve_bands(cell, freq, model="line"), repeat)
        label = f"optgrade.dispersion.solve_bands(model='line'), {n_k} frequencies"
        rows.append((label, t, tm, c, n_k))
    except ImportError as exc:
        rows.append((f"optgrade.dispersion not importable ({exc.name})", np.nan, np.nan, np.nan,
                     n_k))
    t, tm, c, _ = _timed(lambda: [line_k(f, 0.0) for f in freq], repeat)
    rows.append((f"line model, brentq on lattice_sum, {n_k} frequencies", t, tm, c, n_k))

    try:
        from optgrade.dispersion import Surrogate

        sub, rod = _engine()
        t, tm, c, sur = _timed(lambda: Surrogate(
            sub, rod, ROW_PITCH, (0.75 * SPACING, 1.25 * SPACING), (60e3, 400e3),
            model="line", cache_dir=False), 1)
        rows.append((f"surrogate table build (line, {sur.levels.size} spacing levels, "
                     "no cache)", t, tm, c, 1))
        n_f = 256
        grid = np.linspace(freq.min(), freq.max(), n_f)
        t, tm, c, _ = _timed(lambda: sur.local_modes(HEIGHT, SPACING, 0.0, freq), repeat)
        rows.append((f"surrogate local_modes, the {n_k} FE frequencies", t, tm, c, n_k))
        t, tm, c, _ = _timed(lambda: sur.local_modes(HEIGHT, SPACING, 0.0, grid), repeat)
        rows.append((f"surrogate local_modes, {n_f} frequencies", t, tm, c, n_f))
        try:
            from optgrade.dispersion import Cell, solve_bands

            cell = Cell(sub, rod, HEIGHT, SPACING, ROW_PITCH, 0.0)
            t, tm, c, _ = _timed(lambda: solve_bands(cell, grid, model="line"), repeat)
            rows.append((f"solve_bands(model='line'), {n_f} frequencies", t, tm, c, n_f))
        except ImportError:
            pass
    except Exception as exc:  # noqa: BLE001 - report whatever stops the optional rows
        rows.append((f"surrogate rows skipped: {type(exc).__name__}: {exc}"[:90], np.nan, np.nan,
                     np.nan, n_k))

    fe_point = c_fe / n_k  # CPU time: less sensitive than wall time to the shared cores
    print("\n| what | best wall (s) | median wall (s) | CPU of best (s) | per point (ms) "
          "| FE per K-point / this per point (CPU) |")
    print("|---|---|---|---|---|---|")
    for i, (label, t, tm, c, n) in enumerate(rows):
        ratio = "-" if i < 2 or n == 1 else f"{fe_point / (c / n):.0f}"
        print(f"| {label} | {t:.4f} | {tm:.4f} | {c:.4f} | {1e3 * t / n:.3f} | {ratio} |")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n-k", type=int, default=16, help="K-points of the FE cell")
    parser.add_argument("--repeat", type=int, default=3, help="timing repeats")
    parser.add_argument("--accuracy", action="store_true", help="print the accuracy table")
    parser.add_argument("--convergence", action="store_true", help="print the mesh study")
    args = parser.parse_args(argv)
    if args.accuracy:
        accuracy_table()
        upper_table()
        wide_table()
    if args.convergence:
        convergence_table()
    if not (args.accuracy or args.convergence):
        timings(args.n_k, args.repeat)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
