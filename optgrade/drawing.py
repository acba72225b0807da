"""The workshop drawing of a layout (DXF via ezdxf, millimetres): plan, elevation, hole table,
title block.

What a machinist needs to make the row without the other files:

* **datum A**: the axis of resonator 0 (the wave-entry end), from which every position is
  measured along the row; **datum B**: the specimen surface, from which every height is
  measured;
* the **hole table**: index, position from datum A, height above datum B, head mass, height
  tolerance for every resonator, the values written exactly as in the machining table
  (`optgrade.layout.write_table`, shortest decimal text of the same double) so that the two
  can be checked against each other line by line;
* the **diameter** (one note for all rods), the **row pitch** across the row (dimensioned) and
  how many **rows across** (the prediction assumes the row repeated at the pitch over the whole
  width; the plan draws a few);
* overall dimensions: first to last resonator axis (the row length the report states), the
  first cell, the end heights;
* a **title block**: study, materials, diameter, height tolerance, units, scale, date, revision,
  trial, package version; at site scale the caution.

Texts are laid out on a grid of the drawing's text height so that none overlaps another
(tests/test_export.py checks every text's bounding box with ``ezdxf.bbox``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from optgrade._atomic import atomic_write

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout

__all__ = ["TitleBlock", "write_dxf"]

#: rows of the hole table per column block (long rows continue in the next block to the right)
TABLE_ROWS = 50
#: width of one character of the drawing's standard font, as a share of the text height (a
#: generous bound for digits and capitals of ezdxf's default font, so that columns never touch)
CHAR_W = 0.75


@dataclass(frozen=True)
class TitleBlock:
    """What the title block states (plain text; lengths already in their units)."""

    study: str
    trial: int | None
    rod_material: str
    substrate_material: str
    diameter_mm: str
    row_pitch_mm: str
    height_tolerance_mm: str
    date: str
    package: str
    revision: str = "A"
    caution: str | None = None


def _values(layout: Layout) -> dict[str, list[str]]:
    """The hole-table columns as the machining table writes them (same decimal text)."""
    from optgrade.layout import _SCALE, _shortest

    cols = {"x_mm": layout.x, "height_mm": layout.height, "head_mass_kg": layout.head_mass,
            "height_tol_mm": layout.height_tol}
    return {c: [_shortest(float(v), _SCALE[c]) for v in arr] for c, arr in cols.items()}


def write_dxf(layout: Layout, path: Path, *, row_pitch: float, title: TitleBlock,
              n_rows: int = 3) -> Path:
    """Plan, elevation, hole table and title block of ``layout`` (mm), written atomically.

    Layers: ``PLAN`` (footprint circles), ``ELEVATION`` (rods, surface line), ``HEAD_MASS``
    (schematic head-mass blocks, 2 d wide, d high: the drawing does not know their shape),
    ``DIMENSIONS``, ``DATUM``, ``TABLE`` (hole table), ``TITLE`` (title block), ``TEXT``.
    """
    import ezdxf

    mm = 1e3
    x = np.asarray(layout.x) * mm
    h = np.asarray(layout.height) * mm
    d = float(np.max(layout.diameter)) * mm
    m = np.asarray(layout.head_mass)
    pitch = row_pitch * mm
    span = float(x[-1] - x[0])
    doc = ezdxf.new("R2010", setup=True)
    doc.units = ezdxf.units.MM
    for name, colour in (("PLAN", 5), ("ELEVATION", 7), ("HEAD_MASS", 1), ("DIMENSIONS", 3),
                         ("DATUM", 6), ("TABLE", 7), ("TITLE", 7), ("TEXT", 2)):
        doc.layers.add(name, color=colour)
    msp = doc.modelspace()
    # one text height for the whole sheet: readable against the row (1/150 of its span) and
    # never smaller than the rod diameter
    th = max(d, span / 150.0, float(h.max()) / 40.0)
    dim_style = {"dimtxt": 0.8 * th, "dimasz": 0.5 * th, "dimexo": 0.2 * th,
                 "dimexe": 0.3 * th, "dimgap": 0.2 * th, "dimlfac": 1.0, "dimdec": 3,
                 "dimtad": 1, "dimjust": 0}

    def text(s: str, at: tuple[float, float], *, layer: str = "TEXT", height: float = th,
             align: str = "LEFT") -> None:
        msp.add_text(s, height=height, dxfattribs={"layer": layer}).set_placement(
            at, align=ezdxf.enums.TextEntityAlignment[align])

    def dim(base, p1, p2, angle=0.0) -> None:
        msp.add_linear_dim(base=base, p1=p1, p2=p2, angle=angle, dimstyle="EZDXF",
                           override=dim_style, dxfattribs={"layer": "DIMENSIONS"}).render()

    # --- plan: rows at y = 0, pitch, 2 pitch, ... (the wave runs along +x) ------------------
    for r in range(n_rows):
        for xi in x:
            msp.add_circle((xi, r * pitch), d / 2, dxfattribs={"layer": "PLAN"})
    plan_top = (n_rows - 1) * pitch + d
    text(f"PLAN: {n_rows} ROWS SHOWN. ROWS ACROSS: REPEAT AT PITCH {title.row_pitch_mm} MM "
         "OVER THE FULL WIDTH (THE PREDICTION ASSUMES AN UNBROKEN REPEAT)",
         (x[0], plan_top + 2.5 * th))
    text(f"ALL RODS DIA {title.diameter_mm} MM", (x[0], plan_top + 1.0 * th))
    if n_rows > 1:
        dim((x[0] - 4 * th, pitch / 2), (x[0], 0), (x[0], pitch), angle=90)
    # datum A: the axis of resonator 0
    msp.add_line((x[0], -d), (x[0], -2.2 * th), dxfattribs={"layer": "DATUM"})
    msp.add_lwpolyline([(x[0], -2.2 * th), (x[0] - 0.5 * th, -3.0 * th),
                        (x[0] + 0.5 * th, -3.0 * th)], close=True,
                       dxfattribs={"layer": "DATUM"})
    text("DATUM A: AXIS OF ROD 0, WAVE-ENTRY END; X MEASURED ALONG +X",
         (x[0] + th, -3.0 * th), layer="DATUM")
    dim((0, -5.5 * th), (x[0], 0), (x[1], 0))

    # --- elevation below the plan: surface line at y0 (datum B), rods upwards --------------
    y0 = -(h.max() + 12 * th)
    length = span + float(x[-1] - x[-2])
    msp.add_line((x[0] - d, y0), (x[0] + length, y0), dxfattribs={"layer": "ELEVATION"})
    for xi, hi, mj in zip(x, h, m, strict=True):
        msp.add_lwpolyline([(xi - d / 2, y0), (xi + d / 2, y0), (xi + d / 2, y0 + hi),
                            (xi - d / 2, y0 + hi)], close=True,
                           dxfattribs={"layer": "ELEVATION"})
        if mj > 0:
            msp.add_lwpolyline([(xi - d, y0 + hi), (xi + d, y0 + hi), (xi + d, y0 + hi + d),
                                (xi - d, y0 + hi + d)], close=True,
                               dxfattribs={"layer": "HEAD_MASS"})
    # rod indices under the rods, as many as fit side by side (at least the two ends)
    label_w = CHAR_W * 0.7 * th * (len(str(x.size - 1)) + 1)
    every = max(1, int(np.ceil(label_w / max(float(np.min(np.diff(x))), 1e-9))))
    shown = sorted(set(range(0, x.size, every)) - {x.size - 1}
                   - {j for j in range(x.size) if 0 < x[-1] - x[j] < label_w})
    for j in [*shown, x.size - 1]:
        text(f"{j}", (x[j], y0 - 1.8 * th), height=0.7 * th, align="CENTER")
    for j in (0, x.size - 1):
        off = -4 * th if j == 0 else 4 * th
        dim((x[j] + off, y0), (x[j], y0), (x[j], y0 + h[j]), angle=90)
    dim((0, y0 - 4.5 * th), (x[0], y0), (x[-1], y0))
    text("DATUM B: SPECIMEN SURFACE; HEIGHTS MEASURED UP FROM IT", (x[0], y0 - 7.5 * th),
         layer="DATUM")
    text("ELEVATION (ROD INDEX UNDER THE RODS; ALL POSITIONS AND HEIGHTS IN THE HOLE TABLE)",
         (x[0], y0 - 9.0 * th))

    # --- hole table, right of the drawing -------------------------------------------------
    vals = _values(layout)
    has_heads = bool(np.any(m > 0))
    cols = [("NO.", [str(j) for j in range(x.size)]), ("X MM", vals["x_mm"]),
            ("H MM", vals["height_mm"]), ("TOL +/- MM", vals["height_tol_mm"])]
    if has_heads:
        cols.insert(3, ("HEAD KG", vals["head_mass_kg"]))
    widths = [CHAR_W * th * (max(len(c[0]), *(len(v) for v in c[1])) + 2) for c in cols]
    block_w = sum(widths) + 2 * th
    row_h = 1.6 * th
    x_tab = x[0] + length + 8 * th
    y_tab = plan_top
    n_blocks = int(np.ceil(x.size / TABLE_ROWS))
    text("HOLE TABLE (FROM DATUM A ALONG THE ROW, HEIGHTS FROM DATUM B)",
         (x_tab, y_tab + 1.0 * th), layer="TABLE")
    for b in range(n_blocks):
        rows = range(b * TABLE_ROWS, min((b + 1) * TABLE_ROWS, x.size))
        x_b = x_tab + b * block_w
        cx = x_b
        for (head, values), w in zip(cols, widths, strict=True):
            text(head, (cx, y_tab - row_h), layer="TABLE")
            for k, j in enumerate(rows):
                text(values[j], (cx, y_tab - (k + 2) * row_h), layer="TABLE")
            cx += w
        bottom = y_tab - (len(rows) + 2) * row_h + 0.5 * th
        msp.add_lwpolyline([(x_b - 0.5 * th, y_tab), (cx, y_tab), (cx, bottom),
                            (x_b - 0.5 * th, bottom)], close=True,
                           dxfattribs={"layer": "TABLE"})
        msp.add_line((x_b - 0.5 * th, y_tab - 1.4 * row_h), (cx, y_tab - 1.4 * row_h),
                     dxfattribs={"layer": "TABLE"})
    table_bottom = y_tab - (min(x.size, TABLE_ROWS) + 2) * row_h

    # --- title block, under the hole table -----------------------------------------------
    lines = [
        ("STUDY", title.study),
        ("TRIAL", "-" if title.trial is None else str(title.trial)),
        ("ROD MATERIAL", title.rod_material),
        ("SPECIMEN", title.substrate_material),
        ("ROD DIAMETER", f"{title.diameter_mm} MM"),
        ("ROW PITCH", f"{title.row_pitch_mm} MM"),
        ("HEIGHT TOLERANCE", f"+/- {title.height_tolerance_mm} MM"),
        ("UNITS", "MILLIMETRES, KILOGRAMS"),
        ("SCALE", "1:1 IN MODEL SPACE (PLOT TO FIT)"),
        ("DATE", title.date),
        ("REVISION", title.revision),
        ("MADE WITH", title.package),
    ]
    key_w = CHAR_W * th * (max(len(k) for k, _ in lines) + 2)
    val_w = CHAR_W * th * (max(len(v) for _, v in lines) + 2)
    y_t = min(table_bottom, y0 + h.max()) - 3 * th
    for k, (key, value) in enumerate(lines):
        yy = y_t - (k + 1) * row_h
        text(key, (x_tab, yy), layer="TITLE")
        text(value, (x_tab + key_w, yy), layer="TITLE")
    t_bottom = y_t - (len(lines) + 1) * row_h + 0.5 * th
    msp.add_lwpolyline([(x_tab - 0.5 * th, y_t), (x_tab + key_w + val_w, y_t),
                        (x_tab + key_w + val_w, t_bottom), (x_tab - 0.5 * th, t_bottom)],
                       close=True, dxfattribs={"layer": "TITLE"})
    msp.add_line((x_tab + key_w - 0.5 * th, y_t), (x_tab + key_w - 0.5 * th, t_bottom),
                 dxfattribs={"layer": "TITLE"})
    if title.caution:
        for k, chunk in enumerate(_wrap(title.caution, 90)):
            text(chunk, (x_tab, t_bottom - (k + 1.5) * row_h), layer="TITLE")
    return atomic_write(Path(path), lambda p: doc.saveas(p))


def _wrap(s: str, width: int) -> list[str]:
    import textwrap

    return textwrap.wrap(s, width) or [""]
