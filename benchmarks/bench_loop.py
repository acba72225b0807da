"""Does the search loop keep up with the physics? (issue 17 part 5; docs/search.md).

For the bench example with a given scorer (``wkb`` or ``scattering``, robustness goal on or
off) and storage (``sqlite`` or ``journal``):

1. the scoring cost: CPU seconds per layout scored in this process (the same candidates the
   search would draw), which sets the 2-core bound 2 / cost trials/s;
2. a search with 2 worker processes for a fixed wall time: trials/s, the fraction of the bound
   it reaches, and the best score at that time (per seed).

Run:  python benchmarks/bench_loop.py --scorer wkb --storage sqlite --seconds 40 --seeds 1 2
Prints one JSON line per run. The machine is shared: compare runs made side by side.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import tempfile
import time
from pathlib import Path

from optgrade.search import _owner as search
from optgrade.study import load_study

BENCH = Path(__file__).resolve().parent.parent / "studies" / "bench_backward_shear.toml"


def _variant(scorer: str, robust: bool, seed: int):
    s = load_study(BENCH)
    weights = dict(s.goal.weights)
    if not robust:
        weights.pop("robustness", None)
    goal = s.goal.model_copy(update={"propagation": scorer, "weights": weights})
    meta = s.meta.model_copy(update={"seed": seed, "name": f"loop_{scorer}_{int(robust)}_{seed}"})
    return s.model_copy(update={"goal": goal, "meta": meta})


def scoring_cost(study, n: int) -> float:
    """CPU seconds per layout scored in this process (random candidates of the search space)."""
    import optuna

    ctx = search.make_context(study)
    st = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=0))
    space = search.profiles.search_space(study)
    params = [st.ask(space).params for _ in range(n)]
    search.evaluate_params(study, params[0], ctx)  # compile and warm the caches
    t0 = time.process_time()
    for p in params:
        search.evaluate_params(study, p, ctx)
    return (time.process_time() - t0) / n


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scorer", default="wkb", choices=["wkb", "scattering"])
    ap.add_argument("--robust", action="store_true", help="keep the robustness goal")
    ap.add_argument("--storage", default="sqlite", choices=["sqlite", "journal"])
    ap.add_argument("--seconds", type=float, default=40.0)
    ap.add_argument("--seeds", type=int, nargs="*", default=[1])
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--cost-layouts", type=int, default=40)
    args = ap.parse_args()
    cost = scoring_cost(_variant(args.scorer, args.robust, 1), args.cost_layouts)
    bound = args.jobs / cost
    for seed in args.seeds:
        study = _variant(args.scorer, args.robust, seed)
        tmp = Path(tempfile.mkdtemp(prefix="bench_loop_"))
        url = (f"sqlite:///{tmp / 'study.db'}" if args.storage == "sqlite"
               else f"journal:{tmp / 'study.journal'}")
        out = search.run_search(study, tmp / "out", n_trials=100000, n_jobs=args.jobs,
                                storage=url, show_progress=False,
                                time_budget=args.seconds)
        rate = out.trials_per_second
        print(json.dumps({"scorer": args.scorer, "robust": args.robust,
                          "storage": args.storage, "seed": seed,
                          "score_cpu_ms": round(1000 * cost, 2),
                          "bound_trials_per_s": round(bound, 1),
                          "trials": out.n_told_now, "seconds": round(out.seconds, 1),
                          "trials_per_s": round(rate, 1),
                          "fraction_of_bound": round(rate / bound, 3),
                          "best_score": out.best_score, "load": round(os.getloadavg()[0], 2)}),
              flush=True)
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
