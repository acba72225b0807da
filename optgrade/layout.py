"""A graded row of resonators as plain arrays (SI), and its machining table (CSV, mm).

The layout is the hand-over between the study/search stages and the propagation stage
(DEVELOPERS.md, contract ``optgrade.layout.Layout``). Positions ``x`` are measured along the row
from the resonator on the wave-entry side (``x[0] == 0``) and increase away from it. Each
resonator owns the cell that starts at its position and ends at the next resonator; the last
resonator's cell repeats the previous cell length.

The table written by :func:`write_table` is the same one the machining export hands to the
workshop: a block of ``#`` comment lines (study name, units, datum, material, date) and then the
columns ``index, x_mm, height_mm, diameter_mm, head_mass_kg, height_tol_mm``. Numbers are written
with the fewest digits that read back to the identical double, so a written table reads back
bit for bit.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import os
from dataclasses import dataclass, field
from decimal import Decimal, InvalidOperation, localcontext
from pathlib import Path

import numpy as np

from optgrade._atomic import write_text

__all__ = [
    "COLUMNS",
    "DATUM",
    "Layout",
    "TableError",
    "layout_from_cells",
    "with_height_errors",
    "read_header",
    "read_table",
    "write_table",
]

#: Column names of the machining table, in order.
COLUMNS: tuple[str, ...] = (
    "index",
    "x_mm",
    "height_mm",
    "diameter_mm",
    "head_mass_kg",
    "height_tol_mm",
)

#: Datum line written into every table header.
DATUM = "x = 0 at the resonator on the wave-entry side, measured along the row"

# scale from the SI value to the table value, per column (index has none)
_SCALE = {
    "x_mm": Decimal(1000),
    "height_mm": Decimal(1000),
    "diameter_mm": Decimal(1000),
    "head_mass_kg": Decimal(1),
    "height_tol_mm": Decimal(1000),
}


class TableError(ValueError):
    """A resonator table that cannot be read.

    ``messages`` holds one line per defect, each of the form
    ``path: line N: column NAME: reason`` (or ``path: reason`` for whole-file problems).
    """

    def __init__(self, messages: list[str]):
        self.messages = list(messages)
        super().__init__("\n".join(self.messages))


def _as_row(name: str, value, n: int | None) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0 and n is not None:
        arr = np.full(n, float(arr))
    if arr.ndim != 1:
        raise ValueError(f"layout.{name}: expected a 1-D array or a scalar, got shape {arr.shape}")
    return arr


@dataclass(frozen=True)
class Layout:
    """An ordered row of resonators, SI units.

    Attributes
    ----------
    x : ndarray, shape (n,)
        Position of each resonator along the row (m); ``x[0] == 0`` at the wave-entry side,
        strictly increasing.
    height : ndarray, shape (n,)
        Rod height above the surface (m), > 0.
    diameter : ndarray, shape (n,)
        Rod diameter (m), > 0. A scalar is broadcast to every resonator.
    head_mass : ndarray, shape (n,)
        Mass on the free end of each rod (kg), >= 0. A scalar is broadcast.
    height_tol : ndarray, shape (n,)
        Machining tolerance on the height (m, +/-), >= 0. A scalar is broadcast.

    Derived: ``spacing`` (cell length of each resonator, m: distance to the next one, the last
    repeats the previous), ``n_resonators``, ``length`` (sum of the cell lengths, m: the path a
    wave crossing the whole row travels, ``x[-1] + spacing[-1]``).

    Arrays are stored as read-only float arrays. At least two resonators are needed so that
    every cell has a length.
    """

    x: np.ndarray
    height: np.ndarray
    diameter: np.ndarray
    head_mass: np.ndarray = field(default_factory=lambda: np.array(0.0))
    height_tol: np.ndarray = field(default_factory=lambda: np.array(0.0))

    def __post_init__(self) -> None:
        x = _as_row("x", self.x, None)
        n = x.size
        values = {"x": x}
        for name in ("height", "diameter", "head_mass", "height_tol"):
            values[name] = _as_row(name, getattr(self, name), n)
            if values[name].size != n:
                raise ValueError(
                    f"layout.{name}: has {values[name].size} entries but x has {n}"
                )
        if n < 2:
            raise ValueError(f"layout.x: at least 2 resonators are needed, got {n}")
        for name, arr in values.items():
            bad = ~np.isfinite(arr)
            if bad.any():
                i = int(np.argmax(bad))
                raise ValueError(f"layout.{name}[{i}]: not a finite number ({arr[i]})")
        if x[0] != 0.0:
            raise ValueError(
                f"layout.x[0]: must be 0 (the resonator on the wave-entry side), got {x[0]!r} m"
            )
        steps = np.diff(x)
        if (steps <= 0).any():
            i = int(np.argmax(steps <= 0)) + 1
            raise ValueError(
                f"layout.x[{i}]: positions must increase strictly along the row "
                f"({x[i - 1]!r} m then {x[i]!r} m)"
            )
        for name, is_strict in (
            ("height", True),
            ("diameter", True),
            ("head_mass", False),
            ("height_tol", False),
        ):
            arr = values[name]
            bad = arr <= 0 if is_strict else arr < 0
            if bad.any():
                i = int(np.argmax(bad))
                need = "> 0" if is_strict else ">= 0"
                raise ValueError(f"layout.{name}[{i}]: must be {need}, got {arr[i]!r}")
        for name, arr in values.items():
            arr = np.array(arr, dtype=float, copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def n_resonators(self) -> int:
        """Number of resonators in the row."""
        return int(self.x.size)

    @property
    def spacing(self) -> np.ndarray:
        """Cell length of each resonator (m): to the next one; the last repeats the previous."""
        steps = np.diff(self.x)
        return np.append(steps, steps[-1])

    @property
    def length(self) -> float:
        """Total path across the row (m): sum of the cell lengths, ``x[-1] + spacing[-1]``."""
        steps = np.diff(self.x)
        return float(self.x[-1] + steps[-1])

    @property
    def cell_centre(self) -> np.ndarray:
        """Middle of each resonator's cell (m), ``x + spacing / 2``."""
        return self.x + 0.5 * self.spacing

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Layout):
            return NotImplemented
        return all(
            np.array_equal(getattr(self, k), getattr(other, k))
            for k in ("x", "height", "diameter", "head_mass", "height_tol")
        )

    __hash__ = None  # type: ignore[assignment]  # arrays inside: not hashable


