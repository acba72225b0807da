"""Convergence variants of the bench-scale search (figures for docs/search.md, issue 5).

Each variant runs the bench example on 2 workers until it has told at least 400 trials and
reached the reference score, or until the time budget. Reported: seconds and trials to the
reference (95 % of a fixed best, the same for every variant), best after 400 trials.

Run: python benchmarks/bench_search_start.py VARIANT [VARIANT ...] [--budget S] [--ref R]
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sqlite3
import time
from pathlib import Path

import numpy as np
import optuna

from optgrade.search import _owner as search
from optgrade.study import load_study

REPO = Path(__file__).resolve().parent.parent
BENCH = REPO / "studies" / "bench_backward_shear.toml"


def _tpe(seed: int, group: bool, n_startup: int) -> optuna.samplers.BaseSampler:
    return optuna.samplers.TPESampler(seed=seed, multivariate=True, constant_liar=True,
                                      group=group, n_startup_trials=n_startup)


VARIANTS = {
    "base": dict(group=False, n_startup=10, starts=False),
    "group": dict(group=True, n_startup=10, starts=False),
    "starts": dict(group=False, n_startup=10, starts=True),
    "group_starts": dict(group=True, n_startup=10, starts=True),
    "starts_s20": dict(group=False, n_startup=20, starts=True),
    "s20": dict(group=False, n_startup=20, starts=False),
    "s5": dict(group=False, n_startup=5, starts=False),
    "starts_s5": dict(group=False, n_startup=5, starts=True),
}


def _best_in_db(db: Path) -> float:
    con = sqlite3.connect(db)
    try:
        row = con.execute("SELECT MAX(value) FROM trial_values").fetchone()
    finally:
        con.close()
    return float(row[0]) if row and row[0] is not None else -np.inf


def run(name: str, budget: float, ref: float, out: Path, is_stop: bool = True,
        seed: int | None = None) -> dict:
    """One variant; stops (graceful SIGINT) once 400 trials are told and ``ref`` is reached."""
    v = VARIANTS[name]
    study = load_study(BENCH)
    if seed is not None:
        study = study.model_copy(update={"meta": study.meta.model_copy(update={"seed": seed})})
    orig_make = search.make_sampler
    search.make_sampler = lambda n, seed, multi: _tpe(seed, v["group"], v["n_startup"])
    orig_starts = getattr(search, "N_STARTS", None)
    if orig_starts is not None and not v["starts"]:
        search.N_STARTS = 0
    db = out / f"{name}_{seed}.db"
    if db.exists():
        db.unlink()
    state = {"sent": False}

    def on_told(n: int) -> None:
        if is_stop and n >= 400 and n % 8 == 0 and not state["sent"] and _best_in_db(db) >= ref:
            state["sent"] = True
            os.kill(os.getpid(), signal.SIGINT)

    t0 = time.perf_counter()
    try:
        o = search.run_search(study, out / name, storage=f"sqlite:///{db}", n_trials=100_000,
                              n_jobs=2, time_budget=budget, show_progress=False,
                              on_told=on_told)
    finally:
        search.make_sampler = orig_make
        if orig_starts is not None:
            search.N_STARTS = orig_starts
    hist = np.array(o.history)
    best = hist[:, 1]
    hit = np.nonzero(best >= ref)[0]
    return {"variant": name, "seed": int(study.meta.seed), **v, "trials": len(hist),
            "seconds": time.perf_counter() - t0,
            "ref": ref, "seconds_to_ref": float(hist[hit[0], 0]) if hit.size else None,
            "trials_to_ref": int(hit[0]) + 1 if hit.size else None,
            "best_at_400": float(best[399]) if len(best) >= 400 else None,
            "best_final": float(np.nanmax(best)),
            "own95_trial": int(np.argmax(best >= 0.95 * np.nanmax(best))) + 1,
            "own95_s": float(hist[np.argmax(best >= 0.95 * np.nanmax(best)), 0]),
            "best_at_60s": float(best[hist[:, 0] <= 60][-1]),
            "best_at_120s": float(best[hist[:, 0] <= 120][-1]), "load": os.getloadavg()[0]}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("variants", nargs="+")
    ap.add_argument("--budget", type=float, default=170.0)
    ap.add_argument("--ref", type=float, default=0.95 * 0.5246)
    ap.add_argument("--seeds", type=int, nargs="*", default=[None])
    ap.add_argument("--no-stop", action="store_true", help="run the whole budget")
    ap.add_argument("--out", default=str(REPO / "runs" / "conv_var"))
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    for seed in args.seeds:
        for name in args.variants:
            r = run(name, args.budget, args.ref, out, not args.no_stop, seed)
            print(json.dumps(r), flush=True)
            with open(out / "results.jsonl", "a") as fh:
                fh.write(json.dumps(r) + "\n")


if __name__ == "__main__":
    main()
