"""Layout profiles: a few search parameters -> a machinable graded layout.

A *profile* describes how one quantity (rod height, cell spacing or head mass) varies along the
row. Each kind is a small :class:`ProfileKind` registered by name in :data:`PROFILES` (study
validation of ``layout.profile`` reads the registry). Built-in kinds (plain names of our own):

``linear``  straight line between the two ends (2 parameters);
``power``   ends plus an exponent p, u(s) = u_end + (u_start - u_end) (1 - s)^p (3 parameters);
``spline``  monotone piecewise-cubic Hermite (PCHIP, Fritsch & Carlson, SIAM J. Numer. Anal. 17,
            238, 1980) through ``N_SPLINE_POINTS`` equally spaced control values;
``free``    one value per resonator (short rows only, at most ``MAX_FREE_COUNT`` resonators).

The study's ``layout.profile`` names the height profile (``"spline"``) or one kind per quantity
(``"height=spline, spacing=linear, head_mass=linear"``). Spacing and head mass default to
``linear``.

Every parameter is a number in [0, 1] (exponents log-uniform), so the fabrication limits hold by
construction: heights are mapped into the height range capped by slenderness and buckling
(:func:`optgrade.fabrication.max_height`) and quantised to the machining step; spacings are mapped
into [max(spacing_min, diameter + min_gap), spacing_max] and pulled towards the lower end when the
row would exceed the maximum array length; the resonator count is capped so that the row always
fits. Heights are monotone along the row: with ``layout.entry == "tall"`` the tall end is at x = 0
(the entry side, met first by the incoming wave) and heights decrease with x; ``"short"`` is the
mirror image.
"""

from __future__ import annotations

import math
import re
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from optgrade import fabrication
from optgrade._registry import Registry

if TYPE_CHECKING:  # pragma: no cover
    import optuna
    from optuna.distributions import BaseDistribution

    from optgrade.layout import Layout
    from optgrade.study import Study

QUANTITIES = ("height", "spacing", "head_mass")
N_SPLINE_POINTS = 4
MAX_FREE_COUNT = 24
POWER_RANGE = (0.25, 4.0)
COUNT_PARAM = "n_resonators"


class ProfileError(ValueError):
    """A profile request that cannot be met; ``field`` names the study field at fault."""

    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason


@dataclass(frozen=True)
class ProfilePlan:
    """Profile kind for each graded quantity."""

    height: str = "spline"
    spacing: str = "linear"
    head_mass: str = "linear"

    def kind(self, quantity: str) -> str:
        return getattr(self, quantity)


def parse_profile(text: str | None) -> ProfilePlan:
    """Read ``layout.profile``: ``"spline"`` or ``"height=spline, spacing=power"``.

    Raises
    ------
    ProfileError
        Unknown kind or quantity.
    """
    if not text:
        return ProfilePlan()
    kinds: dict[str, str] = {}
    parts = [p.strip() for p in re.split(r"[,;]", text) if p.strip()]
    for part in parts:
        if "=" in part:
            quantity, kind = (s.strip() for s in part.split("=", 1))
        else:
            quantity, kind = "height", part
        if quantity not in QUANTITIES:
            raise ProfileError(
                "layout.profile", f"unknown quantity {quantity!r}; use one of {QUANTITIES}"
            )
        if kind not in PROFILES:
            raise ProfileError(
                "layout.profile", f"unknown profile kind {kind!r}; use one of {PROFILES.names()}"
            )
        kinds[quantity] = kind
    return ProfilePlan(**kinds)


# ---------------------------------------------------------------------------------------------
# shapes on the unit interval


class ProfileKind(ABC):
    """One way a quantity varies along the row, from parameters in [0, 1] (exponents aside)."""

    name: ClassVar[str] = ""

    @staticmethod
    @abstractmethod
    def param_names(prefix: str, n_free: int) -> list[str]:
        """Search-parameter names, each starting with ``prefix`` (``"height_"``, ...);
        ``n_free`` is the largest resonator count (for one value per resonator)."""

    @staticmethod
    @abstractmethod
    def values(params: dict[str, float], prefix: str, s: np.ndarray,
               is_monotone: bool) -> np.ndarray:
        """Unclipped profile values at normalised positions ``s`` (0 = first resonator);
        non-increasing in ``s`` when ``is_monotone``."""


#: Registered profile kinds by name.
PROFILES: Registry[ProfileKind] = Registry("profile kind")


def _ends(params: dict[str, float], prefix: str, is_monotone: bool) -> tuple[float, float]:
    start = float(params[prefix + "start"])
    end = float(params[prefix + "end"])
    # nested parametrisation: the end is a fraction of the start, so any point is monotone
    return start, (start * end if is_monotone else end)


