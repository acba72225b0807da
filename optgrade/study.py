"""Study files: TOML with units in, a validated :class:`Study` in SI out.

``load_study(path) -> Study`` reads a TOML file, validates every section with pydantic v2
(dimensional values are strings with units, parsed by :mod:`optgrade.units`), resolves library
materials and derived wave speeds, runs the cross-field checks, and returns frozen SI models.
Any defect raises :class:`optgrade.errors.StudyError` whose messages read
``path: field.path: reason (line N)``. Every key is documented in ``docs/study-reference.md``.

The resolved object follows the ``optgrade.study.Study`` contract in DEVELOPERS.md.
"""

from __future__ import annotations

import difflib
import hashlib
import importlib
import math
import re
import sys
import unicodedata
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field, ValidationError

from optgrade.channels import GOAL_CHANNELS
from optgrade.errors import StudyError
from optgrade.units import UnitError, format_quantity, parse_quantity
from optgrade.units import format_eng as _eng

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "SITE_CAUTION",
    "CHANNELS",
    "LIMITS",
    "FabricationSpec",
    "FarFaceSpec",
    "GoalSpec",
    "LayoutSpec",
    "Meta",
    "ResonatorSpec",
    "SearchSpec",
    "Study",
    "SubstrateSpec",
    "block_wavelengths",
    "load_study",
    "study_from_dict",
    "study_from_text",
]

#: Caution carried by every site-scale output (docs/physics.md section 8); one wording everywhere.
SITE_CAUTION = (
    "CAUTION (site scale): simplified model (thin axial rods on a homogeneous, linear "
    "elastic half-space); soil layering and the coupling of the posts to the ground are not "
    "represented. Treat the result as a starting point only: any design must be verified by a "
    "qualified engineer and follow local codes."
)

#: Wanted-channel names accepted by ``[goal] channel`` (the one list in optgrade.channels).
CHANNELS = GOAL_CHANNELS

# Names of plug-ins are read from their registries at validation time (late registrations
# count); the registries are imported then, never when this module is imported.
_GOALS = "optgrade.objectives.GOALS"
_PROFILES = "optgrade.profiles.PROFILES"
_SAMPLERS = "optgrade.search.SAMPLERS"
#: Extra names beside the registered ones: the weighted sum as a search objective, and the
#: search's own choice of sampler.
WEIGHTED = "weighted"
AUTO_SAMPLER = "auto"

#: Plausible ranges (SI) outside which a value is refused as absurd: name -> (low, high).
LIMITS: dict[str, tuple[float, float]] = {
    "density": (1.0, 30_000.0),
    "modulus": (1e3, 2e12),
    "speed": (1.0, 20_000.0),
    "frequency": (0.1, 100e6),
    "diameter": (1e-6, 10.0),
    "row_pitch": (1e-6, 100.0),
    "height": (1e-6, 100.0),
    "height_step": (1e-7, 10.0),
    "position_step": (1e-7, 10.0),
    "head_mass_step": (1e-9, 1e4),
    "spacing": (1e-6, 100.0),
    "max_length": (1e-6, 10_000.0),
    "min_gap": (1e-7, 10.0),
    "height_tolerance": (0.0, 1.0),
    "head_mass": (0.0, 1e5),
    "angle": (-90.0, 90.0),
    "thickness": (1e-5, 1000.0),
    "zone_position": (-10_000.0, 10_000.0),
}
#: Kinds whose values may be negative (angles from the normal, positions in the row's frame).
_SIGNED = ("angle", "zone_position")
_UNIT_OF = {  # display unit of each limit in messages
    "density": ("density", "kg/m^3"),
    "modulus": ("modulus", "Pa"),
    "speed": ("speed", "m/s"),
    "frequency": ("frequency", "Hz"),
    "head_mass": ("mass", "kg"),
    "head_mass_step": ("mass", "kg"),
    "angle": ("angle", "deg"),
}

#: Reader bounds (docs/limits.md): a study file is a few kilobytes; 1 MiB is far above any.
MAX_STUDY_BYTES = 1 << 20
MAX_TOML_NESTING = 16
MAX_NUMBER_DIGITS = 40

#: Site scale is inferred below this band top (Hz) or for a soil substrate.
SITE_BAND_TOP = 1000.0
#: Band-reach rule: refuse a band entirely below LOW x the lowest, or entirely above HIGH x the
#: highest, first rod resonance over the height and head-mass ranges.
REACH_LOW, REACH_HIGH = 0.2, 2.0


# --------------------------------------------------------------------------- value parsers


def _fmt_limit(value: float, kind: str) -> str:
    dimension, unit = _UNIT_OF.get(kind, ("length", "m"))
    return format_quantity(value, dimension, unit, digits=3)


def _quantity(dimension: str, kind: str, *, allow_zero: bool = False) -> Callable[[Any], float]:
    """A pydantic before-validator parsing one quantity and checking its plausible range."""
    low, high = LIMITS[kind]

    def parse(value: Any) -> float:
        try:
            number = parse_quantity(value, dimension)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
        if kind not in _SIGNED:
            if number < 0 or (number == 0 and not allow_zero):
                raise ValueError(
                    f"{value!r} must be {'zero or ' if allow_zero else ''}positive"
                )
        if not (low <= number <= high) and not (allow_zero and number == 0):
            raise ValueError(
                f"{value!r} is outside the plausible range {_fmt_limit(low, kind)} .. "
                f"{_fmt_limit(high, kind)}"
            )
        return number

    return parse


