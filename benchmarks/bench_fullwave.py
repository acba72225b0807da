"""Benchmark of the full-wave check: a 40-resonator layout over a 2:1 band.

Run by hand (not in CI):  python benchmarks/bench_fullwave.py [--fast] [--repeat N]

Measures, on the invented demo study benchmarks/fullwave_demo.toml (40 aluminium pins graded
10 -> 4 mm, 125-250 kHz):

1. the machine's memory bandwidth with numpy (copy and triad of 256 MiB arrays, best of five);
2. the bare stencil rate (velocity + stress kernels only, no recording) on the run's grid;
3. the whole check (run with resonators + reference run + channel split): wall time, time
   steps, cell updates per second, peak resident memory.

Bytes per cell update (what must cross the memory bus when the grid does not fit in cache):
the velocity kernel reads the five fields vx, vz, sxx, szz, sxz and writes vx, vz (7 x 8 B);
the stress kernel reads the same five and writes sxx, szz, sxz (8 x 8 B): 120 B. Memory
variables of the absorbing layers add traffic only inside the layers. The bandwidth bound is
then (triad bandwidth) / 120 B cell updates per second. Grids of a few 1e5 cells (a few MiB
per field) partly live in the 2nd/3rd-level cache, so the bound can be beaten.

The machine is shared (2 cores, other jobs running): figures are noisy; use --repeat.
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
BYTES_PER_UPDATE = 120


def memory_bandwidth(n: int = 1 << 25, repeat: int = 5) -> dict[str, float]:
    """Copy (2 x 8 B per element) and triad a = b + s c (3 x 8 B) bandwidth in GB/s."""
    a = np.zeros(n)
    b = np.random.default_rng(0).random(n)
    c = np.random.default_rng(1).random(n)
    best_copy = best_triad = math.inf
    for _ in range(repeat):
        t = time.perf_counter()
        np.copyto(a, b)
        best_copy = min(best_copy, time.perf_counter() - t)
        t = time.perf_counter()
        np.multiply(c, 3.0, out=a)
        np.add(a, b, out=a)
        best_triad = min(best_triad, time.perf_counter() - t)
    # the numpy triad is two passes: (read c, write a) + (read a, read b, write a) = 5 x 8 B
    return {"copy_GBps": 16 * n / best_copy / 1e9, "triad_GBps": 40 * n / best_triad / 1e9}


def kernel_rate(grid, medium, n_steps: int = 400) -> float:
    """Cell updates per second of the two stencil kernels alone (no rods, no recording)."""
    from optgrade.fullwave import _kernel as k

    nx, nz = grid.nx, grid.nz
    f = [np.zeros((nx, nz)) for _ in range(5)]
    p = [np.zeros((nx, nz)) for _ in range(8)]
    cx = [np.zeros(nx), np.ones(nx)] * 2
    cz = [np.zeros(nz), np.ones(nz)] * 2
    cx[0][: grid.n_pml] = 1e-3  # layers present, as in a real run
    cx[2][: grid.n_pml] = 1e-3
    cz[0][-grid.n_pml:] = 1e-3
    cz[2][-grid.n_pml:] = 1e-3
    tz = np.zeros(nx)
    sel = np.zeros((3, 1, 1))
    f[1][nx // 2, 3] = 1.0
    best = math.inf
    for _ in range(3):
        t = time.perf_counter()
        for _ in range(n_steps):
            k.step_velocity(*f, medium.rho, grid.dt, grid.h, cx[0], cx[1], cx[2], cx[3],
                            cz[0], cz[1], cz[2], cz[3], *p[:4])
            k.step_stress(*f, medium.lam, medium.mu, grid.dt, grid.h, cx[0], cx[1], cx[2],
                          cx[3], cz[0], cz[1], cz[2], cz[3], *p[4:], tz, sel, 0.0)
        best = min(best, time.perf_counter() - t)
    return n_steps * nx * nz / best


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--fast", action="store_true", help="coarse grid")
    parser.add_argument("--repeat", type=int, default=1, help="repeat the full check N times")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    args = parser.parse_args(argv)

    from optgrade.fullwave import _kernel as _fullwave_kernel
    from optgrade.fullwave import _solver as fw
    from optgrade.layout import layout_from_cells
    from optgrade.study import load_study

    _fullwave_kernel.warm_up()
    study = load_study(HERE / "fullwave_demo.toml")
    n = 40
    layout = layout_from_cells(np.linspace(10e-3, 4e-3, n), np.full(n, 4e-3), 1e-3)
    medium = fw.medium_of(study)
    rods = fw.rods_of(study, layout)
    band = tuple(float(v) for v in study.goal.band)
    freq = np.linspace(*band, int(study.goal.n_frequencies))
    quality = "fast" if args.fast else "normal"

    bw = memory_bandwidth()
    print(f"memory bandwidth (numpy, best of 5): copy {bw['copy_GBps']:.1f} GB/s, "
          f"triad {bw['triad_GBps']:.1f} GB/s")
    grid = fw.plan_grid(medium, band, float(layout.length), 1e-3, quality=quality, rods=rods)
    k_rate = kernel_rate(grid, medium)
    bound = bw["triad_GBps"] * 1e9 / BYTES_PER_UPDATE
    print(f"grid {grid.nx} x {grid.nz} = {grid.n_cells} cells, h = {grid.h * 1e3:.3g} mm, "
          f"dt = {grid.dt * 1e9:.2f} ns, up to {grid.n_steps} steps per run")
    print(f"stencil kernels alone: {k_rate / 1e6:.1f} M cell updates/s; bandwidth bound at "
          f"{BYTES_PER_UPDATE} B/update: {bound / 1e6:.1f} M/s ({100 * k_rate / bound:.0f} %)")

    results = []
    for _ in range(args.repeat):
        t = time.perf_counter()
        grid, run, ref, split = fw.run_pair(medium, rods, band, freq, float(layout.length),
                                            quality=quality)
        wall = time.perf_counter() - t
        updates = run.cell_updates + ref.cell_updates
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2
        results.append({
            "wall_s": wall, "steps": run.n_steps + ref.n_steps,
            "cell_updates_per_s_in_runs": updates / (run.seconds + ref.seconds),
            "cell_updates_per_s_overall": updates / wall, "peak_rss_GiB": rss,
            "max_balance_error": float(np.max(np.abs(split.balance_error))),
            "self_check_failures": fw.self_checks(split, run, medium, rods, quality)[1],
        })
        r = results[-1]
        print(f"full check ({quality}): {wall:.1f} s wall, {r['steps']} steps "
              f"({run.n_steps} with resonators, {ref.n_steps} reference), "
              f"{r['cell_updates_per_s_in_runs'] / 1e6:.1f} M cell updates/s inside the runs "
              f"(recording and Fourier sums included), "
              f"{r['cell_updates_per_s_overall'] / 1e6:.1f} M/s overall; "
              f"peak RSS {rss:.2f} GiB; box energy balance within "
              f"{100 * r['max_balance_error']:.2f} %; self-checks "
              f"{'passed' if not r['self_check_failures'] else r['self_check_failures']}")
    if args.json:
        Path(args.json).write_text(json.dumps({"bandwidth": bw, "kernel_rate": k_rate,
                                               "bound": bound, "runs": results}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