@PROFILES.register
class _Linear(ProfileKind):
    name = "linear"

    @staticmethod
    def param_names(prefix: str, n_free: int) -> list[str]:  # noqa: ARG004
        return [prefix + "start", prefix + "end"]

    @staticmethod
    def values(params, prefix, s, is_monotone):
        start, end = _ends(params, prefix, is_monotone)
        return start + (end - start) * s


@PROFILES.register
class _Power(ProfileKind):
    name = "power"

    @staticmethod
    def param_names(prefix: str, n_free: int) -> list[str]:  # noqa: ARG004
        return [prefix + "start", prefix + "end", prefix + "exponent"]

    @staticmethod
    def values(params, prefix, s, is_monotone):
        start, end = _ends(params, prefix, is_monotone)
        expo = float(params[prefix + "exponent"])
        return end + (start - end) * (1.0 - s) ** expo


@PROFILES.register
class _Spline(ProfileKind):
    name = "spline"

    @staticmethod
    def param_names(prefix: str, n_free: int) -> list[str]:  # noqa: ARG004
        return [f"{prefix}c{i}" for i in range(N_SPLINE_POINTS)]

    @staticmethod
    def values(params, prefix, s, is_monotone):
        from scipy.interpolate import PchipInterpolator

        c = np.array([float(params[f"{prefix}c{i}"]) for i in range(N_SPLINE_POINTS)])
        if is_monotone:
            c = np.cumprod(c)
        knots = np.linspace(0.0, 1.0, N_SPLINE_POINTS)
        return PchipInterpolator(knots, c)(s)


@PROFILES.register
class _Free(ProfileKind):
    name = "free"

    @staticmethod
    def param_names(prefix: str, n_free: int) -> list[str]:
        return [f"{prefix}f{i:02d}" for i in range(n_free)]

    @staticmethod
    def values(params, prefix, s, is_monotone):
        v = np.array([float(params[f"{prefix}f{i:02d}"]) for i in range(s.size)])
        return np.sort(v)[::-1] if is_monotone else v


def shape_values(
    kind: str, params: dict[str, float], quantity: str, s: np.ndarray, is_monotone: bool
) -> np.ndarray:
    """Profile values on [0, 1] at normalised positions ``s`` (0 = first resonator).

    Parameters
    ----------
    kind : profile kind (a name in :data:`PROFILES`).
    params : parameter dict (names ``<quantity>_...``), values in [0, 1] except the exponent.
    quantity : ``"height"``, ``"spacing"`` or ``"head_mass"``.
    s : normalised position along the row, shape (n,).
    is_monotone : if True the result is non-increasing in ``s`` (nested parametrisation: each
        value is a fraction of the previous one, so any parameter point is valid).

    Returns
    -------
    ndarray, shape (n,), values in [0, 1].
    """
    if kind not in PROFILES:
        raise ProfileError("layout.profile", f"unknown profile kind {kind!r}")
    u = PROFILES.get(kind).values(params, f"{quantity}_", np.asarray(s, dtype=float),
                                  is_monotone)
    return np.clip(u, 0.0, 1.0)


# ---------------------------------------------------------------------------------------------
# ranges and the search space


def _has_head_mass(study: Study) -> bool:
    return float(study.resonator.head_mass[1]) > 0.0


def spacing_range(study: Study) -> tuple[float, float]:
    """Allowed cell spacing (m): [max(spacing_min, diameter + min_gap), spacing_max]."""
    lo = max(float(study.layout.spacing[0]), study.resonator.diameter + study.fabrication.min_gap)
    return lo, float(study.layout.spacing[1])


def count_range(study: Study) -> tuple[int, int]:
    """Resonator count range, the upper end capped so the row fits within ``max_length``.

    The row length is the sum of the cell lengths, ``x[-1] + spacing[-1]``; with the smallest
    allowed spacing a row of n resonators is n * spacing_lo long.
    """
    n_lo, n_hi = (int(v) for v in study.layout.count)
    n_lo = max(n_lo, 2)  # a layout needs two resonators so that every cell has a length
    s_lo, _ = spacing_range(study)
    max_length = study.layout.max_length
    if max_length is not None and np.isfinite(max_length) and s_lo > 0:
        n_hi = min(n_hi, int(np.floor(max_length / s_lo * (1 + 1e-12))))
    return n_lo, max(n_hi, 0)


