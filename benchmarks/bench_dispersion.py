"""Benchmark of the dispersion engine: table build, surrogate queries, direct solve, accuracy.

Run:  python benchmarks/bench_dispersion.py [--quick]

One core (thread pools pinned to 1). Prints, for each example study:
table build time per spacing level; surrogate time for all branches of 1 cell and of 60
different cells at 256 frequencies (median and best of repeats, compiled kernel warm; and the
first call, which compiles the kernel or loads its numba cache); the direct root
solve of one cell at the same frequencies and the speed ratio; and the surrogate's error against
the direct solve on a grid of heights x spacings x head masses. The machine may be shared:
timings are CPU times of this process (time.process_time), which a busy machine still
disturbs somewhat through shared caches; repeat for quiet figures.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from optgrade.dispersion._direct import direct_local_modes  # noqa: E402
from optgrade.dispersion._surrogate import Surrogate  # noqa: E402
from optgrade.study import load_study  # noqa: E402


def _times(fn, repeats):
    """(best, median) CPU time of this process (s) over repeats: robust against other jobs on
    a shared machine."""
    times = []
    for _ in range(repeats):
        t = time.process_time()
        fn()
        times.append(time.process_time() - t)
    return float(np.min(times)), float(np.median(times))


def bench_study(name: str, quick: bool) -> dict:
    study = load_study(ROOT / "studies" / name)
    t = time.process_time()
    sur = Surrogate.from_study(study, cache_dir=False)
    build = time.process_time() - t
    f = np.linspace(*study.goal.band, 256)
    h_lo, h_hi = study.layout.height
    a_lo, a_hi = study.layout.spacing
    m_lo, m_hi = study.resonator.head_mass
    h1, a1, m1 = 0.5 * (h_lo + h_hi), np.sqrt(a_lo * a_hi), 0.5 * (m_lo + m_hi)
    t = time.process_time()
    sur.local_modes(h1, a1, m1, f)  # first call: numba compile, or load of its on-disk cache
    first = time.process_time() - t
    rng = np.random.default_rng(0)
    h60 = rng.uniform(h_lo, h_hi, 60)
    a60 = rng.uniform(a_lo, a_hi, 60)
    m60 = rng.uniform(m_lo, m_hi, 60)
    t1_best, t1 = _times(lambda: sur.local_modes(h1, a1, m1, f), 3 if quick else 15)
    t60_best, t60 = _times(lambda: sur.local_modes(h60, a60, m60, f), 2 if quick else 7)
    n_direct = 32 if quick else 256
    fd = np.linspace(*study.goal.band, n_direct)
    t = time.process_time()
    direct_local_modes(sur.substrate, sur.rod, sur.row_pitch, h1, a1, m1, fd, sur.model)
    td = (time.process_time() - t) * 256 / n_direct
    from test_surrogate import _grid, compare

    acc = compare(sur, *_grid(study, 12 if quick else 24))
    return {
        "study": name,
        "levels": sur.levels.size,
        "build_s": build,
        "build_per_level_s": build / sur.levels.size,
        "first_call_s": first,
        "one_cell_ms": 1e3 * t1,
        "one_cell_best_ms": 1e3 * t1_best,
        "sixty_cells_ms": 1e3 * t60,
        "sixty_cells_best_ms": 1e3 * t60_best,
        "direct_one_cell_s": td,
        "ratio": td / t1,
        **{k: v for k, v in acc.items() if k not in ("fast", "ref")},
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats and frequencies")
    args = parser.parse_args()
    rows = [
        bench_study(n, args.quick)
        for n in ("bench_backward_shear.toml", "site_ground_barrier.toml")
    ]
    print("\nDispersion engine benchmark (CPU seconds of this process, thread pools pinned to 1)")
    print(
        f"{'study':28s} {'levels':>6s} {'build s':>8s} {'s/level':>8s} {'1 cell ms':>10s} "
        f"{'60 cells ms':>12s} {'direct s':>9s} {'ratio':>8s}"
    )
    for r in rows:
        print(
            f"{r['study']:28s} {r['levels']:6d} {r['build_s']:8.2f} {r['build_per_level_s']:8.2f} "
            f"{r['one_cell_ms']:10.2f} {r['sixty_cells_ms']:12.1f} {r['direct_one_cell_s']:9.2f} "
            f"{r['ratio']:8.0f}"
        )
    print("(1 cell / 60 cells: median; best of the repeats below)")
    for r in rows:
        print(
            f"{r['study']:28s} best 1 cell {r['one_cell_best_ms']:.2f} ms, 60 cells "
            f"{r['sixty_cells_best_ms']:.1f} ms; first call {r['first_call_s']:.2f} s (numba "
            "compile, or load of its cache; a cold compile is measured with an empty "
            "NUMBA_CACHE_DIR)"
        )
    print("\nSurrogate vs direct solve (grid of heights x spacings x head masses over the band)")
    print(
        f"{'study':28s} {'points':>7s} {'mismatch':>8s} {'max dK/K':>10s} {'lossy pts':>9s} "
        f"{'max dK/K (Im)':>13s} {'max dshare':>10s}"
    )
    for r in rows:
        print(
            f"{r['study']:28s} {r['n_points']:7d} {r['n_mismatch']:8d} {r['max_dk_re']:10.2e} "
            f"{r['n_lossy']:9d} {r['max_dk_im']:13.2e} {r['max_share']:10.2e}"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
