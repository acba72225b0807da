"""Which scorer finds the better layout in the same wall time: WKB, exact, or both in turn?

Issue 12 item 4. For every study, three searches of the same wall-time budget (seconds after
the tables are built and cached; optuna's default sampler for the study, the study's seed):

- ``wkb``: every candidate scored with the WKB march (``goal.propagation = "wkb"``);
- ``exact``: every candidate scored with the exact multiple-scattering row model;
- ``two-stage``: a WKB-scored search for ``--screen`` of the budget, then the best WKB trials
  re-scored with the exact model, best first, until the budget is spent.

Each search's winner is then scored with the exact model (the number the report promises), so
the three are compared on one scale; the winners are written as machining tables for
``optgrade verify``. Printed: finished trials, trials per second, the winner's exact and WKB
weighted scores.

Run:  python benchmarks/search_models.py [--budget 90] [--jobs 2] [--out DIR] [STUDY ...]
(default studies: both examples and the two invented ones in benchmarks/studies/).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DEFAULT_STUDIES = (
    ROOT / "studies" / "bench_backward_shear.toml",
    ROOT / "studies" / "site_ground_barrier.toml",
    HERE / "studies" / "steel_pin_blocker.toml",
    HERE / "studies" / "alu_forward_shear.toml",
)


def with_propagation(study: Any, name: str) -> Any:
    """The study with ``goal.propagation`` replaced (pydantic frozen models: model_copy)."""
    return study.model_copy(update={"goal": study.goal.model_copy(update={"propagation": name})})


def _search(study: Any, out: Path, budget: float, jobs: int) -> Any:
    from optgrade.search import run_search

    return run_search(study, out, n_trials=1_000_000, n_jobs=jobs, time_budget=budget,
                      show_progress=False)


def _finished(outcome: Any, study: Any) -> list[Any]:
    """Finished trials of a search, best first by their own score."""
    import optuna

    ost = optuna.load_study(study_name=outcome.study_name, storage=outcome.storage)
    done = [t for t in ost.get_trials(deepcopy=False)
            if t.state == optuna.trial.TrialState.COMPLETE and t.values]
    return sorted(done, key=lambda t: -t.values[0])


def _scores(params: dict, exact_ctx: Any, wkb_ctx: Any, study: Any) -> tuple[float, float]:
    from optgrade.search._owner import evaluate_params

    return (evaluate_params(with_propagation(study, "scattering"), params, exact_ctx)["score"],
            evaluate_params(with_propagation(study, "wkb"), params, wkb_ctx)["score"])


def _two_stage(study: Any, out: Path, budget: float, jobs: int, screen: float,
               exact_ctx: Any) -> tuple[Any, dict, int, int]:
    """WKB search for screen x budget, then exact re-ranking of its best trials."""
    from optgrade.search._owner import evaluate_params

    t0 = time.perf_counter()
    outcome = _search(with_propagation(study, "wkb"), out, screen * budget, jobs)
    ranked = _finished(outcome, study)
    exact = with_propagation(study, "scattering")
    best, best_params, n_rescored = -float("inf"), ranked[0].params, 0
    for t in ranked:
        if time.perf_counter() - t0 >= budget:
            break
        s = evaluate_params(exact, t.params, exact_ctx)["score"]
        n_rescored += 1
        if s > best:
            best, best_params = s, t.params
    return outcome, best_params, len(ranked), n_rescored


def run_study(path: Path, budget: float, jobs: int, screen: float, out_dir: Path) -> list[dict]:
    from optgrade.layout import write_table
    from optgrade.profiles import layout_from_params
    from optgrade.search import make_context
    from optgrade.study import load_study

    study = load_study(path)
    exact_ctx = make_context(with_propagation(study, "scattering"))
    wkb_ctx = make_context(with_propagation(study, "wkb"))
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        # warm the disk caches of every worker's tables (not timed)
        for name in ("wkb", "scattering"):
            _search(with_propagation(study, name), Path(tmp) / f"warm_{name}", 3.0, jobs)
        for scheme in ("wkb", "exact", "two-stage"):
            run_dir = Path(tmp) / scheme
            t0 = time.perf_counter()
            if scheme == "two-stage":
                outcome, params, n_done, n_re = _two_stage(study, run_dir, budget, jobs, screen,
                                                           exact_ctx)
            else:
                name = "wkb" if scheme == "wkb" else "scattering"
                outcome = _search(with_propagation(study, name), run_dir, budget, jobs)
                ranked = _finished(outcome, study)
                params, n_done, n_re = ranked[0].params, len(ranked), 0
            wall = time.perf_counter() - t0
            s_exact, s_wkb = _scores(params, exact_ctx, wkb_ctx, study)
            layout = layout_from_params(study, params)
            table = out_dir / f"{study.meta.name}_{scheme}.csv"
            write_table(layout, table, study_name=study.meta.name,
                        material=str(study.resonator.material))
            row = {"study": study.meta.name, "scheme": scheme, "wall_s": wall,
                   "finished": n_done, "rescored": n_re, "trials_per_s": n_done / wall,
                   "winner_exact": s_exact, "winner_wkb": s_wkb,
                   "n_resonators": layout.n_resonators, "table": str(table)}
            rows.append(row)
            print(f"  {study.meta.name:22s} {scheme:9s} {wall:6.1f} s {n_done:5d} trials "
                  f"({n_done / wall:5.1f}/s, {n_re} re-scored) winner exact {s_exact:7.4f} "
                  f"wkb {s_wkb:7.4f}", flush=True)
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("studies", nargs="*", type=Path, default=list(DEFAULT_STUDIES))
    parser.add_argument("--budget", type=float, default=90.0, help="seconds per search")
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--screen", type=float, default=0.75,
                        help="share of the budget the two-stage scheme screens with WKB")
    parser.add_argument("--out", type=Path, default=Path("runs/search_models"))
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    rows = []
    for path in args.studies:
        print(f"{path.name} (load average {os.getloadavg()[0]:.1f})", flush=True)
        rows += run_study(path, args.budget, args.jobs, args.screen, args.out)
    (args.out / "search_models.json").write_text(json.dumps(rows, indent=1))
    print("\n| study | scheme | trials | trials/s | winner exact score | winner WKB score |")
    print("| --- | --- | --- | --- | --- | --- |")
    for r in rows:
        print(f"| {r['study']} | {r['scheme']} | {r['finished']} | {r['trials_per_s']:.1f} | "
              f"{r['winner_exact']:.4f} | {r['winner_wkb']:.4f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