def layout_from_cells(
    height,
    spacing,
    diameter,
    head_mass=0.0,
    height_tol=0.0,
) -> Layout:
    """Build a :class:`Layout` from per-cell heights and cell lengths.

    Parameters
    ----------
    height : array_like, shape (n,)
        Rod heights (m).
    spacing : array_like, shape (n,) or scalar
        Cell length of each resonator (m): resonator j sits at ``sum(spacing[:j])``. The last
        entry is not a distance to anything; per the Layout contract the last cell repeats the
        previous one, so ``spacing[-1]`` is not stored.
    diameter, head_mass, height_tol : array_like or scalar
        Rod diameter (m), head mass (kg), height tolerance (m); scalars are broadcast.

    Returns
    -------
    Layout
    """
    h = np.asarray(height, dtype=float)
    if h.ndim != 1:
        raise ValueError(f"layout.height: expected a 1-D array, got shape {h.shape}")
    a = np.asarray(spacing, dtype=float)
    if a.ndim == 0:
        a = np.full(h.size, float(a))
    if a.shape != h.shape:
        raise ValueError(f"layout.spacing: has {a.size} entries but height has {h.size}")
    if (a[:-1] <= 0).any() or not np.isfinite(a).all():
        raise ValueError("layout.spacing: cell lengths must be finite and > 0")
    x = np.concatenate(([0.0], np.cumsum(a[:-1])))
    return Layout(x=x, height=h, diameter=diameter, head_mass=head_mass, height_tol=height_tol)


# ----------------------------------------------------------------------------- table writing


def with_height_errors(layout: Layout, errors: np.ndarray) -> Layout:
    """Copy of ``layout`` with machining errors ``errors`` (m, one per resonator) added to the
    rod heights, kept above 1 nm so every rod still stands."""
    h = np.maximum(np.asarray(layout.height) + errors, 1e-9)
    return dataclasses.replace(layout, height=h)


def _shortest(value: float, scale: Decimal) -> str:
    """Shortest decimal text t with float(Decimal(t) / scale) == value exactly."""
    if value == 0.0:
        return "0"
    with localcontext() as ctx:
        ctx.prec = 80
        exact = Decimal(value) * scale  # exact: a double has a finite decimal expansion
        for n_digits in range(1, 25):
            text = format(exact, f".{n_digits}g")
            if float(Decimal(text) / scale) == value:
                break
        else:  # pragma: no cover - a few more digits than 17 always suffice
            text = str(exact)
    if "e" in text or "E" in text:  # plain notation reads better in a workshop
        text = format(Decimal(text), "f")
    return text