def _range(dimension: str, kind: str, *, allow_zero: bool = False) -> Callable[[Any], tuple]:
    """A before-validator for ``["min", "max"]`` (or one value, meaning min = max)."""
    one = _quantity(dimension, kind, allow_zero=allow_zero)

    def parse(value: Any) -> tuple[float, float]:
        if isinstance(value, (list, tuple)):
            if len(value) != 2:
                raise ValueError(f"expected a range [min, max] of two values, got {len(value)}")
            parts = []
            for label, item in zip(("min", "max"), value, strict=True):
                try:
                    parts.append(one(item))
                except ValueError as exc:
                    raise ValueError(f"{label}: {exc}") from None
            low, high = parts
        else:
            low = high = one(value)
        if low > high:
            raise ValueError(f"min {value[0]!r} is above max {value[1]!r}")
        return (low, high)

    return parse


def _count_range(low_bound: int, high_bound: int) -> Callable[[Any], tuple]:
    def one(item: Any) -> int:
        if isinstance(item, bool) or not isinstance(item, int):
            raise ValueError(f"expected a whole number, got {item!r}")
        if not (low_bound <= item <= high_bound):
            raise ValueError(f"{item} is outside the allowed range {low_bound} .. {high_bound}")
        return item

    def parse(value: Any) -> tuple[int, int]:
        if isinstance(value, (list, tuple)):
            if len(value) != 2:
                raise ValueError(f"expected a range [min, max] of two values, got {len(value)}")
            low, high = (one(v) for v in value)
        else:
            low = high = one(value)
        if low > high:
            raise ValueError(f"min {low} is above max {high}")
        return (low, high)

    return parse


def _choice(options: tuple[str, ...]) -> Callable[[Any], str]:
    def parse(value: Any) -> str:
        if not isinstance(value, str):
            raise ValueError(f"expected one of {', '.join(options)} as a string, got {value!r}")
        if value not in options:
            close = difflib.get_close_matches(value, options, n=1, cutoff=0.5)
            hint = f"; did you mean {close[0]!r}?" if close else ""
            raise ValueError(f"{value!r} is not one of {', '.join(options)}{hint}")
        return value

    return parse


def _registry_names(registry_path: str) -> tuple[str, ...]:
    """Names registered now in the registry at ``module.ATTR`` (imported on first use)."""
    module, _, attr = registry_path.rpartition(".")
    return tuple(getattr(importlib.import_module(module), attr).names())


def _registry_choice(registry_path: str, *extra: str) -> Callable[[Any], str]:
    """Validator against a plug-in registry read at validation time (late registrations count);
    ``extra`` names are accepted beside the registered ones."""

    def parse(value: Any) -> str:
        return _choice((*extra, *_registry_names(registry_path)))(value)

    return parse


def _material_name(value: Any) -> str:
    from optgrade.materials import library, suggest_material

    if not isinstance(value, str):
        raise ValueError(f"expected a library material name as a string, got {value!r}")
    if value not in library():
        hint = suggest_material(value)
        extra = f"; did you mean {hint!r}?" if hint else ""
        raise ValueError(
            f"unknown material {value!r}{extra} (library: {', '.join(sorted(library()))})"
        )
    return value


def _objective_list(value: Any) -> list[str]:
    options = (WEIGHTED, *_registry_names(_GOALS))
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        raise ValueError("expected a non-empty list of objective names")
    pick = _choice(options)
    out = []
    for i, item in enumerate(value):
        try:
            out.append(pick(item))
        except ValueError as exc:
            raise ValueError(f"entry {i}: {exc}") from None
    if len(set(out)) != len(out):
        raise ValueError("objective names repeat")
    return out


def _Q(dimension: str, kind: str, **kw):  # noqa: N802 - reads like a type
    return Annotated[float, BeforeValidator(_quantity(dimension, kind, **kw))]


def _R(dimension: str, kind: str, **kw):  # noqa: N802
    return Annotated[tuple[float, float], BeforeValidator(_range(dimension, kind, **kw))]


def _C(options: tuple[str, ...]):  # noqa: N802
    return Annotated[str, BeforeValidator(_choice(options))]


def _fraction_value(value: Any) -> float:
    """A fraction in [0, 1] written as a number; a percentage ("60 %", 60) is refused with the
    fraction it probably means."""
    if isinstance(value, bool):
        raise ValueError("expected a fraction between 0 and 1 (a number), got a boolean")
    if isinstance(value, str):
        text = value.strip().rstrip("%").strip()
        try:
            number = float(text)
        except ValueError:
            raise ValueError(f"expected a fraction between 0 and 1 as a number (e.g. 0.6), "
                             f"got {value[:40]!r}") from None
        if value.strip().endswith("%"):
            raise ValueError(f"{value[:40]!r} is a percentage; write the fraction as a number "
                             f"between 0 and 1: {number / 100:g} for {number:g} %")
        raise ValueError(f"write the fraction as a number, not a string: {number:g}")
    if isinstance(value, (int, float)) and 1.0 < float(value) <= 100.0:
        raise ValueError(f"{value} is above 1: a fraction is between 0 and 1; if you meant "
                         f"{float(value):g} %, write {float(value) / 100:g}")
    return value


Fraction = Annotated[float, BeforeValidator(_fraction_value), Field(ge=0.0, le=1.0)]
LossFactor = Fraction  # a loss factor is a fraction as well ("4 %" gets the same message)
Poisson = Annotated[float, Field(gt=-1.0, lt=0.5)]


# --------------------------------------------------------------------------- raw input models


class _Raw(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)


def _plain_name(value: str) -> str:
    """A study name is printed on terminals (rich markup is escaped where it is printed), written
    into table headers and used as the storage key: control characters (NUL, escape, line
    breaks) are refused (docs/limits.md)."""
    for i, ch in enumerate(value):
        if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp"):
            raise ValueError(
                f"contains the control character U+{ord(ch):04X} at position {i + 1}; a name is "
                "printed, written into tables and used as the storage key: use letters, digits, "
                "spaces and punctuation")
    return value


class _StudyIn(_Raw):
    name: Annotated[str, Field(min_length=1, max_length=200), AfterValidator(_plain_name)]
    seed: Annotated[int, Field(ge=0, le=2**32 - 1)] = 0
    description: str = ""
    scale: _C(("bench", "site")) | None = None


