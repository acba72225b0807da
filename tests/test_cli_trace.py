"""``optgrade trace`` on the command line: outputs, figures, caution, bad input -> exit 2.

The physics behind the numbers is checked in tests/test_propagation*.py; here the checks are
the command's contract (issue 4): trace.json keys aligned with ``frequency_hz``, fractions
summing to 1, null where a channel gets nothing, the site-scale caution (physics.md section 8),
and clean failures (exit status 2, a message naming the field, no traceback).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from optgrade.cli import main
from optgrade.propagation import CHANNELS

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "studies" / "bench_backward_shear.toml"
SITE = ROOT / "studies" / "site_ground_barrier.toml"
BENCH_TABLE = ROOT / "studies" / "layouts" / "bench_backward_shear.csv"
SITE_TABLE = ROOT / "studies" / "layouts" / "site_ground_barrier.csv"


def _has_surrogate() -> bool:
    try:
        from optgrade.dispersion._surrogate import surrogate_for_study  # noqa: F401
    except ImportError:
        return False
    return True


needs_surrogate = pytest.mark.skipif(not _has_surrogate(), reason="dispersion surrogate missing")


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(["trace", *map(str, argv)])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_help_lists_options(capsys):
    code, out, _ = _run(capsys, "--help")
    assert code == 0
    assert "--layout" in out and "--out" in out


def test_missing_table_exits_2(tmp_path, capsys):
    code, _, err = _run(capsys, BENCH, "--layout", tmp_path / "nope.csv", "--out", tmp_path)
    assert code == 2
    assert "--layout" in err and "file not found" in err
    assert "Traceback" not in err


def test_bad_table_names_line_and_column(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "# hand-made\nindex,x_mm,height_mm,diameter_mm,head_mass_kg,height_tol_mm\n"
        "0,0,5,1,0,0\n1,12,five,1,0,0\n"
    )
    code, _, err = _run(capsys, BENCH, "--layout", bad, "--out", tmp_path / "o")
    assert code == 2
    assert "line 4: column height_mm" in err
    assert "Traceback" not in err
    assert not (tmp_path / "o" / "trace.json").exists()


def test_bad_study_exits_2(tmp_path, capsys):
    study = tmp_path / "s.toml"
    study.write_text("[study]\nname = 'x'\n")
    code, _, err = _run(capsys, study, "--layout", BENCH_TABLE, "--out", tmp_path / "o")
    assert code == 2
    assert "Traceback" not in err


def _check_payload(payload: dict, n_freq: int) -> None:
    assert len(payload["frequency_hz"]) == n_freq
    assert len(payload["eps_max"]) == n_freq
    assert len(payload["is_adiabatic"]) == n_freq
    for key in ("fractions", "position_m", "angle_deg"):
        assert set(payload[key]) == set(CHANNELS)
        for c in CHANNELS:
            assert len(payload[key][c]) == n_freq
    for i in range(n_freq):
        fr = [payload["fractions"][c][i] for c in CHANNELS]
        assert all(v is not None and 0.0 <= v <= 1.0 + 1e-12 for v in fr)
        assert math.isclose(sum(fr), 1.0, abs_tol=1e-9)
        for c in CHANNELS:
            if payload["fractions"][c][i] == 0.0:
                assert payload["position_m"][c][i] is None


@needs_surrogate
@pytest.mark.slow
@pytest.mark.parametrize(("study", "table", "is_site"), [(BENCH, BENCH_TABLE, False),
                                                         (SITE, SITE_TABLE, True)])
def test_trace_writes_json_and_figures(tmp_path, capsys, study, table, is_site):
    from optgrade.study import load_study

    n_freq = load_study(study).goal.n_frequencies
    out = tmp_path / "out"
    code, text, err = _run(capsys, study, "--layout", table, "--out", out)
    assert code == 0, err
    payload = json.loads((out / "trace.json").read_text())
    _check_payload(payload, n_freq)
    for name in ("elevation.png", "dispersion.png", "channel_map.png", "fractions.png"):
        data = (out / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000
    assert ("caution" in payload) is is_site
    if is_site:
        assert "qualified" in payload["caution"] and "local codes" in payload["caution"]
        assert "CAUTION" in text
    assert not list(out.glob("*.tmp")) and not list(out.glob(".*"))


def test_spacing_outside_the_study_range_is_traced_with_a_note(tmp_path, capsys):
    """Issue 15 item 8: a measured or hand-made layout is not bound by the search's limits.
    5.5 mm cells (the bench study allows 6 .. 16 mm) are traced with tables built for them and
    a note; 80 mm cells (5.2 shear wavelengths at 200 kHz, above the 4 of docs/limits.md) are
    still refused, naming the limit."""
    table = tmp_path / "near.csv"
    table.write_text("x_mm,height_mm,diameter_mm\n0,4,1\n5.5,5,1\n11,6,1\n16.5,7,1\n")
    code, out, err = _run(capsys, BENCH, "--layout", table, "--out", tmp_path / "o",
                          "--no-figures")
    assert code == 0, err[-500:]
    assert "note" in out and "outside the study's layout.spacing range 6 .. 16 mm" in out
    assert (tmp_path / "o" / "trace.json").is_file()
    far = tmp_path / "far.csv"
    far.write_text("x_mm,height_mm,diameter_mm\n0,5,1\n80,6,1\n160,7,1\n")
    code, _, err = _run(capsys, BENCH, "--layout", far, "--out", tmp_path / "o2")
    assert code == 2
    assert "--layout" in err and "layout.spacing (widened" in err and "shear wavelengths" in err
    assert "Traceback" not in err


@needs_surrogate
@pytest.mark.slow
def test_trace_numbers_come_from_the_exact_model_with_the_wkb_march_beside(tmp_path, capsys):
    """issue 12 item 3: by default the numbers are the exact row model's (``propagation``
    "scattering", an energy balance per frequency, lossless bench block: the Foldy solution
    conserves power, docs/physics.md section 13) and the WKB march's fractions are written
    beside them; ``--propagation wkb`` gives the march alone; an unknown name exits 2."""
    out = tmp_path / "exact"
    code, text, err = _run(capsys, BENCH, "--layout", BENCH_TABLE, "--out", out, "--no-figures")
    assert code == 0, err
    payload = json.loads((out / "trace.json").read_text())
    assert payload["propagation"] == "scattering"
    assert max(abs(v) for v in payload["balance_error"]) < 1e-9
    assert set(payload["wkb"]["fractions"]) == set(CHANNELS)
    assert payload["wkb"]["fractions"] != payload["fractions"]
    code, _, err = _run(capsys, BENCH, "--layout", BENCH_TABLE, "--out", tmp_path / "wkb",
                        "--no-figures", "--propagation", "wkb")
    assert code == 0, err
    wkb = json.loads((tmp_path / "wkb" / "trace.json").read_text())
    assert wkb["propagation"] == "wkb" and wkb["balance_error"] is None and "wkb" not in wkb
    assert wkb["fractions"] == payload["wkb"]["fractions"]
    code, _, err = _run(capsys, BENCH, "--layout", BENCH_TABLE, "--out", tmp_path / "x",
                        "--propagation", "nope")
    assert code == 2 and "--propagation" in err and "scattering" in err
    assert "Traceback" not in err