def write_table(
    layout: Layout,
    path: str | os.PathLike,
    *,
    study_name: str,
    material: str,
    date: str | _dt.date | None = None,
    extra_header: list[str] | str | None = None,
) -> Path:
    """Write the machining table of a layout (CSV, mm and kg), atomically.

    Parameters
    ----------
    layout : Layout
    path : path-like
        Output file; written to a temporary file in the same folder, then renamed.
    study_name : str
        Written into the header.
    material : str
        Resonator material, written into the header.
    date : str or date, optional
        Written into the header; today's UTC date if omitted.
    extra_header : str or list of str, optional
        Further header lines (e.g. a site-scale caution); each becomes a ``#`` line.

    Returns
    -------
    Path
        The written file.
    """
    path = Path(path)
    if date is None:
        date = _dt.datetime.now(_dt.timezone.utc).date()
    if isinstance(extra_header, str):
        extra_header = extra_header.splitlines()
    header = [
        "optgrade resonator table",
        f"study: {study_name}",
        "units: x_mm, height_mm, diameter_mm, height_tol_mm in millimetres; head_mass_kg in "
        "kilograms; height_tol_mm is +/-",
        f"datum: {DATUM}",
        f"material: {material}",
        f"date: {date}",
    ]
    header += [str(line) for line in (extra_header or [])]
    lines = ["# " + " ".join(h.splitlines()) if h else "#" for h in header]
    lines.append(",".join(COLUMNS))
    cols = {
        "x_mm": layout.x,
        "height_mm": layout.height,
        "diameter_mm": layout.diameter,
        "head_mass_kg": layout.head_mass,
        "height_tol_mm": layout.height_tol,
    }
    for i in range(layout.n_resonators):
        fields = [str(i)] + [_shortest(float(cols[c][i]), _SCALE[c]) for c in COLUMNS[1:]]
        lines.append(",".join(fields))
    write_text(path, "\n".join(lines) + "\n")
    return path


# ----------------------------------------------------------------------------- table reading


#: Largest table file read (docs/limits.md): a row is about 60 bytes and a study allows at most
#: 10,000 resonators (layout.count), so 8 MiB is far above any real table.
MAX_TABLE_BYTES = 8 << 20
#: Largest decimal exponent accepted in a table cell: the values are millimetres and kilograms
#: of machined parts (at most 1e6 in SI after scaling); '1e999999999' raised decimal.Overflow.
MAX_EXPONENT = 12


def _read_lines(path: Path) -> list[str]:
    from optgrade._bounded import BoundedReadError, read_regular_file

    try:
        raw = read_regular_file(path, MAX_TABLE_BYTES, "a resonator table")
    except BoundedReadError as exc:
        raise TableError([f"{path}: {exc}"]) from None
    except IsADirectoryError:
        raise TableError([f"{path}: is a directory, expected a resonator table"]) from None
    except FileNotFoundError:
        raise TableError([f"{path}: file not found"]) from None
    except OSError as exc:
        raise TableError([f"{path}: cannot read ({exc.strerror or exc})"]) from None
    if b"\x00" in raw:
        raise TableError([f"{path}: not a text table (binary content)"])
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise TableError([f"{path}: not UTF-8 text"]) from None
    return text.splitlines()


def _clip(text: str, n: int = 40) -> str:
    """A cell's text for a message: long cells shortened (a 100,000-digit number was echoed)."""
    return text if len(text) <= n else f"{text[:n]}... ({len(text)} characters)"


def read_header(path: str | os.PathLike) -> dict[str, str]:
    """The ``key: value`` lines of a table's ``#`` header block (e.g. ``study``, ``material``)."""
    out: dict[str, str] = {}
    for line in _read_lines(Path(path)):
        s = line.strip()
        if not s:
            continue
        if not s.startswith("#"):
            break
        body = s.lstrip("#").strip()
        if ":" in body:
            key, value = body.split(":", 1)
            out.setdefault(key.strip(), value.strip())
    return out


#: columns a table must have; the others default to 0 (no head mass, no tolerance stated)
REQUIRED_COLUMNS = ("x_mm", "height_mm", "diameter_mm")