class _SubstrateIn(_Raw):
    material: Annotated[str, BeforeValidator(_material_name)] | None = None
    density: _Q("density", "density") | None = None
    cl: _Q("speed", "speed") | None = None
    ct: _Q("speed", "speed") | None = None
    youngs_modulus: _Q("modulus", "modulus") | None = None
    poisson: Poisson | None = None
    loss_factor: LossFactor = 0.0
    # reserved key: any value is taken here so that _resolve_substrate can refuse it by name
    plate_thickness: Any = None
    #: block thickness (m): the far face is free; absent = half-space (docs/physics.md s. 14)
    thickness: _Q("length", "thickness") | None = None
    kind: Annotated[str, BeforeValidator(_registry_choice("optgrade.ground.GROUNDS"))] = (
        "halfspace"
    )


class _ResonatorIn(_Raw):
    material: Annotated[str, BeforeValidator(_material_name)] | None = None
    youngs_modulus: _Q("modulus", "modulus") | None = None
    density: _Q("density", "density") | None = None
    poisson: Poisson | None = None
    loss_factor: LossFactor = 0.0
    diameter: _Q("length", "diameter")
    row_pitch: _Q("length", "row_pitch")
    head_mass: _R("mass", "head_mass", allow_zero=True) = (0.0, 0.0)
    head_mass_step: _Q("mass", "head_mass_step") | None = None
    kind: Annotated[str, BeforeValidator(_registry_choice("optgrade.resonators.RESONATORS"))] = (
        "axial_rod"
    )


class _LayoutIn(_Raw):
    count: Annotated[tuple[int, int], BeforeValidator(_count_range(1, 10_000))]
    height: _R("length", "height")
    height_step: _Q("length", "height_step")
    position_step: _Q("length", "position_step") | None = None
    spacing: _R("length", "spacing")
    profile: Annotated[str, BeforeValidator(_registry_choice(_PROFILES))] = "spline"
    max_length: _Q("length", "max_length") | None = None
    entry: _C(("tall", "short")) = "short"


#: ``[goal.weights]``: goal name -> weight; the names are checked against the goal registry
#: in :func:`_goal_weights` (so the message names the key and its line).
Weight = Annotated[float, Field(ge=0.0, le=1e6)]


class _FarFaceIn(_Raw):
    x_range: _R("length", "zone_position")
    mode: _C(("avoid", "target"))


class _GoalIn(_Raw):
    band: _R("frequency", "frequency")
    n_frequencies: Annotated[int, Field(ge=2, le=100_000)] = 128
    channel: _C(CHANNELS)
    required_fraction: Fraction = 0.8
    angle_window: _R("angle", "angle") | None = None
    weights: dict[str, Weight] | None = None
    far_face: _FarFaceIn | None = None
    model: _C(("lattice", "line")) = "lattice"
    propagation: Annotated[
        str, BeforeValidator(_registry_choice("optgrade.propagation.PROPAGATION_MODELS"))
    ] = "scattering"


class _FabricationIn(_Raw):
    min_gap: _Q("length", "min_gap")
    height_tolerance: _Q("length", "height_tolerance", allow_zero=True) = 0.0
    slenderness_max: Annotated[float, Field(gt=1.0, le=1000.0)] = 40.0


class _SearchIn(_Raw):
    trials: Annotated[int, Field(ge=1, le=10_000_000)] = 500
    workers: Annotated[int, Field(ge=1, le=1024)] = 1
    sampler: Annotated[str, BeforeValidator(_registry_choice(_SAMPLERS, AUTO_SAMPLER))] = "auto"
    storage: Annotated[str, Field(min_length=1)] | None = None
    objectives: Annotated[list[str], BeforeValidator(_objective_list)] = ["weighted"]
    batch_size: Annotated[int, Field(ge=1, le=100_000)] | None = None
    keep_best: Annotated[int, Field(ge=0, le=1000)] = 5


class _FileIn(_Raw):
    study: _StudyIn
    substrate: _SubstrateIn
    resonator: _ResonatorIn
    layout: _LayoutIn
    goal: _GoalIn
    fabrication: _FabricationIn
    search: _SearchIn = _SearchIn()


_SECTION_MODELS: dict[tuple[str, ...], type[BaseModel]] = {
    (): _FileIn,
    ("study",): _StudyIn,
    ("substrate",): _SubstrateIn,
    ("resonator",): _ResonatorIn,
    ("layout",): _LayoutIn,
    ("goal",): _GoalIn,
    ("goal", "far_face"): _FarFaceIn,
    ("fabrication",): _FabricationIn,
    ("search",): _SearchIn,
}


# --------------------------------------------------------------------------- resolved models


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class Meta(_Frozen):
    """``[study]``: name, random seed, description, scale ("bench" | "site")."""

    name: str
    seed: int
    description: str
    scale: Literal["bench", "site"]


class SubstrateSpec(_Frozen):
    """Elastic half-space (SI): density kg/m^3, modulus Pa, speeds m/s, loss factor (-)."""

    material: str | None
    density: float
    youngs_modulus: float
    poisson: float
    cl: float
    ct: float
    cr: float
    loss_factor: float
    kind: str = "halfspace"
    #: block thickness (m; None = half-space): the far face z = thickness is free
    thickness: float | None = None

    @property
    def shear_modulus(self) -> float:
        """mu = rho cT^2 (Pa)."""
        return self.density * self.ct**2


class ResonatorSpec(_Frozen):
    """Rods/posts (SI): modulus Pa, density kg/m^3, diameter and row pitch m, head mass kg."""

    material: str | None
    youngs_modulus: float
    density: float
    poisson: float
    loss_factor: float
    diameter: float
    row_pitch: float
    head_mass: tuple[float, float]
    kind: str = "axial_rod"
    #: head masses are rounded to this step (kg; 0: not rounded)
    head_mass_step: float = 0.0

    @property
    def bar_speed(self) -> float:
        """Thin-rod speed sqrt(E / rho) (m/s)."""
        return math.sqrt(self.youngs_modulus / self.density)

    @property
    def has_head_mass(self) -> bool:
        """Does the head-mass range allow a non-zero mass?"""
        return self.head_mass[1] > 0.0


