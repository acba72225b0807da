"""Design goals, one module each, registered by name.

Each goal is a small :class:`Objective` subclass with a ``name``, a ``direction``
(``"maximize"`` or ``"minimize"``) and ``evaluate(trace, layout, study, context) ->
ObjectiveValue(score, details)``. A module registers its class with the :func:`register`
decorator; the package imports the modules listed in :data:`BUILTIN`. Adding a goal is one new
file in this package plus its name in :data:`BUILTIN`.

Single-objective studies maximise the weighted sum (:func:`weighted_score`) of the goals named in
``study.goal.weights`` (a minimised goal enters with a minus sign); multi-objective studies
optimise the goals named in ``study.search.objectives`` as a Pareto front.
"""

from __future__ import annotations

import importlib
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

__all__ = [
    "BUILTIN",
    "EvalContext",
    "Objective",
    "ObjectiveValue",
    "evaluate_many",
    "get",
    "names",
    "register",
    "signed",
    "weighted_score",
]

#: Modules of this package that define the built-in goals (one goal per module).
BUILTIN: tuple[str, ...] = (
    "channel",
    "worst",
    "blocking",
    "angle",
    "compactness",
    "adiabaticity",
    "robustness",
)

_REGISTRY: dict[str, type[Objective]] = {}


@dataclass(frozen=True)
class ObjectiveValue:
    """Score of one goal and the numbers behind it (plain floats/ints/strings, JSON-ready)."""

    score: float
    details: dict[str, Any] = field(default_factory=dict)


@dataclass
class EvalContext:
    """What a goal may need besides the trace: the surrogate, a way to trace another layout of
    the same study with the same surrogate, and a seed for anything random."""

    surrogate: Any = None
    trace_fn: Callable[[Any], Any] | None = None
    seed: int = 0
    cache: dict[str, Any] = field(default_factory=dict)


class Objective(ABC):
    """A design goal. Subclasses set ``name`` and ``direction`` and implement ``evaluate``."""

    name: ClassVar[str] = ""
    direction: ClassVar[str] = "maximize"
    #: True if the goal needs further traces (robustness): left out of its own main score.
    is_composite: ClassVar[bool] = False

    @abstractmethod
    def evaluate(self, trace: Any, layout: Any, study: Any, context: EvalContext) -> ObjectiveValue:
        """Score ``layout`` from its ``trace`` (see the Trace contract in DEVELOPERS.md)."""


def register(cls: type[Objective]) -> type[Objective]:
    """Class decorator: make a goal available by its ``name``."""
    if not cls.name:
        raise ValueError(f"{cls.__name__}: an objective needs a name")
    if cls.direction not in ("maximize", "minimize"):
        raise ValueError(f"{cls.__name__}: direction must be 'maximize' or 'minimize'")
    _REGISTRY[cls.name] = cls
    return cls


def _load_builtin() -> None:
    for module in BUILTIN:
        importlib.import_module(f"{__name__}._{module}")


def names() -> list[str]:
    """Names of all registered goals."""
    _load_builtin()
    return sorted(_REGISTRY)


def get(name: str) -> Objective:
    """An instance of the goal called ``name``.

    Raises
    ------
    KeyError
        Unknown goal; the message lists the known ones.
    """
    _load_builtin()
    try:
        return _REGISTRY[name]()
    except KeyError:
        known = ", ".join(sorted(_REGISTRY))
        raise KeyError(f"unknown objective {name!r}; known: {known}") from None


def signed(objective: Objective, score: float) -> float:
    """Score with the sign that makes larger better."""
    return score if objective.direction == "maximize" else -score


def evaluate_many(
    goal_names: Iterable[str], trace: Any, layout: Any, study: Any, context: EvalContext
) -> dict[str, ObjectiveValue]:
    """Evaluate several goals on one trace."""
    return {n: get(n).evaluate(trace, layout, study, context) for n in goal_names}


def weighted_score(values: Mapping[str, ObjectiveValue], weights: Mapping[str, float]) -> float:
    """Weighted sum of goal scores, minimised goals with a minus sign (larger is better)."""
    return float(sum(w * signed(get(n), values[n].score) for n, w in weights.items() if w))


def main_score(trace: Any, layout: Any, study: Any, context: EvalContext) -> float:
    """Weighted score of the study's non-composite goals (what robustness perturbs)."""
    weights = {n: w for n, w in study.goal.weights.items() if w and not get(n).is_composite}
    values = evaluate_many(weights, trace, layout, study, context)
    return weighted_score(values, weights)
