"""Search stage: the optuna ask-and-tell owner loop and its scoring pool."""

from __future__ import annotations

from optgrade.search._owner import (  # noqa: F401
    DEFAULT_CHUNK,
    DEFAULT_SAMPLER,
    INFEASIBLE_PENALTY,
    TPE_STARTUP,
    SearchError,
    SearchOutcome,
    best_trial,
    default_storage,
    directions,
    evaluate_params,
    file_hash,
    finished_trials,
    goal_names,
    is_multi_objective,
    make_context,
    make_sampler,
    open_storage,
    recover_lost,
    run_search,
    study_hash,
)

__all__ = [
    "DEFAULT_CHUNK",
    "DEFAULT_SAMPLER",
    "INFEASIBLE_PENALTY",
    "SearchError",
    "SearchOutcome",
    "TPE_STARTUP",
    "best_trial",
    "default_storage",
    "directions",
    "evaluate_params",
    "file_hash",
    "finished_trials",
    "goal_names",
    "is_multi_objective",
    "make_context",
    "make_sampler",
    "open_storage",
    "recover_lost",
    "run_search",
    "study_hash",
]