class LayoutSpec(_Frozen):
    """Layout limits (SI): count range, height range and step, spacing range, length (m)."""

    count: tuple[int, int]
    height: tuple[float, float]
    height_step: float
    spacing: tuple[float, float]
    profile: str
    max_length: float
    entry: Literal["tall", "short"]
    #: resonator positions are rounded to this step (m; 0: not rounded)
    position_step: float = 0.0


class FarFaceSpec(_Frozen):
    """``[goal.far_face]``: a zone of the far face (x range in the row's frame, m) where the
    converted waves should arrive (``"target"``) or not (``"avoid"``)."""

    x_range: tuple[float, float]
    mode: Literal["avoid", "target"]


class GoalSpec(_Frozen):
    """Goal: band (Hz), frequency count, wanted channel, required fraction, weights."""

    band: tuple[float, float]
    n_frequencies: int
    channel: str
    required_fraction: float
    angle_window_deg: tuple[float, float] | None
    weights: dict[str, float]
    model: Literal["lattice", "line"]
    propagation: str = "scattering"
    far_face: FarFaceSpec | None = None


class FabricationSpec(_Frozen):
    """Fabrication limits (SI): minimum clear gap m, height tolerance m, slenderness (-)."""

    min_gap: float
    height_tolerance: float
    slenderness_max: float


class SearchSpec(_Frozen):
    """Search settings: trial count, worker processes, sampler, storage URL, objectives."""

    trials: int
    workers: int
    sampler: str
    storage: str | None
    objectives: list[str]
    batch_size: int
    #: the best N distinct layouts written as tables beside the export (candidates/)
    keep_best: int = 5


class Study(_Frozen):
    """A validated study in SI (the ``optgrade.study.Study`` contract of DEVELOPERS.md).

    ``source_path`` and ``source_sha256`` identify the file it came from (None when built from a
    dict).
    """

    meta: Meta
    substrate: SubstrateSpec
    resonator: ResonatorSpec
    layout: LayoutSpec
    goal: GoalSpec
    fabrication: FabricationSpec
    search: SearchSpec
    source_path: str | None = None
    source_sha256: str | None = None

    def to_si_dict(self) -> dict[str, Any]:
        """The whole study as plain JSON-ready data (SI; tuples become lists)."""
        return self.model_dump(mode="json")


# --------------------------------------------------------------------------- line lookup

_HEADER = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$")


def _find_line(text: str | None, loc: tuple[Any, ...]) -> int | None:
    """1-based line of a field path in the TOML source (best effort; None when not found)."""
    if not text:
        return None
    parts = [p for p in loc if isinstance(p, str)]
    if not parts:
        return None
    lines = text.splitlines()
    tables: dict[str, int] = {}
    keys: dict[tuple[str, str], int] = {}
    current = ""
    for number, line in enumerate(lines, start=1):
        header = _HEADER.match(line)
        if header:
            current = header.group(1).replace(" ", "").replace('"', "")
            tables.setdefault(current, number)
            continue
        match = re.match(r"^\s*([A-Za-z0-9_\-\"']+)\s*=", line)
        if match:
            keys.setdefault((current, match.group(1).strip("\"'")), number)
    # deepest match first: [a.b] key c, then key b in [a], then table [a]
    for cut in range(len(parts), 0, -1):
        table, key = ".".join(parts[: cut - 1]), parts[cut - 1]
        if (table, key) in keys:
            return keys[(table, key)]
        if ".".join(parts[:cut]) in tables:
            return tables[".".join(parts[:cut])]
    return None


# --------------------------------------------------------------------------- validation


class _Collector:
    def __init__(self, source: str, text: str | None):
        self.source, self.text, self.messages = source, text, []

    def add(self, loc: tuple[Any, ...], reason: str) -> None:
        path = ".".join(str(p) for p in loc) or "(file)"
        line = _find_line(self.text, loc)
        suffix = f" (line {line})" if line else ""
        self.messages.append(f"{self.source}: {path}: {reason}{suffix}")

    def raise_if_any(self) -> None:
        if self.messages:
            raise StudyError(self.messages)


def _pydantic_messages(exc: ValidationError, out: _Collector) -> None:
    for err in exc.errors(include_url=False):
        loc = tuple(err["loc"])
        kind = err["type"]
        msg = err["msg"]
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        if kind == "extra_forbidden":
            model = _SECTION_MODELS.get(tuple(str(p) for p in loc[:-1]))
            valid = list(model.model_fields) if model else []
            close = difflib.get_close_matches(str(loc[-1]), valid, n=1, cutoff=0.4)
            what = "section" if len(loc) == 1 else "key"
            hint = f"; did you mean {close[0]!r}?" if close else f"; valid: {', '.join(valid)}"
            msg = f"unknown {what} {loc[-1]!r}{hint}"
        elif kind == "missing":
            msg = "missing section" if len(loc) == 1 else "missing required key"
        elif kind in ("model_type", "dict_type") and len(loc) == 1:
            msg = "expected a table (a [section] header)"
        elif kind == "finite_number":
            msg = f"{err.get('input')!r} is not a finite number"
        out.add(loc, msg)


