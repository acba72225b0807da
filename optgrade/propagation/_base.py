"""The small base every propagation model implements, and its registry.

A propagation model turns a layout into a :class:`~optgrade.propagation.Trace` (channel fractions
per frequency). It is built once per study (tables, caches) and then traces any number of
layouts. Which dispersion points, tables or solves it needs is its own business. A new model is
one module with one subclass registered with :data:`PROPAGATION_MODELS`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np
from numpy.typing import ArrayLike

from optgrade._registry import Registry

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.propagation._trace import Trace
    from optgrade.study import Study


def study_frequencies(study: Study) -> np.ndarray:
    """The study's frequency grid: ``goal.n_frequencies`` points evenly over ``goal.band`` (Hz)."""
    lo, hi = (float(v) for v in study.goal.band)
    return np.linspace(lo, hi, int(study.goal.n_frequencies))


class PropagationModel(ABC):
    """Channel fractions of layouts of one study.

    Parameters
    ----------
    study : Study
        The validated study (substrate, resonator, band, model variant).
    """

    name: ClassVar[str] = ""
    #: With ``substrate.thickness``: the whole far-face map (trace, report) or only what the
    #: far_face goal scores (the search sets False; docs/physics.md section 14).
    far_face_detail: bool = True

    def __init__(self, study: Study) -> None:
        self.study = study

    @abstractmethod
    def trace(self, layout: Layout, freq: ArrayLike | None = None) -> Trace:
        """Where the power of a unit incident Rayleigh wave goes, per frequency (Hz; the study's
        grid when omitted)."""

    def trace_detail(
        self, layout: Layout, freq: ArrayLike | None = None
    ) -> tuple[Trace, np.ndarray | None]:
        """The trace plus each resonator's share of the channels where the model knows it.

        Returns ``(trace, shares)``; ``shares`` has shape (6, n_freq, n_resonators), the
        fractions that resonator j sends into ``CHANNELS[1:]`` (reflected, the four bulk
        channels, absorbed; dimensionless, summing over j to the trace's fractions), or None
        when the model has no per-resonator picture (the default). The channel map draws it.
        """
        return self.trace(layout, freq), None

    def trace_height_errors(self, layout: Layout, errors: np.ndarray) -> list[Trace]:
        """One trace per row of ``errors`` (m, shape (n_draws, n_resonators)) added to the rod
        heights of ``layout``, over the study's grid. A model with a faster way overrides it."""
        from optgrade.layout import with_height_errors

        return [self.trace(with_height_errors(layout, e)) for e in errors]

    def frequencies(self, freq: ArrayLike | None) -> np.ndarray:
        """``freq`` as a 1-D float array, or the study's grid when None (Hz)."""
        if freq is None:
            return study_frequencies(self.study)
        return np.atleast_1d(np.asarray(freq, dtype=float))


#: Registered propagation models by name.
PROPAGATION_MODELS: Registry[PropagationModel] = Registry(
    "propagation model", builtin=("optgrade.propagation._wkb", "optgrade.propagation._scattering")
)


def propagation_model(study: Study, name: str | None = None, **kwargs: Any) -> PropagationModel:
    """Build the propagation model ``name`` (default ``study.goal.propagation``) for ``study``.

    Keyword arguments go to the model's constructor (e.g. ``dispersion=`` for the WKB march).

    Raises
    ------
    KeyError
        Unknown model name; the message lists the registered ones.
    """
    return PROPAGATION_MODELS.get(name or study.goal.propagation)(study, **kwargs)


def trace_layout(study: Study, layout: Layout, freq: ArrayLike | None = None) -> Trace:
    """Trace ``layout`` with the study's propagation model (``goal.propagation``) over ``freq``
    (Hz; the study's grid when omitted). For many layouts build the model once with
    :func:`propagation_model` and call its ``trace``."""
    return propagation_model(study).trace(layout, freq)
