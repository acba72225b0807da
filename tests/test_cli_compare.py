"""``optgrade compare`` (issue 15 item 6): candidates side by side.

Worked example: the bench example's best searched layout (benchmarks/layouts) against a
uniform row of 24 equal pins whose first axial resonance (c_bar / 4 L, the quarter-wave rod:
any vibration handbook) sits below the band; the command's figures must be those of the study's
propagation model traced on each table, and the verdict counts those of optgrade.verdict.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from optgrade.cli import main
from optgrade.layout import layout_from_cells, read_table, write_table
from optgrade.propagation import trace_layout
from optgrade.study import load_study

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "studies" / "bench_backward_shear.toml"
BEST = ROOT / "benchmarks" / "layouts" / "bench_backward_shear_best.csv"


def _uniform_table(tmp_path: Path) -> Path:
    study = load_study(BENCH)
    lay = layout_from_cells(np.full(24, 12.5e-3), np.full(24, 8e-3), study.resonator.diameter,
                            0.0, 0.02e-3)
    path = tmp_path / "uniform.csv"
    write_table(lay, path, study_name=study.meta.name, material="invented test pins")
    return path


def test_compare_two_candidates(tmp_path, capsys):
    uniform = _uniform_table(tmp_path)
    out = tmp_path / "cmp"
    assert main(["compare", str(BENCH), str(BEST), str(uniform), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "bench_backward_shear_best" in text and "uniform" in text
    data = json.loads((out / "compare.json").read_text())
    study = load_study(BENCH)
    for row, table in zip(data["candidates"], (BEST, uniform), strict=True):
        lay = read_table(table)
        tr = trace_layout(study, lay)
        wanted = np.asarray(tr.fractions[study.goal.channel])
        assert abs(row["mean_wanted"] - wanted.mean()) < 1e-12
        assert row["n_met"] == int(np.sum(wanted >= study.goal.required_fraction))
        assert row["n_resonators"] == lay.x.size
    rows = list(csv.DictReader((out / "compare.csv").open()))
    assert [r["name"] for r in rows] == ["bench_backward_shear_best", "uniform"]
    assert (out / "compare.png").stat().st_size > 5000


def test_compare_needs_two_tables(tmp_path, capsys):
    assert main(["compare", str(BENCH), str(BEST), "--out", str(tmp_path / "o")]) == 2
    assert "2 to 12 tables" in capsys.readouterr().err