def _resolve_substrate(raw: _SubstrateIn, out: _Collector) -> dict[str, Any] | None:
    from optgrade.ground import rayleigh_speed
    from optgrade.materials import bulk_speeds, elastic_from_speeds, get_material

    section = ("substrate",)
    if raw.plate_thickness is not None:
        out.add(
            (*section, "plate_thickness"),
            "plate substrates are not supported yet; omit plate_thickness for a half-space",
        )
        return None
    base = get_material(raw.material) if raw.material else None
    density = raw.density if raw.density is not None else (base.density if base else None)
    has_speeds = raw.cl is not None or raw.ct is not None
    has_moduli = raw.youngs_modulus is not None or raw.poisson is not None
    if has_speeds and has_moduli:
        key = "youngs_modulus" if raw.youngs_modulus is not None else "poisson"
        out.add((*section, key), "give either wave speeds (cl, ct) or youngs_modulus and "
                "poisson, not both")
        return None
    if density is None:
        out.add((*section, "density"), "missing: give a library material or an explicit density")
        return None
    if has_speeds:
        if raw.cl is None or raw.ct is None:
            missing = "cl" if raw.cl is None else "ct"
            out.add((*section, missing), "give both cl and ct (or neither)")
            return None
        if raw.ct >= raw.cl:
            out.add((*section, "ct"), f"shear speed ct ({_eng(raw.ct, 'm/s')}) must be below cl "
                    f"({_eng(raw.cl, 'm/s')})")
            return None
        modulus, poisson = (float(v) for v in elastic_from_speeds(raw.cl, raw.ct, density))
        if not (-1.0 < poisson < 0.5):
            out.add((*section, "ct"), f"cl and ct give Poisson ratio {poisson:.3f}, outside "
                    "(-1, 0.5): ct must be below cl * sqrt(3) / 2")
            return None
        cl, ct = raw.cl, raw.ct
    else:
        modulus = raw.youngs_modulus if raw.youngs_modulus is not None else (
            base.youngs_modulus if base else None)
        poisson = raw.poisson if raw.poisson is not None else (base.poisson if base else None)
        if modulus is None or poisson is None:
            key = "youngs_modulus" if modulus is None else "poisson"
            out.add((*section, key), "missing: give a library material, or cl and ct, or "
                    "youngs_modulus and poisson")
            return None
        cl, ct = (float(v) for v in bulk_speeds(modulus, density, poisson))
    for key, value in (("cl", cl), ("ct", ct)):
        low, high = LIMITS["speed"]
        if not (low <= value <= high):
            out.add((*section, key), f"derived {key} = {value:.4g} m/s is outside the plausible "
                    f"range {_eng(low, 'm/s')} .. {_eng(high, 'm/s')}")
            return None
    try:
        cr = float(rayleigh_speed(cl, ct))
    except Exception as exc:  # pragma: no cover - guarded by the Poisson check above
        out.add(section, f"no Rayleigh root for cl={cl:g}, ct={ct:g} ({exc})")
        return None
    return {
        "material": raw.material,
        "density": float(density),
        "youngs_modulus": float(modulus),
        "poisson": float(poisson),
        "cl": float(cl),
        "ct": float(ct),
        "cr": cr,
        "loss_factor": raw.loss_factor,
        "thickness": raw.thickness,
    }


def _resolve_resonator(raw: _ResonatorIn, out: _Collector) -> dict[str, Any] | None:
    from optgrade.materials import get_material

    section = ("resonator",)
    base = get_material(raw.material) if raw.material else None
    modulus = raw.youngs_modulus if raw.youngs_modulus is not None else (
        base.youngs_modulus if base else None)
    density = raw.density if raw.density is not None else (base.density if base else None)
    poisson = raw.poisson if raw.poisson is not None else (base.poisson if base else 0.3)
    ok = True
    for key, value in (("youngs_modulus", modulus), ("density", density)):
        if value is None:
            out.add((*section, key), "missing: give a library material or an explicit value")
            ok = False
    if not ok:
        return None
    if raw.row_pitch <= raw.diameter:
        out.add((*section, "row_pitch"), f"row pitch ({_eng(raw.row_pitch, 'm')}) must exceed "
                f"the diameter ({_eng(raw.diameter, 'm')}): neighbouring rods across the row "
                "would overlap")
        return None
    return {
        "material": raw.material,
        "youngs_modulus": float(modulus),
        "density": float(density),
        "poisson": float(poisson),
        "loss_factor": raw.loss_factor,
        "diameter": raw.diameter,
        "row_pitch": raw.row_pitch,
        "head_mass": raw.head_mass,
        "head_mass_step": _head_mass_step(raw, section, out),
    }


def _head_mass_step(raw: _ResonatorIn, section: tuple, out: _Collector) -> float:
    """The step head masses are rounded to (kg): as written, else a power of ten near 1/1000 of
    the largest head mass (1 kg for a 2.4 t head, 1 mg for 5 g), 0 without head masses."""
    m_lo, m_hi = raw.head_mass
    if raw.head_mass_step is not None:
        if m_hi > m_lo and raw.head_mass_step > m_hi - m_lo:
            out.add((*section, "head_mass_step"), f"{_eng(raw.head_mass_step, 'kg')} is larger "
                    f"than the head-mass range ({_eng(m_hi - m_lo, 'kg')}): only one mass would "
                    "be possible")
        return float(raw.head_mass_step)
    if m_hi <= 0.0:
        return 0.0
    return float(10.0 ** math.floor(math.log10(1e-3 * m_hi)))


def first_resonance_range(resonator: ResonatorSpec, height: tuple[float, float]):
    """Lowest and highest first axial resonance (Hz) over the height and head-mass ranges.

    The first resonance falls with height and with head mass (Blevins 1979, axial bar with tip
    mass), so the extremes are (tallest, heaviest) and (shortest, lightest). Computed with
    :func:`optgrade.resonators._rod.rod_resonances`.
    """
    from optgrade.resonators import rod_resonances

    args = (resonator.diameter, resonator.youngs_modulus, resonator.density)
    f_low = float(rod_resonances(height[1], *args, head_mass=resonator.head_mass[1])[0])
    f_high = float(rod_resonances(height[0], *args, head_mass=resonator.head_mass[0])[0])
    return f_low, f_high


