"""Benchmark of the inverse-design search (figures for docs/search.md).

Measures, on the example studies (real surrogate and propagation):

1. framework ceiling: trials/s with scoring switched off (storage + sampler only);
2. throughput: trials/min for a 60-resonator, 128-frequency study on 2 worker processes, with
   and without the robustness goal (wall clock), and the CPU seconds per trial behind it;
3. convergence: seconds until the bench-scale example reaches 95 % of the best score of a run
   of ``--budget`` seconds on 2 workers;
4. sampler comparison: best score after N trials for each sampler and seed, both examples.

Run:  python benchmarks/bench_search.py [--quick] [--out runs/bench_search]
Writes ``bench_search.json`` into the output directory and prints a summary. The machine is
shared, so figures are noisy; the load average is recorded next to each figure.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path

import numpy as np

from optgrade.search import _owner as search
from optgrade.study import load_study

REPO = Path(__file__).resolve().parent.parent
BENCH = REPO / "studies" / "bench_backward_shear.toml"
SITE = REPO / "studies" / "site_ground_barrier.toml"


def _load() -> float:
    return os.getloadavg()[0]


def _with(study, **changes):
    """Copy of a frozen pydantic Study with some section fields replaced."""
    sections = {}
    for key, value in changes.items():
        section, name = key.split("__")
        sections.setdefault(section, {})[name] = value
    update = {sec: getattr(study, sec).model_copy(update=vals) for sec, vals in sections.items()}
    return study.model_copy(update=update)


def _run(study, out: Path, name: str, **kw):
    kw.setdefault("show_progress", False)
    url = f"sqlite:///{out / (name + '.db')}"
    if (out / (name + ".db")).exists():
        (out / (name + ".db")).unlink()
    return search.run_search(study, out / name, storage=url, **kw)


def ceiling(out: Path, n: int) -> dict:
    s = load_study(BENCH)
    res = {}
    for jobs in (0, 2):
        o = _run(s, out, f"dry{jobs}", n_trials=n, n_jobs=jobs, is_dry=True)
        res[f"jobs{jobs}"] = {"trials": n, "trials_per_s": o.trials_per_second, "load": _load()}
    return res


def throughput(out: Path, n: int) -> dict:
    s = load_study(BENCH)
    res = {}
    variants = {
        "no_robustness": {"channel": 1.0, "worst": 0.3, "adiabaticity": 0.1},
        "with_robustness": dict(s.goal.weights),
    }
    for label, weights in variants.items():
        s60 = _with(s, layout__count=(60, 60), goal__weights=weights)
        s60 = s60.model_copy(update={"meta": s60.meta.model_copy(update={"name": f"t60_{label}"})})
        o = _run(s60, out, f"t60_{label}", n_trials=n, n_jobs=2)
        res[label] = {"trials": n, "trials_per_min": 60 * o.trials_per_second,
                      "seconds": o.seconds, "load": _load()}
    return res


def cpu_cost(out: Path, n: int) -> dict:
    """CPU seconds (process time, less sensitive to other load than wall time) per scored trial
    of the 60-resonator, 128-frequency study, and of the owner's storage work per trial; from
    these, the trials/min a dedicated 2-core machine would reach (owner and 2 workers sharing
    the 2 cores)."""
    from optgrade import profiles

    s = load_study(BENCH)
    res = {}
    variants = {
        "no_robustness": {"channel": 1.0, "worst": 0.3, "adiabaticity": 0.1},
        "with_robustness": dict(s.goal.weights),
    }
    rng = np.random.default_rng(0)
    owner = _run(s, out, "cpu_dry", n_trials=n, n_jobs=0, is_dry=True)
    t0 = time.process_time()
    _run(s, out, "cpu_dry2", n_trials=n, n_jobs=0, is_dry=True)
    owner_cpu = (time.process_time() - t0) / n
    for label, weights in variants.items():
        s60 = _with(s, layout__count=(60, 60), goal__weights=weights)
        ctx = search.make_context(s60)
        space = profiles.search_space(s60)
        pts = [{k: (d.low if d.low == d.high else float(rng.uniform(d.low, d.high)))
                for k, d in space.items()} for _ in range(n)]
        search.evaluate_params(s60, pts[0], ctx)
        t0 = time.process_time()
        for p in pts:
            search.evaluate_params(s60, p, ctx)
        per = (time.process_time() - t0) / n
        res[label] = {"cpu_s_per_trial": per, "owner_cpu_s_per_trial": owner_cpu,
                      "est_trials_per_min_2cores": 60 * 2 / (per + owner_cpu),
                      "load": _load()}
    res["owner_wall_trials_per_s"] = owner.trials_per_second
    return res


def convergence(out: Path, budget: float) -> dict:
    s = load_study(BENCH)
    o = _run(s, out, "conv", n_trials=100_000, n_jobs=2, time_budget=budget)
    hist = np.array(o.history)
    best = np.nanmax(hist[:, 1])
    reached = hist[hist[:, 1] >= 0.95 * best]
    return {"budget_s": budget, "trials": o.n_told_now, "best": float(best),
            "seconds_to_95pct": float(reached[0, 0]), "trials_to_95pct":
            int(np.argmax(hist[:, 1] >= 0.95 * best)) + 1, "load": _load()}


def samplers(out: Path, n: int, seeds: list[int], names: list[str],
             paths: tuple[Path, ...] = (BENCH, SITE)) -> dict:
    res: dict = {}
    for path in paths:
        base = load_study(path)
        res[base.meta.name] = {}
        for sampler in names:
            scores = []
            for seed in seeds:
                s = base.model_copy(update={"meta": base.meta.model_copy(
                    update={"seed": seed, "name": f"{base.meta.name}_{sampler}_{seed}"})})
                o = _run(s, out, f"{base.meta.name}_{sampler}_{seed}", n_trials=n, n_jobs=2,
                         sampler=sampler)
                scores.append(o.best_score)
            res[base.meta.name][sampler] = {"best": scores, "mean": float(np.mean(scores)),
                                            "trials": n, "load": _load()}
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="runs/bench_search")
    ap.add_argument("--quick", action="store_true", help="small counts (a few minutes)")
    ap.add_argument("--only", nargs="*", default=["ceiling", "throughput", "cpu", "convergence",
                                                  "samplers"])
    ap.add_argument("--samplers", nargs="*", default=["tpe", "random", "qmc"])
    ap.add_argument("--sampler-trials", type=int, default=None)
    ap.add_argument("--seeds", type=int, nargs="*", default=None)
    ap.add_argument("--studies", nargs="*", default=["bench", "site"])
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    q = args.quick
    results: dict = {"cpu_count": os.cpu_count(), "started": time.strftime("%Y-%m-%d %H:%M:%S")}
    path = out / "bench_search.json"
    if path.exists():
        results.update(json.loads(path.read_text()))
    if "ceiling" in args.only:
        results["ceiling"] = ceiling(out, 100 if q else 300)
        print("ceiling", results["ceiling"], flush=True)
    if "throughput" in args.only:
        results["throughput"] = throughput(out, 30 if q else 100)
        print("throughput", results["throughput"], flush=True)
    if "cpu" in args.only:
        results["cpu"] = cpu_cost(out, 10 if q else 30)
        print("cpu", results["cpu"], flush=True)
    if "convergence" in args.only:
        results["convergence"] = convergence(out, 60.0 if q else 240.0)
        print("convergence", results["convergence"], flush=True)
    if "samplers" in args.only:
        n = args.sampler_trials or (30 if q else 60)
        seeds = args.seeds or ([1, 2] if q else [1, 2, 3])
        paths = tuple({"bench": BENCH, "site": SITE}[k] for k in args.studies)
        key = f"samplers_{n}"
        results[key] = samplers(out, n, seeds, args.samplers, paths)
        print(key, json.dumps(results[key], indent=1), flush=True)
    path.write_text(json.dumps(results, indent=1) + "\n")
    print(f"written {path}")


if __name__ == "__main__":
    main()
