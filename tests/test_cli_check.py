"""Command line: `optgrade check`, exit codes, and the malformed-study corpus.

Every corpus file holds one defect; its first line `# expect: a | b` lists fragments the error
output must contain (the field path first). Files whose content cannot carry a comment (empty,
binary, not UTF-8) have their expectations here.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from optgrade import __version__
from optgrade.cli import main
from optgrade.commands import COMMAND_NAMES, parse_quantity_arg
from optgrade.errors import StudyError

ROOT = Path(__file__).resolve().parents[1]
CORPUS = ROOT / "tests" / "study_corpus"
STUDIES = sorted((ROOT / "studies").glob("*.toml"))
SPECIAL = {
    "empty.toml": ["(file)", "empty"],
    "binary_junk.toml": ["(file)", "binary"],
    "not_utf8.toml": ["(file)", "UTF-8"],
}
CORPUS_FILES = sorted(CORPUS.glob("*.toml"))


def _expectations(path: Path) -> list[str]:
    if path.name in SPECIAL:
        return SPECIAL[path.name]
    first = path.read_text(encoding="utf-8").splitlines()[0]
    assert first.startswith("# expect:"), path
    return [part.strip() for part in first[len("# expect:"):].split("|")]


def test_corpus_is_large_enough():
    assert len(CORPUS_FILES) >= 45


def test_corpus_base_is_valid(capsys):
    """The defects are the only reason the corpus files fail: the base study is valid."""
    assert main(["check", str(CORPUS / "VALID_BASE.txt"), "--no-reach"]) == 0


@pytest.mark.parametrize("path", CORPUS_FILES, ids=lambda p: p.stem)
def test_malformed_study_exits_2_with_field_message(path, capsys):
    status = main(["check", str(path)])
    out, err = capsys.readouterr()
    assert status == 2
    assert "Traceback" not in out + err
    assert out == ""
    lines = err.strip().splitlines()
    assert lines and all(line.startswith(f"{path}: ") for line in lines), err
    for fragment in _expectations(path):
        assert fragment in err, f"{fragment!r} not in {err!r}"
    # every line number given points at the line holding the named field (or its section)
    text = path.read_bytes().decode("utf-8", errors="replace").splitlines()
    for line in lines:
        if "(line " not in line or "(toml)" in line:
            continue
        number = int(line.rsplit("(line ", 1)[1].split(")")[0])
        field = line[len(f"{path}: "):].split(":", 1)[0]
        # the key itself, or its section header when the key is missing
        assert any(part in text[number - 1] for part in field.split(".")), (line, number)


def test_missing_file_exits_2(tmp_path, capsys):
    missing = tmp_path / "nope.toml"
    assert main(["check", str(missing)]) == 2
    err = capsys.readouterr().err
    assert f"{missing}: (file): no such file" in err
    assert "Traceback" not in err


def test_unreadable_file_exits_2(tmp_path, capsys):
    if os.geteuid() == 0:
        pytest.skip("root can read any file")
    path = tmp_path / "locked.toml"
    path.write_text("[study]\n")
    path.chmod(0)
    assert main(["check", str(path)]) == 2
    assert "cannot read" in capsys.readouterr().err


@pytest.mark.parametrize("path", STUDIES, ids=lambda p: p.name)
def test_example_studies_check_ok_and_json_keys(path, capsys):
    assert main(["check", str(path), "--no-reach"]) == 0
    human = capsys.readouterr().out
    assert "cR" in human and "first resonance" in human
    assert main(["check", str(path), "--json", "--no-reach"]) == 0
    data = json.loads(capsys.readouterr().out)
    for dotted in ("substrate.density", "substrate.cl", "substrate.ct", "substrate.cr",
                   "resonator.youngs_modulus", "resonator.density", "resonator.diameter",
                   "resonator.row_pitch", "goal.band"):
        section, key = dotted.split(".")
        assert key in data[section], dotted
    assert len(data["goal"]["band"]) == 2 and data["goal"]["band"][0] < data["goal"]["band"][1]
    assert data["substrate"]["ct"] < data["substrate"]["cl"]
    assert isinstance(data["warnings"], list)
    if data["meta"]["scale"] == "site":
        assert any("qualified engineer" in w for w in data["warnings"])
        assert "qualified engineer" in human


def test_json_values_match_the_quarter_wave_resonance(capsys):
    """first_resonance_hz = c_bar/(4 L) at the tallest and shortest heights when there is no
    head mass (fixed-free bar, Blevins 1979)."""
    path = ROOT / "studies" / "bench_backward_shear.toml"
    main(["check", str(path), "--json", "--no-reach"])
    data = json.loads(capsys.readouterr().out)
    c_bar = (data["resonator"]["youngs_modulus"] / data["resonator"]["density"]) ** 0.5
    h = data["layout"]["height"]
    assert data["derived"]["first_resonance_hz"] == pytest.approx(
        [c_bar / (4 * h[1]), c_bar / (4 * h[0])], rel=1e-6)


def test_warnings_for_coarse_pitch_and_thick_rods(tmp_path, capsys):
    """Warnings of physics.md sections 4-5: 2 pi/b < kT at band top (b > shear wavelength) and
    d > bar wavelength / 5."""
    base = (CORPUS / "VALID_BASE.txt").read_text()
    text = base.replace('row_pitch = "4 mm"', 'row_pitch = "20 mm"')
    text = text.replace('diameter = "1 mm"', 'diameter = "6 mm"')
    text = text.replace('spacing = ["6 mm", "16 mm"]', 'spacing = ["10 mm", "30 mm"]')
    path = tmp_path / "warn.toml"
    path.write_text(text)
    assert main(["check", str(path), "--json", "--no-reach"]) == 0
    warnings = json.loads(capsys.readouterr().out)["warnings"]
    assert any("sideways" in w for w in warnings)
    assert any("thin-rod theory" in w for w in warnings)


def test_greenhill_height_against_bessel_root():
    """Self-weight buckling of a fixed-free column: q L^3 / (E I) = (9/4) j^2 = 7.837 where j is
    the first zero of the Bessel function J_{-1/3} (Greenhill 1881; Timoshenko and Gere,
    *Theory of Elastic Stability*, 1961, section 2.10). The root is found here with scipy."""
    from scipy.optimize import brentq
    from scipy.special import jv

    from optgrade.commands.check import greenhill_height

    j = brentq(lambda x: jv(-1.0 / 3.0, x), 1.0, 2.5)
    coefficient = 2.25 * j**2
    assert coefficient == pytest.approx(7.837, abs=1e-3)
    d, e, rho, g = 0.01, 200e9, 7850.0, 9.80665
    inertia, area = math.pi * d**4 / 64, math.pi * d**2 / 4
    expected = (coefficient * e * inertia / (rho * g * area)) ** (1 / 3)
    assert greenhill_height(d, e, rho) == pytest.approx(expected, rel=1e-4)
    assert 5.0 < greenhill_height(d, e, rho) < 5.1  # a 10 mm steel rod: about 5.03 m


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert __version__ in capsys.readouterr().out
    assert main(["--help"]) == 0
    assert "check" in capsys.readouterr().out
    assert main(["check", "--help"]) == 0
    assert "--json" in capsys.readouterr().out


@pytest.mark.parametrize("name", COMMAND_NAMES)
def test_every_subcommand_has_help(name, capsys):
    assert main([name, "--help"]) == 0
    assert "usage:" in capsys.readouterr().out


def test_usage_errors_exit_2(capsys):
    assert main([]) == 2
    assert main(["check"]) == 2
    assert main(["check", "x.toml", "--bogus"]) == 2
    assert main(["no-such-command"]) == 2
    assert "Traceback" not in capsys.readouterr().err


def test_unexpected_error_is_one_line_exit_1(monkeypatch, capsys):
    import optgrade.commands.check as check

    def boom(args):
        raise RuntimeError("simulated failure\nsecond line")

    monkeypatch.setattr(check, "run", boom)
    monkeypatch.delenv("OPTGRADE_DEBUG", raising=False)
    assert main(["check", "whatever.toml"]) == 1
    err = capsys.readouterr().err
    assert "simulated failure" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    monkeypatch.setenv("OPTGRADE_DEBUG", "1")
    assert main(["check", "whatever.toml"]) == 1
    assert "Traceback" in capsys.readouterr().err


def test_parse_quantity_arg():
    assert parse_quantity_arg("8 mm", "length", "--height") == pytest.approx(8e-3)
    with pytest.raises(StudyError) as info:
        parse_quantity_arg("8", "length", "--height")
    assert info.value.messages[0].startswith("--height: ")
    with pytest.raises(StudyError, match="--fmin: .*frequency"):
        parse_quantity_arg("8 mm", "frequency", "--fmin")


@pytest.mark.parametrize("name", ["missing_unit_single.toml", "binary_junk.toml"])
def test_console_script_exit_codes(name):
    """Real process: the installed console script exits 2 on bad input and 0 on a good study."""
    exe = [sys.executable, "-c", "import sys; from optgrade.cli import main; sys.exit(main())"]
    bad = subprocess.run([*exe, "check", str(CORPUS / name)], capture_output=True, text=True)
    assert bad.returncode == 2
    assert "Traceback" not in bad.stderr and bad.stderr.strip()
    good = subprocess.run([*exe, "check", str(STUDIES[0]), "--json"], capture_output=True,
                          text=True)
    assert good.returncode == 0
    assert json.loads(good.stdout)["substrate"]["cr"] > 0


def test_quantity_type_in_argparse_gives_exit_2(monkeypatch, capsys):
    """A subcommand option declared with quantity_type refuses a unitless value with exit 2."""
    import optgrade.cli as cli
    from optgrade.commands import quantity_type

    class _Fake:
        @staticmethod
        def add_parser(subparsers):
            parser = subparsers.add_parser("fake", help="test only")
            parser.add_argument("--height", type=quantity_type("length", "--height"))
            return parser

        @staticmethod
        def run(args):
            print(f"height={args.height!r}")
            return 0

    monkeypatch.setattr(cli, "_discover", lambda: ({"fake": _Fake}, {}))
    assert cli.main(["fake", "--height", "8 mm"]) == 0
    assert "height=0.008" in capsys.readouterr().out
    assert cli.main(["fake", "--height", "8"]) == 2
    err = capsys.readouterr().err
    assert "--height: '8' has no unit" in err and "Traceback" not in err


def test_sampler_choices_come_from_the_sampler_registry(capsys):
    """``--sampler`` offers exactly the study file's sampler names (one registry): ``qmc``, which
    the command line offered and the study file refused before, is accepted by both."""
    from optgrade.search import SAMPLERS, sampler_choices
    from optgrade.study import study_from_text

    assert main(["search", "--help"]) == 0
    help_text = " ".join(capsys.readouterr().out.split())
    assert "{" + ",".join(sampler_choices()) + "}" in help_text
    assert "qmc" in SAMPLERS.names()
    base = (ROOT / "studies" / "bench_backward_shear.toml").read_text()
    assert study_from_text(base.replace('sampler = "auto"', 'sampler = "qmc"')).search.sampler \
        == "qmc"