def search_space(study: Study) -> dict[str, BaseDistribution]:
    """Optuna distributions of the search parameters of a study (fixed, flat space).

    The space does not branch, so the same dict serves ``study.ask(fixed_distributions=...)``
    (ask-and-tell), samplers that need a fixed space, and :func:`suggest` on a trial.

    Raises
    ------
    ProfileError
        Infeasible count range, or ``free`` profile on a long row.
    """
    from optuna.distributions import FloatDistribution, IntDistribution

    plan = parse_profile(study.layout.profile)
    n_lo, n_hi = count_range(study)
    if n_hi < n_lo:
        raise ProfileError(
            "layout.count",
            f"no resonator count in {tuple(study.layout.count)} fits max_length "
            f"{study.layout.max_length} m at the smallest allowed spacing "
            f"{spacing_range(study)[0]} m",
        )
    space: dict[str, BaseDistribution] = {}
    if n_hi > n_lo:
        space[COUNT_PARAM] = IntDistribution(n_lo, n_hi)
    quantities = ["height", "spacing"]
    s_lo, s_hi = spacing_range(study)
    if s_hi <= s_lo:
        quantities.remove("spacing")
    m_lo, m_hi = study.resonator.head_mass
    if _has_head_mass(study) and m_hi > m_lo:
        quantities.append("head_mass")
    for quantity in quantities:
        kind = plan.kind(quantity)
        if kind == "free" and n_hi > MAX_FREE_COUNT:
            raise ProfileError(
                "layout.profile",
                f"'free' {quantity} profile needs at most {MAX_FREE_COUNT} resonators, "
                f"count goes up to {n_hi}; use 'spline'",
            )
        for name in PROFILES.get(kind).param_names(f"{quantity}_", n_hi):
            if name.endswith("_exponent"):
                space[name] = FloatDistribution(*POWER_RANGE, log=True)
            else:
                space[name] = FloatDistribution(0.0, 1.0)
    return space


def suggest(trial: optuna.Trial, study: Study) -> dict[str, Any]:
    """Declare the search space on an optuna ``Trial`` and return the suggested parameters."""
    from optuna.distributions import IntDistribution

    out: dict[str, Any] = {}
    for name, dist in search_space(study).items():
        if isinstance(dist, IntDistribution):
            out[name] = trial.suggest_int(name, dist.low, dist.high)
        else:
            out[name] = trial.suggest_float(name, dist.low, dist.high, log=dist.log)
    return out


def centre_params(study: Study) -> dict[str, Any]:
    """Parameter point in the middle of every range (a deterministic starting candidate)."""
    from optuna.distributions import IntDistribution

    out: dict[str, Any] = {}
    for name, dist in search_space(study).items():
        if isinstance(dist, IntDistribution):
            out[name] = (dist.low + dist.high) // 2
        elif dist.log:
            out[name] = float(np.sqrt(dist.low * dist.high))
        else:
            out[name] = 0.5 * (dist.low + dist.high)
    return out


# ---------------------------------------------------------------------------------------------
# parameters -> layout


def quantise(values: np.ndarray, step: float, lo: float, hi: float) -> np.ndarray:
    """Round to the nearest multiple of ``step`` that lies in [lo, hi] (m).

    If no multiple lies in the range the values are only clipped to it.
    """
    values = np.clip(np.asarray(values, dtype=float), lo, hi)
    if not step or step <= 0:
        return values
    q_lo = np.ceil(lo / step - 1e-9) * step
    q_hi = np.floor(hi / step + 1e-9) * step
    if q_lo > q_hi + 1e-15:
        return values
    out = np.clip(np.round(values / step) * step, q_lo, q_hi)
    # k * step carries binary noise (110 * 0.05e-3 = 5.5000000000000005e-3): snap to the
    # nearest double of the decimal value at picometre resolution, so tables read 5.5 mm
    return np.round(out, 12)


def quantise_positions(spacing: np.ndarray, step: float, s_lo: float, s_hi: float,
                       max_length: float | None) -> np.ndarray:
    """Positions x (m) of the cells ``spacing`` rounded to multiples of ``step`` (the
    workshop's position step), the rounding taken on the positions (no accumulated error) with
    every cell length kept in [s_lo, s_hi] rounded inwards to the step where the range holds a
    multiple, and the row (x[-1] plus the last cell) kept within ``max_length``. Values are
    snapped to picometres so that the table reads them without binary noise. ``step`` 0: the
    positions are the plain cumulative sum."""
    n = spacing.size
    x_exact = np.concatenate([[0.0], np.cumsum(spacing[:-1])])
    if not step or step <= 0 or n < 2:
        return x_exact
    k_lo = int(math.ceil(s_lo / step - 1e-9))
    k_hi = int(math.floor(s_hi / step + 1e-9))
    if k_lo > k_hi or k_lo < 1:
        return x_exact
    k_max = None
    if max_length is not None and np.isfinite(max_length):
        k_max = int(math.floor(max_length / step + 1e-9))
    target = np.rint(x_exact / step).astype(np.int64)
    ks = np.empty(n, dtype=np.int64)
    ks[0] = 0
    for j in range(1, n):
        ks[j] = min(max(target[j], ks[j - 1] + k_lo), ks[j - 1] + k_hi)
    if k_max is not None:
        # too long by a few steps after rounding: take them off the longest cells (the far end
        # first among equals), never below the shortest cell; the last cell repeats the one
        # before it, so the row is sum(cells) + cells[-1] steps long
        cells = np.diff(ks)
        while cells.sum() + cells[-1] > k_max:
            j = cells.size - 1 - int(np.argmax(cells[::-1]))
            if cells[j] <= k_lo:
                break
            cells[j] -= 1
        ks = np.concatenate([[0], np.cumsum(cells)])
    return np.round(ks * step, 12)


