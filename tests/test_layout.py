"""Layout arrays and the machining table (optgrade.layout).

The round trip is checked bit for bit: the table is the hand-over to the workshop and to the
search/export stages, so a layout read back must be the same layout. Number reading relies on
Python's correctly rounded decimal-to-double conversion (IEEE 754-2008, clause 5.12; the
`decimal` module documentation), which is what makes shortest round-trip text possible.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from optgrade.layout import (
    COLUMNS,
    DATUM,
    Layout,
    TableError,
    layout_from_cells,
    read_header,
    read_table,
    write_table,
)


def _example() -> Layout:
    return layout_from_cells(
        height=[10e-3, 12e-3, 14e-3, 16e-3],
        spacing=[4e-3, 5e-3, 6e-3, 99.0],
        diameter=2e-3,
        head_mass=[0.0, 1e-3, 2e-3, 3e-3],
        height_tol=0.02e-3,
    )


def test_derived_quantities():
    lay = _example()
    np.testing.assert_allclose(lay.x, [0.0, 4e-3, 9e-3, 15e-3], rtol=0, atol=1e-15)
    # the last cell repeats the previous one (DEVELOPERS.md contract), spacing[-1] input ignored
    np.testing.assert_allclose(lay.spacing, [4e-3, 5e-3, 6e-3, 6e-3], rtol=1e-12)
    assert lay.n_resonators == 4
    assert lay.length == pytest.approx(21e-3, rel=1e-12)
    assert lay.length == pytest.approx(lay.spacing.sum(), rel=1e-12)
    np.testing.assert_allclose(lay.diameter, 2e-3)
    assert not lay.x.flags.writeable


@pytest.mark.parametrize(
    ("kwargs", "fragment"),
    [
        ({"x": [0.0, 1.0, 1.0], "height": [1, 1, 1]}, "layout.x[2]: positions must increase"),
        ({"x": [0.5, 1.0], "height": [1, 1]}, "layout.x[0]: must be 0"),
        ({"x": [0.0, 1.0], "height": [1, -1]}, "layout.height[1]: must be > 0"),
        ({"x": [0.0, 1.0], "height": [1, 1, 1]}, "layout.height: has 3 entries"),
        ({"x": [0.0, 1.0], "height": [1, np.nan]}, "layout.height[1]: not a finite"),
        ({"x": [0.0], "height": [1]}, "at least 2 resonators"),
        ({"x": [0.0, 1.0], "height": [1, 1], "head_mass": -1.0}, "layout.head_mass[0]"),
        ({"x": [0.0, 1.0], "height": [1, 1], "diameter": 0.0}, "layout.diameter[0]: must be > 0"),
    ],
)
def test_validation_names_the_field(kwargs, fragment):
    kwargs.setdefault("diameter", 1e-3)
    with pytest.raises(ValueError, match=fragment.replace("[", r"\[").replace("]", r"\]")):
        Layout(**kwargs)


def test_table_has_header_block_and_columns(tmp_path):
    path = write_table(
        _example(),
        tmp_path / "sub" / "table.csv",
        study_name="invented bench study",
        material="aluminium 6061-T6",
        date="2026-01-02",
        extra_header="CAUTION: line one\nline two",
    )
    lines = path.read_text().splitlines()
    header = [ln for ln in lines if ln.startswith("#")]
    assert any("study: invented bench study" in ln for ln in header)
    assert any(DATUM in ln for ln in header)
    assert any("material: aluminium 6061-T6" in ln for ln in header)
    assert any("date: 2026-01-02" in ln for ln in header)
    assert any("millimetres" in ln for ln in header)
    assert lines[len(header)] == ",".join(COLUMNS)
    assert lines[len(header) + 1].startswith("0,0,10,2,0,0.02")
    meta = read_header(path)
    assert meta["study"] == "invented bench study"
    assert meta["material"] == "aluminium 6061-T6"
    assert not list(path.parent.glob("*.tmp"))  # atomic write leaves no temporary file


_pos = st.floats(1e-6, 1e3, allow_nan=False, allow_infinity=False)


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(2, 30),
    data=st.data(),
)
def test_round_trip_is_bit_exact(tmp_path_factory, n, data):
    spacing = data.draw(arrays(float, n, elements=_pos))
    height = data.draw(arrays(float, n, elements=_pos))
    head = data.draw(arrays(float, n, elements=st.floats(0, 1e3)))
    tol = data.draw(arrays(float, n, elements=st.floats(0, 1.0)))
    lay = layout_from_cells(height, spacing, diameter=data.draw(_pos), head_mass=head,
                            height_tol=tol)
    path = tmp_path_factory.mktemp("rt") / "t.csv"
    write_table(lay, path, study_name="s", material="m")
    back = read_table(path)
    assert back == lay  # every array bit for bit


def _table(tmp_path, body: str):
    p = tmp_path / "t.csv"
    p.write_text("# hand-made\n" + ",".join(COLUMNS) + "\n" + body)
    return p


@pytest.mark.parametrize(
    ("body", "fragment"),
    [
        ("0,0,10,2,0,0\n1,abc,10,2,0,0\n", "line 4: column x_mm: 'abc' is not a number"),
        ("0,0,10,2,0,0\n1,5,-1,2,0,0\n", "line 4: column height_mm: must be > 0"),
        ("0,0,10,2,0,0\n1,5,10,2,-0.1,0\n", "line 4: column head_mass_kg: must be >= 0"),
        ("0,0,10,2,0,0\n1,0,10,2,0,0\n", "line 4: column x_mm: positions must increase"),
        ("0,1,10,2,0,0\n1,5,10,2,0,0\n", "line 3: column x_mm: the first resonator must be at 0"),
        ("1,0,10,2,0,0\n1,5,10,2,0,0\n", "line 4: column index: 1 after 1"),
        ("0,0,10,2,0,0\nB,5,10,2,0,0\n", "line 4: column index: 'B' is not an integer"),
        ("0,0,10,2,0,0\n1,5,10,2,0\n", "line 4: expected 6 columns (as the header), got 5"),
        ("0,0,10,2,0,0\n1,5,nan,2,0,0\n", "line 4: column height_mm: 'nan' is not finite"),
        ("0,0,10,2,0,0\n", "at least 2 resonator rows"),
    ],
)
def test_bad_tables_name_line_and_column(tmp_path, body, fragment):
    with pytest.raises(TableError) as info:
        read_table(_table(tmp_path, body))
    assert any(fragment in m for m in info.value.messages), info.value.messages


def test_bad_files(tmp_path):
    with pytest.raises(TableError, match="file not found"):
        read_table(tmp_path / "missing.csv")
    junk = tmp_path / "junk.csv"
    junk.write_bytes(b"\x00\x01\x02binary")
    with pytest.raises(TableError, match="binary"):
        read_table(junk)
    wrong = tmp_path / "wrong.csv"
    wrong.write_text("index,x,height\n0,0,1\n")
    with pytest.raises(TableError, match="line 1: column header: missing column.s. x_mm"):
        read_table(wrong)
    empty = tmp_path / "empty.csv"
    empty.write_text("# only comments\n\n")
    with pytest.raises(TableError, match="no column header"):
        read_table(empty)


def test_hand_made_tables_any_increasing_index_or_none_and_extra_columns(tmp_path):
    """Issue 15 item 8: a hand-made table may number from 1 (or skip numbers, or give no
    index), order the columns differently, leave out head mass and tolerance, and carry
    columns of its own (a note says they are not used)."""
    ref = read_table(_table(tmp_path, "0,0,10,2,0,0\n1,5,12,2,0,0\n"))
    variants = [
        "index,x_mm,height_mm,diameter_mm,head_mass_kg,height_tol_mm\n1,0,10,2,0,0\n5,5,12,2,0,0\n",
        "x_mm,height_mm,diameter_mm\n0,10,2\n5,12,2\n",
        "height_mm,x_mm,note,diameter_mm\n10,0,first,2\n12,5,second,2\n",
    ]
    for k, body in enumerate(variants):
        p = tmp_path / f"v{k}.csv"
        p.write_text(body)
        notes: list[str] = []
        assert read_table(p, notes) == ref, body
        assert (notes != []) == ("note" in body), notes
        if notes:
            assert "column(s) note not used" in notes[0]
