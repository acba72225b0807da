"""optgrade: inverse design of graded surface-resonator arrays for Rayleigh-wave control.

The notebook API, from study file to exports (each name is imported on first use, so
``import optgrade`` stays cheap)::

    from optgrade import load_study, read_table, trace_layout, run_search, export_trial

    study = load_study("studies/bench_backward_shear.toml")
    layout = read_table("studies/layouts/bench_backward_shear.csv")
    trace = trace_layout(study, layout)         # Trace: channel fractions per frequency
                                                # (the study's goal.propagation model)
    frame = trace.to_frame()                    # pandas DataFrame (optional extra "frames")
    outcome = run_search(study, "runs/bench")   # optuna study in runs/bench/study.db
    export_trial(study, outcome.storage, outcome.best_number, "runs/bench",
                 context=outcome.context)
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

#: Public name -> module that defines it.
_API: dict[str, str] = {
    "Study": "optgrade.study",
    "load_study": "optgrade.study",
    "study_from_dict": "optgrade.study",
    "study_from_text": "optgrade.study",
    "StudyError": "optgrade.errors",
    "Layout": "optgrade.layout",
    "layout_from_cells": "optgrade.layout",
    "read_table": "optgrade.layout",
    "write_table": "optgrade.layout",
    "check_layout": "optgrade.fabrication",
    "layout_from_params": "optgrade.profiles",
    "Trace": "optgrade.propagation",
    "PropagationModel": "optgrade.propagation",
    "propagation_model": "optgrade.propagation",
    "study_frequencies": "optgrade.propagation",
    "trace_layout": "optgrade.propagation",
    "trace_study": "optgrade.propagation",
    "surrogate_for_study": "optgrade.dispersion",
    "EvalContext": "optgrade.objectives",
    "Objective": "optgrade.objectives",
    "ObjectiveValue": "optgrade.objectives",
    "register_goal": "optgrade.objectives",
    "SearchError": "optgrade.search",
    "SearchOutcome": "optgrade.search",
    "make_context": "optgrade.search",
    "run_search": "optgrade.search",
    "export_layout": "optgrade.export",
    "export_trial": "optgrade.export",
    "verify": "optgrade.fullwave",
}

#: Names whose attribute in the defining module differs.
_ALIASES: dict[str, str] = {"register_goal": "register"}

__all__ = ["__version__", *sorted(_API)]


def __getattr__(name: str) -> Any:
    module = _API.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(module), _ALIASES.get(name, name))
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_API))
