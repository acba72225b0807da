"""Candidate samplers of the search, one small factory each, registered by name.

A factory is a class with a ``name`` and ``build(seed, is_multi) -> optuna sampler``, added with
``@SAMPLERS.register``. Study validation (``[search] sampler``) and the ``--sampler`` option read
:data:`SAMPLERS` (plus ``auto``, which :func:`make_sampler` resolves), so a sampler is named in one
place. optuna is imported only when a sampler is built, so reading the names stays cheap.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import TYPE_CHECKING, ClassVar

from optgrade._registry import Registry
from optgrade.search._errors import SearchError

if TYPE_CHECKING:  # pragma: no cover
    import optuna

__all__ = [
    "AUTO",
    "DEFAULT_SAMPLER",
    "SAMPLERS",
    "TPE_STARTUP",
    "SamplerFactory",
    "make_sampler",
    "sampler_choices",
]

#: The study value that lets the search choose (DEFAULT_SAMPLER, NSGA-II when multi-objective).
AUTO = "auto"
#: Sampler used for ``sampler = "auto"`` (chosen by measurement, docs/search.md).
DEFAULT_SAMPLER = "tpe"
#: Random (independent) candidates before TPE starts modelling (optuna's default is 10; 20
#: measured faster to 95 % on the bench example, docs/search.md "Convergence").
TPE_STARTUP = 20


class SamplerFactory(ABC):
    """Builds one kind of seeded optuna sampler."""

    name: ClassVar[str] = ""

    @staticmethod
    @abstractmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:
        """A sampler seeded with ``seed``; ``is_multi`` for a multi-objective study."""


#: Registered samplers by name.
SAMPLERS: Registry[SamplerFactory] = Registry("sampler")


@SAMPLERS.register
class _TPE(SamplerFactory):
    name = "tpe"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:  # noqa: ARG004
        import optuna

        return optuna.samplers.TPESampler(seed=seed, multivariate=True, constant_liar=True,
                                          n_startup_trials=TPE_STARTUP)


@SAMPLERS.register
class _Random(SamplerFactory):
    name = "random"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:  # noqa: ARG004
        import optuna

        return optuna.samplers.RandomSampler(seed=seed)


@SAMPLERS.register
class _NSGA2(SamplerFactory):
    name = "nsga2"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:  # noqa: ARG004
        import optuna

        return optuna.samplers.NSGAIISampler(seed=seed)


@SAMPLERS.register
class _QMC(SamplerFactory):
    name = "qmc"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:  # noqa: ARG004
        import optuna

        return optuna.samplers.QMCSampler(seed=seed, scramble=True)


@SAMPLERS.register
class _CmaEs(SamplerFactory):
    name = "cmaes"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:
        import optuna

        try:
            import cmaes  # noqa: F401
        except ImportError:
            raise SearchError("search.sampler", "'cmaes' needs the cmaes package "
                               "(pip install cmaes); use 'tpe'") from None
        if is_multi:
            raise SearchError("search.sampler", "'cmaes' is single-objective; use 'nsga2'")
        return optuna.samplers.CmaEsSampler(seed=seed, warn_independent_sampling=False)


def sampler_choices() -> tuple[str, ...]:
    """Names a study or the command line may give: ``auto`` and every registered sampler."""
    return (AUTO, *SAMPLERS.names())


def make_sampler(name: str | None, seed: int, multi: bool) -> optuna.samplers.BaseSampler:
    """Seeded sampler by name; ``auto`` (or None) is DEFAULT_SAMPLER, NSGA-II when multi-objective.

    Raises
    ------
    SearchError
        Unknown name, or a sampler that cannot serve this study.
    """
    if name in (None, "", AUTO):
        name = "nsga2" if multi else DEFAULT_SAMPLER
    if name not in SAMPLERS:
        raise SearchError("search.sampler", f"unknown sampler {name!r}; known: "
                           f"{', '.join(sampler_choices())}")
    return SAMPLERS.get(name).build(seed, multi)