def _fit_length(spacing: np.ndarray, s_lo: float, max_length: float | None) -> np.ndarray:
    """Pull cell spacings towards ``s_lo`` (shape kept) until the row fits ``max_length``."""
    n = spacing.size
    cells = spacing.copy()
    if n >= 2:
        cells[-1] = cells[-2]
    if max_length is None or not np.isfinite(max_length):
        return cells
    length = cells.sum()
    if length <= max_length:
        return cells
    base = n * s_lo
    excess = length - base
    g = 0.0 if excess <= 0 else max(0.0, (max_length - base) / excess)
    return s_lo + (cells - s_lo) * g * (1 - 1e-12)


def layout_arrays(study: Study, params: dict[str, Any]) -> dict[str, np.ndarray]:
    """Per-resonator arrays (SI) of the layout described by ``params``.

    Returns
    -------
    dict with ``x``, ``height``, ``diameter``, ``head_mass``, ``height_tol``, ``spacing`` (m, kg).
    """
    plan = parse_profile(study.layout.profile)
    n_lo, n_hi = count_range(study)
    n = int(params.get(COUNT_PARAM, n_hi if n_hi == n_lo else (n_lo + n_hi) // 2))
    n = int(np.clip(n, n_lo, max(n_hi, n_lo)))
    s = np.linspace(0.0, 1.0, n)
    d = float(study.resonator.diameter)

    # head mass
    m_lo, m_hi = (float(v) for v in study.resonator.head_mass)
    if "head_mass_start" in params or "head_mass_c0" in params or "head_mass_f00" in params:
        u = shape_values(plan.head_mass, params, "head_mass", s, is_monotone=False)
        head_mass = quantise(m_lo + u * (m_hi - m_lo), study.resonator.head_mass_step, m_lo,
                             m_hi)
    else:
        head_mass = np.full(n, m_lo)

    # spacing
    s_lo, s_hi = spacing_range(study)
    if "spacing_start" in params or "spacing_c0" in params or "spacing_f00" in params:
        u = shape_values(plan.spacing, params, "spacing", s, is_monotone=False)
        spacing = s_lo + u * (s_hi - s_lo)
    else:
        spacing = np.full(n, s_lo)
    spacing = _fit_length(spacing, s_lo, study.layout.max_length)

    # height: monotone, capped by slenderness and buckling with the heaviest head of the row
    h_lo, h_hi = (float(v) for v in study.layout.height)
    cap = float(np.min(fabrication.max_height(study, np.array([head_mass.max()]))))
    h_top = max(min(h_hi, cap), h_lo)
    u = shape_values(plan.height, params, "height", s, is_monotone=True)
    if study.layout.entry == "short":
        u = u[::-1]
    height = quantise(h_lo + u * (h_top - h_lo), study.layout.height_step, h_lo, h_top)

    # positions rounded to the workshop's step; the cells follow from them (the layout scored
    # is the one the table states)
    x = quantise_positions(spacing, study.layout.position_step, s_lo, s_hi,
                           study.layout.max_length)
    cells = np.diff(x)
    spacing = np.append(cells, cells[-1])
    return {
        "x": x,
        "height": height,
        "diameter": np.full(n, d),
        "head_mass": head_mass,
        "height_tol": np.full(n, float(study.fabrication.height_tolerance)),
        "spacing": spacing,
    }


def layout_from_params(study: Study, params: dict[str, Any]) -> Layout:
    """Build the :class:`optgrade.layout.Layout` described by a parameter dict (its positions
    as rounded, not re-summed from the cells, so the table states them without binary
    noise)."""
    from optgrade.layout import Layout

    a = layout_arrays(study, params)
    return Layout(x=a["x"], height=a["height"], diameter=a["diameter"],
                  head_mass=a["head_mass"], height_tol=a["height_tol"])