def _cross_checks(raw: _FileIn, substrate: dict, resonator: dict, out: _Collector) -> dict:
    """Checks that involve several fields; returns resolved layout/fabrication extras."""
    lay, fab, goal = raw.layout, raw.fabrication, raw.goal
    d = resonator["diameter"]
    h_min, h_max = lay.height
    s_min, s_max = lay.spacing
    n_min, n_max = lay.count
    if lay.height_step > h_max:
        out.add(("layout", "height_step"), f"machining step ({_eng(lay.height_step, 'm')}) is "
                f"larger than the tallest height ({_eng(h_max, 'm')})")
    elif h_max > h_min and lay.height_step > h_max - h_min:
        out.add(("layout", "height_step"), f"machining step ({_eng(lay.height_step, 'm')}) is "
                f"larger than the height range ({_eng(h_max - h_min, 'm')}): only one height "
                "would be possible")
    shortest = (n_min - 1) * s_min
    max_length = lay.max_length if lay.max_length is not None else max((n_max - 1) * s_max, s_max)
    if lay.max_length is not None and max_length < shortest:
        out.add(("layout", "max_length"), f"{_eng(max_length, 'm')} is shorter than the shortest "
                f"possible row ((count min - 1) x spacing min = {_eng(shortest, 'm')})")
    if fab.min_gap >= s_max - d:
        out.add(("fabrication", "min_gap"), f"minimum clear gap ({_eng(fab.min_gap, 'm')}) must be "
                f"below spacing max - diameter ({_eng(s_max - d, 'm')}), otherwise no spacing is "
                "machinable")
    if resonator["row_pitch"] - d < fab.min_gap:
        out.add(("resonator", "row_pitch"), f"clear gap across the row "
                f"({_eng(resonator['row_pitch'] - d, 'm')}) is below fabrication.min_gap "
                f"({_eng(fab.min_gap, 'm')})")
    if h_min / d > fab.slenderness_max:
        out.add(("fabrication", "slenderness_max"), f"even the shortest rod has slenderness "
                f"height/diameter = {h_min / d:.3g}, above the limit {fab.slenderness_max:g}")
    if fab.height_tolerance >= h_max:
        out.add(("fabrication", "height_tolerance"), "height tolerance "
                f"({_eng(fab.height_tolerance, 'm')}) is not small against the heights (max "
                f"{_eng(h_max, 'm')})")
    if goal.band[0] >= goal.band[1]:
        out.add(("goal", "band"), "band min must be below band max")
    if goal.angle_window is not None and goal.angle_window[0] >= goal.angle_window[1]:
        out.add(("goal", "angle_window"), "angle window min must be below max")
    weights = _goal_weights(goal.weights or {}, out)
    if not weights:
        weights = {"channel": 1.0}
    elif not any(v > 0 for v in weights.values()):
        out.add(("goal", "weights"), "at least one weight must be positive")
    position_step = lay.position_step if lay.position_step is not None else lay.height_step
    if position_step > s_min:
        key = "position_step" if lay.position_step is not None else "height_step"
        out.add(("layout", key), f"position step ({_eng(position_step, 'm')}"
                f"{'' if lay.position_step is not None else ', the default: the height step'}) is "
                f"larger than the smallest spacing ({_eng(s_min, 'm')}); set layout.position_step")
    return {"max_length": float(max_length), "weights": weights,
            "position_step": float(position_step)}


def _goal_weights(raw: Mapping[str, float], out: _Collector) -> dict[str, float]:
    """``[goal.weights]`` checked against the goal registry, in a canonical order (the built-in
    goals in ``objectives.BUILTIN`` order, then the others as written), so that the weighted
    sum does not depend on the order of the keys in the file."""
    from optgrade.objectives import BUILTIN

    known = _registry_names(_GOALS)
    for key in raw:
        if key not in known:
            close = difflib.get_close_matches(key, known, n=1, cutoff=0.4)
            hint = f"; did you mean {close[0]!r}?" if close else f"; valid: {', '.join(known)}"
            out.add(("goal", "weights", key), f"unknown goal {key!r}{hint}")
    rank = {name: i for i, name in enumerate(BUILTIN)}
    order = sorted((k for k in raw if k in known), key=lambda k: rank.get(k, len(rank)))
    return {k: float(raw[k]) for k in order}


def _check_band_reach(study: Study, out: _Collector) -> None:
    """Refuse a band the resonators cannot reach (rule documented in docs/study-reference.md)."""
    try:
        f_low, f_high = first_resonance_range(study.resonator, study.layout.height)
    except Exception as exc:
        out.add(("layout", "height"), f"cannot compute the first rod resonance ({exc})")
        return
    band_lo, band_hi = study.goal.band
    if band_hi < REACH_LOW * f_low:
        out.add(("goal", "band"), (
            f"band {band_lo:.4g}..{band_hi:.4g} Hz lies entirely below {REACH_LOW:g} x the "
            f"lowest first rod resonance ({f_low:.4g} Hz at the tallest height and heaviest head "
            "mass): the rods move as rigid masses there; use taller rods, heavier head masses "
            "or a higher band"))
    elif band_lo > REACH_HIGH * f_high:
        out.add(("goal", "band"), (
            f"band {band_lo:.4g}..{band_hi:.4g} Hz lies entirely above {REACH_HIGH:g} x the "
            f"highest first rod resonance ({f_high:.4g} Hz at the shortest height and lightest "
            "head mass); use shorter rods or a lower band"))


