"""Benchmark of the propagation stage: one 60-resonator layout x 256 frequencies.

Measures, on one core (the machine is shared, so figures are noisy; the best of several
repeats is reported, with the median beside it):

- the WKB march alone (``optgrade.propagation._wkb.march``) on precomputed local modes;
- the surrogate call ``local_modes`` for the same cells (tables built beforehand), all points
  and the row request ``WKB_PATH`` (the points the march reads);
- the total ``trace`` (``optgrade.propagation._wkb.trace``: path-only surrogate call + march),
  and the same with every point solved (``path_only=False``);
- memory: tracemalloc peak and retained size after scoring N layouts in a row, to show it is
  flat in N (nothing accumulates).

Run:  python benchmarks/bench_propagation.py [--study studies/bench_backward_shear.toml]
Falls back to a hand-built toy dispersion (march only) if the surrogate is not available.
"""

from __future__ import annotations

import argparse
import gc
import os
import statistics
import time
import tracemalloc
from pathlib import Path
from types import SimpleNamespace

import numpy as np

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from optgrade.layout import layout_from_cells  # noqa: E402
from optgrade.propagation._wkb import WKB_PATH, march, trace  # noqa: E402

N_CELLS, N_FREQ = 60, 256


def _timeit(fn, repeat: int = 30, number: int = 5) -> tuple[float, float]:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        times.append((time.perf_counter() - t0) / number)
    return min(times), statistics.median(times)


def _toy_modes(lay, freq, cr):
    f0 = np.linspace(1.3, 0.4, lay.n_resonators)[:, None] * freq.max()
    ratio = freq[None, :] / f0
    kr = 2 * np.pi * freq[None, :] / cr
    with np.errstate(invalid="ignore", divide="ignore"):
        k = np.where(ratio < 1, kr / np.sqrt(1 - ratio**2) + 1j * 0.02 * kr, np.nan)
    shares = np.full((2, 5, *k.shape), 0.2)
    angle = np.full((2, 4, *k.shape), 0.3)
    return SimpleNamespace(k=np.stack([k, np.full_like(k, np.nan)]), shares=shares, angle=angle)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--study", default="studies/bench_backward_shear.toml")
    parser.add_argument("--n-layouts", type=int, default=200)
    args = parser.parse_args()

    surrogate = None
    study = None
    if Path(args.study).exists():
        try:
            from optgrade.dispersion import surrogate_for_study
            from optgrade.study import load_study

            study = load_study(args.study)
            t0 = time.perf_counter()
            surrogate = surrogate_for_study(study)
            print(f"surrogate ready in {time.perf_counter() - t0:.2f} s (tables built or loaded)")
        except Exception as exc:  # noqa: BLE001 - benchmark falls back to the toy
            print(f"surrogate unavailable ({type(exc).__name__}: {exc}); toy dispersion only")
            surrogate = None

    if study is not None:
        freq = np.linspace(*study.goal.band, N_FREQ)
        h_lo, h_hi = study.layout.height
        a_lo, a_hi = study.layout.spacing
        cr = float(study.substrate.cr)
        m_lo, m_hi = study.resonator.head_mass
        lay = layout_from_cells(
            np.linspace(h_lo, h_hi, N_CELLS),
            np.full(N_CELLS, 0.5 * (a_lo + a_hi)),
            study.resonator.diameter,
            head_mass=np.linspace(m_lo, m_hi, N_CELLS),
        )
    else:
        freq = np.linspace(50e3, 250e3, N_FREQ)
        cr = 2900.0
        lay = layout_from_cells(np.linspace(5e-3, 20e-3, N_CELLS), 3e-3, 1.5e-3)

    modes = (surrogate.local_modes(lay.height, lay.spacing, lay.head_mass, freq)
             if surrogate is not None else _toy_modes(lay, freq, cr))
    best, med = _timeit(lambda: march(modes, lay.x, lay.spacing, freq, cr))
    print(f"march only, {N_CELLS} cells x {N_FREQ} freq: best {best * 1e3:.2f} ms, "
          f"median {med * 1e3:.2f} ms")
    if surrogate is not None:
        call = lambda: surrogate.local_modes(lay.height, lay.spacing, lay.head_mass, freq)  # noqa: E731
        best_s, med_s = _timeit(call, repeat=15, number=2)
        print(f"surrogate local_modes, all points: best {best_s * 1e3:.2f} ms, "
              f"median {med_s * 1e3:.2f} ms")
        call = lambda: surrogate.local_modes(lay.height, lay.spacing, lay.head_mass, freq,  # noqa: E731
                                             path=WKB_PATH)
        best_s, med_s = _timeit(call, repeat=15, number=2)
        print(f"surrogate local_modes, path only:  best {best_s * 1e3:.2f} ms, "
              f"median {med_s * 1e3:.2f} ms")
        for path_only in (True, False):
            def run(p=path_only):
                return trace(lay, surrogate, freq, cr=cr, path_only=p)

            best_t, med_t = _timeit(run, repeat=15, number=2)
            what = "path-only modes" if path_only else "all points     "
            print(f"total trace, {what} (surrogate + march): best {best_t * 1e3:.2f} ms, "
                  f"median {med_t * 1e3:.2f} ms")

    # memory: score many different layouts, keep only a scalar per layout
    rng = np.random.default_rng(0)

    def score_many(n: int) -> None:
        for _ in range(n):
            h = np.sort(rng.uniform(lay.height.min(), lay.height.max(), N_CELLS))
            one = layout_from_cells(h, lay.spacing, lay.diameter, head_mass=lay.head_mass)
            if surrogate is not None:
                tr = trace(one, surrogate, freq, cr=cr)
            else:
                tr = march(_toy_modes(one, freq, cr), one.x, one.spacing, freq, cr)
            float(np.mean(tr.fractions["backward_shear"]))

    score_many(5)  # warm caches
    for n in (args.n_layouts // 4, args.n_layouts):
        gc.collect()
        tracemalloc.start()
        score_many(n)
        gc.collect()
        current, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        print(f"memory after {n:4d} layouts: retained {current / 1e3:8.1f} kB, "
              f"peak {peak / 1e6:6.2f} MB")


if __name__ == "__main__":
    main()
