"""`optgrade bands` end to end: files, JSON/CSV structure, bad input (exit 2), site caution."""

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from optgrade.cli import main

STUDIES = Path(__file__).resolve().parents[1] / "studies"
BENCH = str(STUDIES / "bench_backward_shear.toml")
SITE = str(STUDIES / "site_ground_barrier.toml")


def test_bands_bench_outputs(tmp_path):
    out = tmp_path / "b"
    code = main(
        [
            "bands",
            BENCH,
            "--height",
            "10 mm",
            "--spacing",
            "12 mm",
            "--fmin",
            "100 kHz",
            "--fmax",
            "200 kHz",
            "--points",
            "12",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    doc = json.loads((out / "bands.json").read_text())
    n = len(doc["frequency_hz"])
    assert n == 12 and doc["frequency_hz"][0] == pytest.approx(1e5)
    assert len(doc["branches"]) == 2
    for br in doc["branches"]:
        assert len(br["k_real"]) == n and len(br["k_imag"]) == n
        for kr, ki in zip(br["k_real"], br["k_imag"], strict=True):
            assert (kr is None) == (ki is None)
            if kr is not None:
                assert kr > 0 and ki >= 0
        for j in range(n):
            vals = [br["shares"][c][j] for c in br["shares"]]
            if br["is_leaky"][j]:
                assert sum(vals) == pytest.approx(1.0, abs=1e-9)
            if not br["is_leaky"][j]:
                assert all(br["angle_deg"][c][j] is None for c in br["angle_deg"])
    # the rod resonance (bar speed / 4 L) is reported: aluminium, L = 10 mm -> ~126 kHz
    assert 1.1e5 < doc["resonances_hz"][0] < 1.4e5
    assert "caution" not in doc
    rows = list(csv.DictReader((out / "bands.csv").open()))
    assert len(rows) == 2 * n
    assert {r["branch"] for r in rows} == {"lower", "upper"}
    assert (out / "bands.png").stat().st_size > 10_000
    # JSON and CSV agree
    lower = [r for r in rows if r["branch"] == "lower"]
    for r, k in zip(lower, doc["branches"][0]["k_real"], strict=True):
        if k is None:
            assert r["k_real_per_m"] == ""
        else:
            assert float(r["k_real_per_m"]) == pytest.approx(k, rel=1e-8)


def test_bands_site_caution_and_homogenised(tmp_path):
    out = tmp_path / "s"
    code = main(
        [
            "bands",
            SITE,
            "--height",
            "4 m",
            "--spacing",
            "2 m",
            "--head-mass",
            "1500 kg",
            "--points",
            "6",
            "--model",
            "homogenised",
            "--out",
            str(out),
            "--no-figure",
        ]
    )
    assert code == 0
    doc = json.loads((out / "bands.json").read_text())
    assert "qualified engineer" in doc["caution"]
    assert doc["model"] == "homogenised"
    assert not (out / "bands.png").exists()


@pytest.mark.parametrize(
    "args, field",
    [
        (["--height", "ten mm", "--spacing", "12 mm"], "--height"),
        (["--height", "10 mm", "--spacing", "12 kg"], "--spacing"),
        (["--height", "10 mm", "--spacing", "-12 mm"], "--spacing"),
        (
            ["--height", "10 mm", "--spacing", "12 mm", "--fmin", "300 kHz", "--fmax", "100 kHz"],
            "--fmin",
        ),
        (["--height", "10 mm", "--spacing", "12 mm", "--points", "1"], "--points"),
    ],
)
def test_bands_bad_input_exit_2(tmp_path, capsys, args, field):
    code = main(["bands", BENCH, *args, "--out", str(tmp_path / "x")])
    assert code == 2
    err = capsys.readouterr().err
    assert field in err and "Traceback" not in err


def test_bands_missing_study(tmp_path, capsys):
    code = main(
        [
            "bands",
            str(tmp_path / "nope.toml"),
            "--height",
            "1 mm",
            "--spacing",
            "5 mm",
            "--out",
            str(tmp_path / "x"),
        ]
    )
    assert code == 2
    assert "Traceback" not in capsys.readouterr().err


def test_python_api_same_as_command(tmp_path):
    """run_bands (Python API) writes the same numbers as the command line."""
    from optgrade.commands.bands import run_bands
    from optgrade.study import load_study

    study = load_study(BENCH)
    bands = run_bands(study, 10e-3, 12e-3, tmp_path, fmin=1.3e5, fmax=1.5e5, points=4, figure=False)
    doc = json.loads((tmp_path / "bands.json").read_text())
    k = np.array([np.nan if v is None else v for v in doc["branches"][1]["k_real"]])
    np.testing.assert_allclose(k, bands.branches[1].k.real, rtol=1e-9)
