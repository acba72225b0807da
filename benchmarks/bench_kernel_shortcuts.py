"""The surrogate kernel's frequency shortcuts against the same kernel without them.

Run:  python benchmarks/bench_kernel_shortcuts.py [--seeds N]

`Surrogate.local_modes` over a fine frequency grid continues each branch from the previous
frequencies (narrow then wide bracket, gap kept while its margin holds, Newton's predicted last
step). Called with one frequency at a time none of these can act: every point is a full scan
and a plain Newton. For N seeds x 60 random cells (heights, spacings, head masses uniform over
each example study's ranges) x 256 frequencies over the goal band this prints the branch
existence mismatches, first-order mismatches and the largest relative difference in K between
the two, and the CPU time of both (one core, best of 3). tests/test_surrogate.py runs the same
check on 12 cells. Differences are expected only where continuation keeps a branch that the
16-point scan alone misses (two roots between neighbouring scan points); they are inherited from
the bracket continuation that predates the other shortcuts, not from them.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402
from functools import partial  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from optgrade.dispersion._surrogate import Surrogate  # noqa: E402
from optgrade.study import load_study  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def _best(fn, repeats=3):
    best = np.inf
    for _ in range(repeats):
        t = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t)
    return best, out


def one_at_a_time(sur, h, a, m, freq):
    k = np.empty((2, h.size, freq.size), dtype=complex)
    fo = np.empty((2, h.size, freq.size), dtype=bool)
    for j, f in enumerate(freq):
        one = sur.local_modes(h, a, m, [f])
        k[:, :, j] = one.k[:, :, 0]
        fo[:, :, j] = one.is_first_order[:, :, 0]
    return k, fo


def _grid_call(sur, h, a, m, freq):
    modes = sur.local_modes(h, a, m, freq)
    return modes.k, modes.is_first_order


def check_study(name: str, seeds: int) -> str:
    study = load_study(ROOT / "studies" / name)
    sur = Surrogate.from_study(study)
    freq = np.linspace(*study.goal.band, 256)
    ranges = (study.layout.height, study.layout.spacing, study.resonator.head_mass)
    n_pts = n_ex = n_fo = 0
    d_max = 0.0
    t_grid, t_one = [], []
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        h, a, m = (rng.uniform(lo, hi, 60) for lo, hi in ranges)
        sur.local_modes(h, a, m, freq)  # warm (compile or load the kernel)
        tg, (k, fo) = _best(partial(_grid_call, sur, h, a, m, freq))
        to, (k1, fo1) = _best(partial(one_at_a_time, sur, h, a, m, freq), 1)
        t_grid.append(tg)
        t_one.append(to)
        ex = np.isfinite(k1)
        n_pts += ex.size
        n_ex += int((np.isfinite(k) != ex).sum())
        n_fo += int((fo != fo1).sum())
        both = ex & np.isfinite(k)
        if both.any():
            d_max = max(d_max, float((np.abs(k[both] - k1[both]) / np.abs(k1[both])).max()))
    return (
        f"{name:28s} {n_pts:8d} {n_ex:10d} {n_fo:8d} {d_max:9.1e} "
        f"{1e3 * np.median(t_grid):8.1f} {1e3 * np.median(t_one):13.1f}"
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=8, help="random sets of 60 cells")
    args = parser.parse_args()
    print(
        f"{'study':28s} {'points':>8s} {'exist mism':>10s} {'fo mism':>8s} {'max dK/K':>9s} "
        f"{'grid ms':>8s} {'one-by-one ms':>13s}"
    )
    for name in ("bench_backward_shear.toml", "site_ground_barrier.toml"):
        print(check_study(name, args.seeds))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
