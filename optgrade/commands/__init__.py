"""Command-line subcommands, one module each, plus small helpers they share.

Each module ``optgrade/commands/<name>.py`` exposes

- ``add_parser(subparsers) -> argparse.ArgumentParser``: registers the
  subcommand (with --help text);
- ``run(args) -> int``: does the work and returns the exit status.

:mod:`optgrade.cli` imports the modules listed in :data:`COMMAND_NAMES` that exist. Input errors
are raised as :class:`optgrade.errors.StudyError`; the command line prints their messages and
exits with status 2. Use the helpers below so that every subcommand reports bad input the same way.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from optgrade.errors import StudyError
from optgrade.units import UnitError, parse_quantity

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

__all__ = [
    "open_layout",
    "open_output_dir",
    "COMMAND_NAMES",
    "add_study_argument",
    "clip_text",
    "whole_number_type",
    "open_study",
    "parse_quantity_arg",
    "quantity_type",
]

#: Subcommands in the order they appear in ``optgrade --help``.
COMMAND_NAMES: tuple[str, ...] = ("check", "bands", "trace", "search", "export", "verify",
                                  "compare")


def parse_quantity_arg(text: str | None, dimension: str, option_name: str) -> float:
    """Parse a command-line quantity such as ``--height "8 mm"`` into an SI float.

    Parameters
    ----------
    text
        The option's text, e.g. ``"8 mm"``, ``"150 kHz"``.
    dimension
        Expected dimension name ("length", "frequency", "mass", ... see
        :data:`optgrade.units.DIMENSIONS`).
    option_name
        The option as the user typed it, e.g. ``"--height"``; it names the field in the message.

    Returns
    -------
    float
        Value in SI (degrees for angles).

    Raises
    ------
    StudyError
        With one message ``--option: reason``; the command line exits with status 2.
    """
    try:
        return parse_quantity(text, dimension)
    except UnitError as exc:
        raise StudyError([f"{option_name}: {exc}"]) from None


def quantity_type(dimension: str, option_name: str):
    """An argparse ``type=`` callable that parses a quantity (errors become StudyError, exit 2)."""

    def _convert(text: str) -> float:
        return parse_quantity_arg(text, dimension, option_name)

    _convert.__name__ = f"{dimension} quantity"
    return _convert


def clip_text(text: str, n: int = 40) -> str:
    """A value for a message, shortened when long (a 100,000-digit number was echoed whole)."""
    return text if len(text) <= n else f"{text[:n]}... ({len(text)} characters)"


def whole_number_type(option: str, minimum: int = 1):
    """An argparse ``type=`` callable for a whole number >= ``minimum`` (errors: StudyError
    naming the option, exit 2; more than 18 digits is refused before int() reads it)."""

    def parse(text: str) -> int:
        s = text.strip()
        digits = s.lstrip("+-")
        if not digits.isdigit() or len(digits) > 18:
            why = "more than 18 digits" if digits.isdigit() else "expected a whole number"
            raise StudyError([f"{option}: {why}, got {clip_text(text)!r}"])
        value = int(s)
        if value < minimum:
            raise StudyError([f"{option}: must be >= {minimum}, got {value}"])
        return value

    parse.__name__ = "whole number"
    return parse


def add_study_argument(parser: argparse.ArgumentParser) -> None:
    """Add the positional ``STUDY`` argument (path to a study TOML file)."""
    parser.add_argument("study", metavar="STUDY", help="study file (TOML with units)")


def open_study(path: str | Path) -> Study:
    """Load and validate a study file for a subcommand.

    Raises :class:`StudyError` (messages ``path: field.path: reason``) on any defect; the
    command line prints them and exits with status 2.
    """
    from optgrade.commands._limits import check_study_work
    from optgrade.study import load_study

    study = load_study(path)
    check_study_work(study, str(path))  # plausibility and memory limits (docs/limits.md)
    return study


def open_layout(path: str | Path, option_name: str = "--layout") -> Layout:
    """Read a machining table (``optgrade.layout.read_table``) for a subcommand.

    Table defects become :class:`StudyError` messages prefixed with the option name (exit 2).
    """
    from optgrade.layout import TableError, read_table

    notes: list[str] = []
    try:
        layout = read_table(path, notes)
    except TableError as exc:
        raise StudyError([f"{option_name}: {m}" for m in exc.messages]) from None
    except (OSError, ValueError, ArithmeticError) as exc:
        raise StudyError([f"{option_name}: {path}: {exc}"]) from None
    _check_export_set(Path(path), option_name)
    for note in notes:
        print(f"note: {option_name}: {note}", file=sys.stderr)
    return layout


#: Files that mark a folder as an export set (optgrade.export.EXPORT_FILES without the table).
_SET_SIBLINGS = ("result.json", "report.txt", "layout.dxf", "sheet.png")
_MANIFEST = "export.json"  # optgrade.export.MANIFEST (not imported: it pulls in optuna)


def _check_export_set(path: Path, option_name: str) -> None:
    """A table that is part of an export set is read only if the set is whole: with the set's
    manifest (export.json) beside it, every file must match it (optgrade.export.check_export);
    a table of an export (header line ``trial:``) beside other files of a set but without a
    manifest is from an interrupted export, and the other files may describe another trial.
    A table copied out of its folder on its own is read as it is."""
    from optgrade.layout import read_header

    folder = path.parent
    if (folder / _MANIFEST).exists():
        from optgrade.export import ExportError, check_export  # imports optuna: only here

        try:
            check_export(folder)
        except ExportError as exc:
            raise StudyError([f"{option_name}: {path}: {exc}"]) from None
        return
    if "trial" in read_header(path) and any((folder / n).exists() for n in _SET_SIBLINGS):
        raise StudyError([f"{option_name}: {path}: part of an export set without its "
                          f"{_MANIFEST}: the export was interrupted, and the other files of "
                          f"{folder} may describe another trial; export again (or copy the "
                          "table out on its own)"])


def open_output_dir(path: str | Path, option_name: str = "--out") -> Path:
    """Check that an output folder can be used: it may not exist yet; an existing file, a
    device (/dev/null) or a folder that cannot be written is refused naming the option."""
    from optgrade.commands._limits import check_output_dir

    return check_output_dir(path, option_name)
