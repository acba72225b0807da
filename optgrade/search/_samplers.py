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
        cls = _batch_tpe_class()
        return cls(seed=seed, multivariate=True, constant_liar=True,
                   n_startup_trials=TPE_STARTUP)


def _uniform_batch(sampler: optuna.samplers.RandomSampler, study: optuna.Study, space: dict,
                   n: int) -> list[dict]:
    """``n`` candidates of independent uniform draws from ``sampler`` (a seeded random
    sampler), one parameter at a time in the space's order."""
    return [{name: sampler.sample_independent(study, None, name, dist)
             for name, dist in space.items()} for _ in range(n)]


def _batch_tpe_class() -> type:
    """optuna's TPE with a ``sample_batch`` method (the owner's fast ask path), or plain TPE
    where this optuna lacks the internals it reuses."""
    import optuna

    try:
        from optuna.samplers._tpe.sampler import (
            _split_trials,
            default_gamma,
            default_gamma_multiobjective,
        )
    except ImportError:  # pragma: no cover  another optuna layout: the plain sampler
        return optuna.samplers.TPESampler
    from optuna.trial import TrialState

    class BatchTPESampler(optuna.samplers.TPESampler):
        """TPE that fits its two Parzen estimators once per batch of candidates.

        optuna's TPE refits both estimators for every trial, reading the whole study; the
        fit is Python work linear in the trials (22 ms per trial at 850 trials in memory,
        measured, docs/search.md "Where the loop's time goes"), more than a WKB score.
        ``sample_batch(study, space, n)`` reads the trials once, fits once and draws ``n``
        candidates, each the best of its own ``n_ei_candidates`` draws from the same fit:
        what ``n`` workers asking at the same moment would get. The running trials enter
        the fit as the constant liar's worst values, as in optuna's TPE. Before the startup
        count, candidates are independent uniform draws (optuna's TPE startup).
        """

        def sample_batch(self, study: optuna.Study, space: dict, n: int) -> list[dict]:
            states = (TrialState.COMPLETE, TrialState.PRUNED, TrialState.RUNNING)
            trials = study._get_trials(deepcopy=False, states=states, use_cache=False)
            n_done = sum(t.state != TrialState.RUNNING for t in trials)
            if n_done < self._n_startup_trials:
                return _uniform_batch(self._random_sampler, study, space, n)
            if self._gamma is None:
                self._gamma = (default_gamma if len(study.directions) <= 1
                               else default_gamma_multiobjective)
            if not self._constant_liar:
                trials = [t for t in trials if t.state != TrialState.RUNNING]
            below, above = _split_trials(study, trials, self._gamma(n_done))
            mpe_below = self._build_parzen_estimator(study, space, below, handle_below=True)
            mpe_above = self._build_parzen_estimator(study, space, above, handle_below=False)
            out = []
            for _ in range(n):
                samples = mpe_below.sample(self._rng.rng, self._n_ei_candidates)
                acq = self._compute_acquisition_func(samples, mpe_below, mpe_above)
                best = type(self)._compare(samples, acq)
                out.append({name: dist.to_external_repr(best[name])
                            for name, dist in space.items()})
            return out

    return BatchTPESampler


@SAMPLERS.register
class _Random(SamplerFactory):
    name = "random"

    @staticmethod
    def build(seed: int, is_multi: bool) -> optuna.samplers.BaseSampler:  # noqa: ARG004
        import optuna

        class BatchRandomSampler(optuna.samplers.RandomSampler):
            """Uniform candidates, ``n`` at a time (the owner's fast ask path)."""

            def sample_batch(self, study: optuna.Study, space: dict, n: int) -> list[dict]:
                return _uniform_batch(self, study, space, n)

        return BatchRandomSampler(seed=seed)


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
