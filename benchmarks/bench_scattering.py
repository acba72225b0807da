"""Benchmark of the exact row model (multiple scattering): 60 resonators x 128 and 256 freqs.

Measures on one core (shared machine: best of several repeats, median beside it):

- Green's-function table build per study (no cache), both variants, and its memory;
- per-layout time with the tables built (`scattering_trace` with ``tables=``), split into the
  matrix fill, the batched LAPACK solve and the channel evaluation;
- the WKB trace of the same layout (`optgrade.propagation.trace_study`, surrogate built
  beforehand) and the ratio exact / WKB.

Run:  python benchmarks/bench_scattering.py [--study studies/bench_backward_shear.toml]
"""

from __future__ import annotations

import argparse
import os
import statistics
import time
import tracemalloc
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from optgrade.layout import layout_from_cells  # noqa: E402
from optgrade.propagation import trace_study  # noqa: E402
from optgrade.propagation._green import GreenSpec, GreenTables  # noqa: E402
from optgrade.propagation._scattering import scattering_trace  # noqa: E402
from optgrade.study import load_study  # noqa: E402

N_CELLS = 60
ROOT = Path(__file__).resolve().parents[1]


def _timeit(fn, repeat: int = 7, number: int = 3) -> tuple[float, float]:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        times.append((time.perf_counter() - t0) / number)
    return min(times), statistics.median(times)


def _layout(study):
    """A graded 60-rod row inside the study's limits (invented example)."""
    lo_h, hi_h = study.layout.height
    lo_a, hi_a = study.layout.spacing
    h = np.linspace(lo_h, hi_h, N_CELLS)
    a = np.full(N_CELLS, min(hi_a, max(lo_a, 0.98 * study.layout.max_length / N_CELLS)))
    return layout_from_cells(h, a, study.resonator.diameter)


def _spec(study, freq, model):
    sub, res = study.substrate, study.resonator
    return GreenSpec(float(sub.density), float(sub.cl), float(sub.ct),
                     float(sub.loss_factor or 0.0), model, float(res.diameter),
                     float(res.row_pitch), tuple(float(f) for f in freq),
                     0.98 * float(study.layout.spacing[0]),
                     1.02 * float(study.layout.max_length))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--study", default=str(ROOT / "studies" / "bench_backward_shear.toml"))
    args = ap.parse_args()
    study = load_study(args.study)
    lay = _layout(study)
    print(f"study {study.meta.name}: {lay.n_resonators} resonators, row {lay.length * 1e3:.1f} mm")
    lo, hi = study.goal.band
    # compile once on a tiny table
    tiny = GreenTables(_spec(study, [lo], "line"), cache_dir=False)
    scattering_trace(study, lay, tables=tiny)
    for n_f in (128, 256):
        freq = np.linspace(lo, hi, n_f)
        for model in ("line", "lattice"):
            tracemalloc.start()
            t0 = time.perf_counter()
            tab = GreenTables(_spec(study, freq, model), cache_dir=False)
            t_build = time.perf_counter() - t0
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
            best, med = _timeit(lambda tab=tab: scattering_trace(study, lay, tables=tab,
                                                                 per_resonator=False))
            full, _ = _timeit(lambda tab=tab: scattering_trace(study, lay, tables=tab))
            res = scattering_trace(study, lay, tables=tab)
            print(f"{model:8s} n_freq={n_f}: table build {t_build:6.2f} s, table "
                  f"{tab.table.nbytes / 2**20:5.1f} MiB, build peak {peak / 2**20:6.1f} MiB; "
                  f"per layout {best * 1e3:6.1f} ms (median {med * 1e3:6.1f}; with "
                  f"per-resonator shares {full * 1e3:6.1f}); "
                  f"max |balance error| {np.nanmax(np.abs(res.balance_error)):.1e}")
            _split(study, lay, tab)
        _wkb(study, lay, n_f)


def _split(study, lay, tab):
    """Time of the parts: gathers + fill, batched solve, channel evaluation."""
    from optgrade.propagation import _scattering as sc
    from optgrade.resonators import Rod, rod_compliance

    res = study.resonator
    rod = Rod(res.youngs_modulus, res.density, res.diameter, res.loss_factor)
    c = rod_compliance(tab.omega[:, None], rod, lay.height[None, :], lay.head_mass[None, :])
    n, n_f = lay.n_resonators, tab.omega.size
    m = np.random.default_rng(0).random((n_f, n, n)) + 0j
    rhs = np.ones((n_f, n, 1), dtype=complex)
    t_solve, _ = _timeit(lambda: np.linalg.solve(m, rhs))
    t_all, _ = _timeit(lambda: sc.solve_row(tab, lay.x, c, res.row_pitch, per_resonator=False))
    print(f"          parts: batched LAPACK solve {t_solve * 1e3:5.1f} ms, rest (stencils, "
          f"gathers, fill, channels) {(t_all - t_solve) * 1e3:5.1f} ms")


def _wkb(study, lay, n_f):
    from optgrade.dispersion import surrogate_for_study

    st = study.model_copy(update={"goal": study.goal.model_copy(update={"n_frequencies": n_f})})
    sur = surrogate_for_study(st)
    trace_study(st, lay, sur)
    best, med = _timeit(lambda: trace_study(st, lay, sur))
    tab = GreenTables(_spec(st, np.linspace(*st.goal.band, n_f), st.goal.model), cache_dir=False)
    ex, _ = _timeit(lambda: scattering_trace(st, lay, tables=tab, per_resonator=False))
    print(f"WKB trace n_freq={n_f}: {best * 1e3:.1f} ms (median {med * 1e3:.1f}); exact "
          f"({st.goal.model}) / WKB = {ex / best:.1f}")


if __name__ == "__main__":
    main()