def read_table(path: str | os.PathLike, notes: list[str] | None = None) -> Layout:
    """Read a machining table written by :func:`write_table` (or by hand) into a Layout.

    Comment lines (``#``) and blank lines are skipped; the first other line names the columns.
    ``x_mm``, ``height_mm`` and ``diameter_mm`` are required, ``head_mass_kg`` and
    ``height_tol_mm`` default to 0, in any order; ``index`` is optional and, where given, any
    increasing integers (a hand-made table may number from 1, or skip numbers); other columns
    are ignored with a note appended to ``notes`` (when given). Positions must start at 0 and
    increase.

    Raises
    ------
    TableError
        With one message per defect: ``path: line N: column NAME: reason``.
    """
    path = Path(path)
    lines = _read_lines(path)
    errors: list[str] = []
    header_line = None
    header: list[str] = []
    rows: list[tuple[int, list[str]]] = []
    for lineno, line in enumerate(lines, start=1):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        fields = [f.strip() for f in s.split(",")]
        if header_line is None:
            header_line = lineno
            header = fields
            missing = [c for c in REQUIRED_COLUMNS if c not in fields]
            dup = sorted({c for c in fields if fields.count(c) > 1 and c})
            if missing or dup:
                why = (f"missing column(s) {', '.join(missing)}" if missing
                       else f"column(s) named twice: {', '.join(dup)}")
                raise TableError([f"{path}: line {lineno}: column header: {why}; expected "
                                  f"'{', '.join(COLUMNS)}' (index, head_mass_kg and "
                                  f"height_tol_mm optional), got '{_clip(s, 120)}'"])
            extra = [c for c in fields if c not in COLUMNS]
            if extra and notes is not None:
                notes.append(f"{path}: line {lineno}: column(s) {', '.join(extra)} not used "
                             "(not part of the layout)")
            continue
        rows.append((lineno, fields))
    if header_line is None:
        raise TableError([f"{path}: no column header line (file is empty or all comments)"])
    if len(rows) < 2:
        raise TableError([f"{path}: at least 2 resonator rows are needed, found {len(rows)}"])
    where = {c: header.index(c) for c in COLUMNS if c in header}

    data = np.zeros((len(rows), len(COLUMNS) - 1))
    data[:, :len(REQUIRED_COLUMNS)] = np.nan
    last_index = None
    for r, (lineno, fields) in enumerate(rows):
        if len(fields) != len(header):
            errors.append(
                f"{path}: line {lineno}: expected {len(header)} columns (as the header), got "
                f"{len(fields)}"
            )
            continue
        if "index" in where:
            text = fields[where["index"]]
            try:
                number = int(text)
            except ValueError:
                errors.append(f"{path}: line {lineno}: column index: '{_clip(text)}' is not an "
                              "integer")
            else:
                if last_index is not None and number <= last_index:
                    errors.append(f"{path}: line {lineno}: column index: {number} after "
                                  f"{last_index}; the index must increase down the table")
                last_index = number
        for c, name in enumerate(COLUMNS[1:]):
            if name not in where:
                continue
            text = fields[where[name]]
            try:
                dec = Decimal(text)
            except InvalidOperation:
                errors.append(f"{path}: line {lineno}: column {name}: '{_clip(text)}' is not a "
                              "number")
                continue
            if not dec.is_finite():
                errors.append(f"{path}: line {lineno}: column {name}: '{_clip(text)}' is not "
                              "finite")
                continue
            if dec and dec.adjusted() > MAX_EXPONENT:
                errors.append(f"{path}: line {lineno} (resonator {r}): column {name}: "
                              f"'{_clip(text)}' is absurdly large (decimal exponent "
                              f"{dec.adjusted()}, at most {MAX_EXPONENT})")
                continue
            value = float(dec / _SCALE[name])  # tiny exponents round to 0 (not trapped)
            if abs(value) > 1e6 or not np.isfinite(value):
                errors.append(f"{path}: line {lineno} (resonator {r}): column {name}: "
                              f"'{_clip(text)}' is absurdly large")
                continue
            data[r, c] = value
            need_positive = name in ("height_mm", "diameter_mm")
            if need_positive and value <= 0:
                errors.append(f"{path}: line {lineno}: column {name}: must be > 0, got {text}")
            elif value < 0:
                errors.append(f"{path}: line {lineno}: column {name}: must be >= 0, got {text}")
    if not errors:
        x = data[:, 0]
        ix = where["x_mm"]
        if x[0] != 0.0:
            errors.append(
                f"{path}: line {rows[0][0]}: column x_mm: the first resonator must be at 0 "
                f"(datum: {DATUM}), got {rows[0][1][ix]}"
            )
        for r in np.flatnonzero(np.diff(x) <= 0) + 1:
            errors.append(
                f"{path}: line {rows[r][0]}: column x_mm: positions must increase along the row "
                f"({rows[r - 1][1][ix]} then {rows[r][1][ix]})"
            )
    if errors:
        raise TableError(errors)
    return Layout(
        x=data[:, 0],
        height=data[:, 1],
        diameter=data[:, 2],
        head_mass=data[:, 3],
        height_tol=data[:, 4],
    )