def study_from_dict(data: Mapping[str, Any], *, source: str = "<study>",
                    text: str | None = None, sha256: str | None = None) -> Study:
    """Validate a parsed study (the TOML as a dict) and resolve it into SI.

    Parameters
    ----------
    data
        The study as nested dicts, exactly as read from TOML (values with units as strings).
    source
        Name used at the start of every message (the file path).
    text
        The TOML source, used to find line numbers for messages (optional).
    sha256
        Hash of the source file, stored on the Study.

    Raises
    ------
    StudyError
        With every defect found (``source: field.path: reason (line N)``).
    """
    out = _Collector(source, text)
    if not isinstance(data, Mapping):
        out.add((), "expected a TOML document with sections")
        out.raise_if_any()
    try:
        raw = _FileIn.model_validate(dict(data))
    except ValidationError as exc:
        _pydantic_messages(exc, out)
        out.raise_if_any()
    substrate = _resolve_substrate(raw.substrate, out)
    resonator = _resolve_resonator(raw.resonator, out)
    if substrate is None or resonator is None:
        out.raise_if_any()
    extra = _cross_checks(raw, substrate, resonator, out)
    out.raise_if_any()
    band = raw.goal.band
    scale = raw.study.scale
    if scale is None:
        from optgrade.materials import library

        is_soil = raw.substrate.material is not None and library()[raw.substrate.material].is_soil
        scale = "site" if (is_soil or band[1] < SITE_BAND_TOP) else "bench"
    search = raw.search
    study = Study(
        meta=Meta(name=raw.study.name, seed=raw.study.seed, description=raw.study.description,
                  scale=scale),
        substrate=SubstrateSpec(**substrate, kind=raw.substrate.kind),
        resonator=ResonatorSpec(**resonator, kind=raw.resonator.kind),
        layout=LayoutSpec(count=raw.layout.count, height=raw.layout.height,
                          height_step=raw.layout.height_step, spacing=raw.layout.spacing,
                          profile=raw.layout.profile, max_length=extra["max_length"],
                          entry=raw.layout.entry, position_step=extra["position_step"]),
        goal=GoalSpec(band=band, n_frequencies=raw.goal.n_frequencies, channel=raw.goal.channel,
                      required_fraction=raw.goal.required_fraction,
                      angle_window_deg=raw.goal.angle_window, weights=extra["weights"],
                      model=raw.goal.model, propagation=raw.goal.propagation,
                      far_face=(None if raw.goal.far_face is None else FarFaceSpec(
                          x_range=raw.goal.far_face.x_range, mode=raw.goal.far_face.mode))),
        fabrication=FabricationSpec(min_gap=raw.fabrication.min_gap,
                                    height_tolerance=raw.fabrication.height_tolerance,
                                    slenderness_max=raw.fabrication.slenderness_max),
        search=SearchSpec(trials=search.trials, workers=search.workers, sampler=search.sampler,
                          storage=search.storage, objectives=list(search.objectives),
                          batch_size=search.batch_size or 4 * search.workers,
                          keep_best=search.keep_best),
        source_path=None if source == "<study>" else source,
        source_sha256=sha256,
    )
    _check_band_reach(study, out)
    _check_block(study, out)
    out.raise_if_any()
    return study


#: A block thinner than this many Rayleigh wavelengths at the lowest band frequency is refused
#: (thin-plate regime, not modelled); below BLOCK_WARN_WAVELENGTHS it is warned about.
BLOCK_MIN_WAVELENGTHS, BLOCK_WARN_WAVELENGTHS = 2.0, 4.0
#: A block thicker than this many Rayleigh wavelengths at the band top is refused: for the row it
#: is a half-space, and the far-face map's work grows with the thickness in wavelengths.
BLOCK_MAX_WAVELENGTHS = 100.0
#: A far-face zone must lie within H tan(ZONE_MAX_ANGLE_DEG) of the longest row: beyond, only
#: grazing waves arrive (and the map's work grows with the distance).
ZONE_MAX_ANGLE_DEG = 85.0


def block_wavelengths(study: Study) -> float | None:
    """Block thickness in Rayleigh wavelengths at the lowest band frequency (None: half-space)."""
    h = study.substrate.thickness
    if h is None:
        return None
    return float(h) * float(study.goal.band[0]) / float(study.substrate.cr)


def _check_block(study: Study, out: _Collector) -> None:
    """Rules of a finite block and of the far-face goal (docs/study-reference.md)."""
    h = study.substrate.thickness
    zone = study.goal.far_face
    uses_goal = ("far_face" in study.goal.weights or "far_face" in study.search.objectives)
    if h is None:
        if zone is not None:
            out.add(("goal", "far_face"), "a far-face zone needs substrate.thickness (the "
                    "block's far face); without it the substrate is a half-space")
        elif uses_goal:
            out.add(("goal", "weights", "far_face"), "the far_face goal needs "
                    "substrate.thickness and a [goal.far_face] zone")
        return
    if study.meta.scale == "site":
        out.add(("substrate", "thickness"), "a finite thickness is for bench blocks with a free "
                "far face; the bottom of a soil layer is not free (bedrock, stiffer strata): "
                "omit thickness for site studies")
        return
    n_lam = block_wavelengths(study)
    lam = float(study.substrate.cr) / float(study.goal.band[0])
    if n_lam is not None and n_lam < BLOCK_MIN_WAVELENGTHS:
        out.add(("substrate", "thickness"), (
            f"{_eng(h, 'm')} is {n_lam:.2f} Rayleigh wavelengths at the lowest band frequency "
            f"({_eng(lam, 'm')} at {_eng(study.goal.band[0], 'Hz')}); below "
            f"{BLOCK_MIN_WAVELENGTHS:g} the block is a plate whose waves are not those of a "
            f"half-space (not modelled): use at least {_eng(BLOCK_MIN_WAVELENGTHS * lam, 'm')} "
            "or raise the band"))
    lam_top = float(study.substrate.cr) / float(study.goal.band[1])
    if h > BLOCK_MAX_WAVELENGTHS * lam_top:
        out.add(("substrate", "thickness"), (
            f"{_eng(h, 'm')} is {h / lam_top:.0f} Rayleigh wavelengths at the band top (above "
            f"{BLOCK_MAX_WAVELENGTHS:g}): for the row such a block is a half-space and the "
            "far-face map would take very long; omit thickness"))
    if zone is not None and zone.x_range[0] >= zone.x_range[1]:
        out.add(("goal", "far_face", "x_range"), "zone min must be below max")
    elif zone is not None:
        reach = h * math.tan(math.radians(ZONE_MAX_ANGLE_DEG))
        lo, hi = -reach, float(study.layout.max_length) + reach
        if zone.x_range[0] < lo or zone.x_range[1] > hi:
            out.add(("goal", "far_face", "x_range"), (
                f"the zone must lie within {_eng(lo, 'm')} .. {_eng(hi, 'm')} (the longest row "
                f"widened by thickness x tan {ZONE_MAX_ANGLE_DEG:g} deg): beyond it only grazing "
                "waves arrive"))
    if uses_goal and zone is None:
        out.add(("goal", "far_face"), "the far_face goal needs a [goal.far_face] zone "
                "(x_range and mode)")


