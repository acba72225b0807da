"""Search stage: the optuna ask-and-tell owner loop, its scoring pool and the sampler registry.

Names are imported on first use, so reading the sampler registry (study validation, the command
line's choices) does not import optuna.
"""

from __future__ import annotations

import importlib
from typing import Any

_HOMES: dict[str, str] = {
    "SearchError": "_errors",
    "AUTO": "_samplers",
    "DEFAULT_SAMPLER": "_samplers",
    "SAMPLERS": "_samplers",
    "SamplerFactory": "_samplers",
    "TPE_STARTUP": "_samplers",
    "make_sampler": "_samplers",
    "sampler_choices": "_samplers",
    **{name: "_owner" for name in (
        "DEFAULT_CHUNK",
        "INFEASIBLE_PENALTY",
        "SearchOutcome",
        "best_trial",
        "default_storage",
        "directions",
        "evaluate_params",
        "file_hash",
        "finished_trials",
        "goal_names",
        "is_multi_objective",
        "load_search",
        "make_context",
        "mask_url",
        "open_storage",
        "recover_lost",
        "run_search",
        "study_hash",
    )},
}

__all__ = sorted(_HOMES)


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{home}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOMES))
