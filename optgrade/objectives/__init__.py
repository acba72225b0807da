"""Design goals, one module each, registered by name.

Each goal is a small :class:`Objective` subclass with a ``name``, a ``direction``
(``"maximize"`` or ``"minimize"``) and ``evaluate(trace, layout, study, context) ->
ObjectiveValue(score, details)``. A module registers its class with the :func:`register`
decorator (the registry :data:`GOALS`); the built-in goals are the modules listed in
:data:`BUILTIN`, imported on first use. A goal defined elsewhere (a notebook, a test file, a
plug-in) is one module plus its registration: study validation (``[goal.weights]`` keys,
``[search] objectives``) reads the registry, so it is accepted as soon as it is registered.

Single-objective studies maximise the weighted sum (:func:`weighted_score`) of the goals named in
``study.goal.weights`` (a minimised goal enters with a minus sign); multi-objective studies
optimise the goals named in ``study.search.objectives`` as a Pareto front.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from optgrade._registry import Registry
from optgrade.objectives._common import wanted_fraction

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation import PropagationModel, Trace
    from optgrade.study import Study

__all__ = [
    "BUILTIN",
    "GOALS",
    "EvalContext",
    "Objective",
    "ObjectiveValue",
    "evaluate_many",
    "get",
    "main_score",
    "names",
    "register",
    "signed",
    "wanted_fraction",
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
    "far_face",
)

#: Trace one layout (the study's propagation model over the goal band).
TraceFn = Callable[["Layout"], "Trace"]
#: Trace ``layout`` once per row of ``errors`` (m) added to its rod heights.
HeightErrorsFn = Callable[["Layout", np.ndarray], "list[Trace]"]


@dataclass(frozen=True)
class ObjectiveValue:
    """Score of one goal and the numbers behind it (plain floats/ints/strings, JSON-ready)."""

    score: float
    details: dict[str, Any] = field(default_factory=dict)


@dataclass
class EvalContext:
    """What a goal may need besides the trace, all built once per study by the search.

    Attributes
    ----------
    trace_fn : callable, optional
        ``trace_fn(layout) -> Trace`` with the study's propagation model.
    trace_height_errors : callable, optional
        ``trace_height_errors(layout, errors) -> list[Trace]``: one trace per row of ``errors``
        (m, shape (n_draws, n_resonators)) added to the rod heights, with the same model
        (``optgrade.propagation.height_error_traces``; may be faster than tracing each).
    model : PropagationModel, optional
        The propagation model behind both (for records such as table hashes).
    seed : int
        Seed for anything random (the study seed).
    """

    trace_fn: TraceFn | None = None
    trace_height_errors: HeightErrorsFn | None = None
    model: PropagationModel | None = None
    seed: int = 0


class Objective(ABC):
    """A design goal. Subclasses set ``name`` and ``direction`` and implement ``evaluate``."""

    name: ClassVar[str] = ""
    direction: ClassVar[str] = "maximize"
    #: True if the goal needs further traces (robustness): left out of its own main score.
    is_composite: ClassVar[bool] = False

    @abstractmethod
    def evaluate(
        self, trace: Trace, layout: Layout, study: Study, context: EvalContext
    ) -> ObjectiveValue:
        """Score ``layout`` from its ``trace`` (see the Trace contract in DEVELOPERS.md)."""


#: Registered goals by name (the built-in modules are imported on first use).
GOALS: Registry[Objective] = Registry("goal", builtin=tuple(f"{__name__}._{m}" for m in BUILTIN))


def register(cls: type[Objective]) -> type[Objective]:
    """Class decorator: make a goal available by its ``name``."""
    if cls.direction not in ("maximize", "minimize"):
        raise ValueError(f"{cls.__name__}: direction must be 'maximize' or 'minimize'")
    return GOALS.register(cls)


def names() -> list[str]:
    """Names of all registered goals."""
    return list(GOALS.names())


def get(name: str) -> Objective:
    """An instance of the goal called ``name``.

    Raises
    ------
    KeyError
        Unknown goal; the message lists the known ones.
    """
    return GOALS.get(name)()


def signed(objective: Objective, score: float) -> float:
    """Score with the sign that makes larger better."""
    return score if objective.direction == "maximize" else -score


def evaluate_many(
    goal_names: Iterable[str], trace: Trace, layout: Layout, study: Study, context: EvalContext
) -> dict[str, ObjectiveValue]:
    """Evaluate several goals on one trace."""
    return {n: get(n).evaluate(trace, layout, study, context) for n in goal_names}


def weighted_score(values: Mapping[str, ObjectiveValue], weights: Mapping[str, float]) -> float:
    """Weighted sum of goal scores, minimised goals with a minus sign (larger is better)."""
    return float(sum(w * signed(get(n), values[n].score) for n, w in weights.items() if w))


def main_score(trace: Trace, layout: Layout, study: Study, context: EvalContext) -> float:
    """Weighted score of the study's non-composite goals (what robustness perturbs)."""
    weights = {n: w for n, w in study.goal.weights.items() if w and not get(n).is_composite}
    values = evaluate_many(weights, trace, layout, study, context)
    return weighted_score(values, weights)