def study_from_text(text: str, *, source: str = "<study>") -> Study:
    """Parse TOML text and validate it (see :func:`study_from_dict`)."""
    out = _Collector(source, text)
    if not text.strip():
        out.add((), "the file is empty; a study needs the sections [study], [substrate], "
                "[resonator], [layout], [goal], [fabrication]")
        out.raise_if_any()
    bound = _scan_toml(text)
    if bound is not None:
        raise StudyError([f"{source}: (toml): {bound}"])
    try:
        data = tomllib.loads(text)
    except (RecursionError, ValueError) as exc:
        if isinstance(exc, tomllib.TOMLDecodeError):
            raise _syntax_error(exc, source) from None
        # not expected after _scan_toml; kept so that no input can end in a traceback
        raise StudyError([f"{source}: (toml): cannot be read ({type(exc).__name__}: "
                          f"{str(exc)[:120]})"]) from None
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return study_from_dict(data, source=source, text=text, sha256=digest)


def _syntax_error(exc: Exception, source: str) -> StudyError:
    reason = str(exc)
    line = re.search(r"line (\d+)", reason)
    reason = re.sub(r"\s*\(at line \d+, column \d+\)", "", reason)
    reason = re.sub(r"\s*\(at end of document\)", " (at end of file)", reason)
    suffix = f" (line {line.group(1)})" if line else ""
    return StudyError([f"{source}: (toml): syntax error: {reason}{suffix}"])


def _skip_string(text: str, i: int) -> int:
    """Index just after the TOML string that starts at ``text[i]`` (a quote)."""
    q = text[i]
    if text.startswith(q * 3, i):
        j = i + 3
        while True:
            k = text.find(q * 3, j)
            if k < 0:
                return len(text)
            if q == '"':
                n_back = len(text[j:k]) - len(text[j:k].rstrip("\\"))
                if n_back % 2:  # an escaped quote: keep looking after it
                    j = k + 1
                    continue
            k += 3
            for _ in range(2):  # up to two quotes of the content may touch the closing three
                if k < len(text) and text[k] == q:
                    k += 1
            return k
    j = i + 1
    while j < len(text) and text[j] not in (q, "\n"):
        j += 2 if (q == '"' and text[j] == "\\") else 1
    return j + 1


def _scan_toml(text: str) -> str | None:
    """Bounds checked before the TOML parser runs (docs/limits.md): nesting of arrays and
    inline tables at most `MAX_TOML_NESTING` deep (deeper input made the parser recurse until
    RecursionError), numbers at most `MAX_NUMBER_DIGITS` digits (a 100,000-digit integer
    stopped the parser with Python's integer-string limit; a float that long was read). Returns
    the reason with the line, or None."""
    depth, i, n, line, run = 0, 0, len(text), 1, 0
    while i < n:
        c = text[i]
        if c == "\n":
            line, run = line + 1, 0
        elif c == "#":
            k = text.find("\n", i)
            i = n if k < 0 else k
            continue
        elif c in "\"'":
            k = _skip_string(text, i)
            line += text.count("\n", i, k)
            i, run = k, 0
            continue
        elif c.isdigit():
            run += 1
            if run > MAX_NUMBER_DIGITS:
                return (f"a number with more than {MAX_NUMBER_DIGITS} digits (line {line}); a "
                        "value needs at most 17 significant digits (a double)")
        elif c != "_":
            run = 0
            if c in "[{":
                depth += 1
                if depth > MAX_TOML_NESTING:
                    return (f"arrays or inline tables nested more than {MAX_TOML_NESTING} deep "
                            f"(line {line}); a study needs at most 3 levels")
            elif c in "]}":
                depth = max(0, depth - 1)
        i += 1
    return None


def load_study(path: str | Path) -> Study:
    """Read, validate and resolve a study file.

    Parameters
    ----------
    path
        A TOML study file (see docs/study-reference.md).

    Returns
    -------
    Study
        Frozen, SI-valued study (DEVELOPERS.md contract).

    Raises
    ------
    StudyError
        Missing or unreadable file, empty file, binary or non-UTF-8 content, TOML syntax error,
        and every validation defect; messages ``path: field.path: reason (line N)``.
    """
    source = str(path)
    p = Path(path)
    from optgrade._bounded import BoundedReadError, read_regular_file

    try:
        blob = read_regular_file(p, MAX_STUDY_BYTES, "a study file")
    except BoundedReadError as exc:
        raise StudyError([f"{source}: (file): {exc}"]) from None
    except FileNotFoundError:
        raise StudyError([f"{source}: (file): no such file"]) from None
    except IsADirectoryError:
        raise StudyError([f"{source}: (file): is a directory, expected a study file"]) from None
    except OSError as exc:
        raise StudyError([f"{source}: (file): cannot read ({exc.strerror or exc})"]) from None
    if b"\x00" in blob:
        raise StudyError([f"{source}: (file): binary content (NUL bytes); expected a TOML text "
                          "file"])
    try:
        text = blob.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise StudyError([f"{source}: (file): not UTF-8 text (bad byte at offset {exc.start}); "
                          "expected a TOML text file"]) from None
    return study_from_text(text, source=source)
