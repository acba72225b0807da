"""Command line ``optgrade``: a thin argparse shell over the Python API.

Subcommands live in ``optgrade/commands/<name>.py`` and are discovered from the fixed list
:data:`optgrade.commands.COMMAND_NAMES`; a module that fails to import is listed as unavailable
and does not take the others down. Exit status: 0 success, 2 bad input (study or option;
messages on stderr, no traceback), 1 unexpected failure (one line; set ``OPTGRADE_DEBUG=1``
for the traceback), 130 interrupted.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import traceback
from collections.abc import Sequence
from types import ModuleType

from optgrade import __version__
from optgrade.commands import COMMAND_NAMES
from optgrade.errors import StudyError

__all__ = ["build_parser", "main"]


def _is_debug() -> bool:
    return os.environ.get("OPTGRADE_DEBUG", "").strip() not in ("", "0")


def _discover() -> tuple[dict[str, ModuleType], dict[str, str]]:
    """Import the subcommand modules; return (modules, broken name -> reason)."""
    modules: dict[str, ModuleType] = {}
    broken: dict[str, str] = {}
    for name in COMMAND_NAMES:
        module_name = f"optgrade.commands.{name}"
        try:
            modules[name] = importlib.import_module(module_name)
        except Exception as exc:  # a broken module must not take the others down
            broken[name] = f"{type(exc).__name__}: {exc}"
            if _is_debug():
                traceback.print_exc()
    return modules, broken


def build_parser() -> tuple[argparse.ArgumentParser, dict[str, ModuleType], dict[str, str]]:
    """Build the top-level parser with every available subcommand registered."""
    parser = argparse.ArgumentParser(
        prog="optgrade",
        description=(
            "Inverse design of graded surface-resonator arrays: rows of rods or posts on an "
            "elastic half-space that stop, slow or convert Rayleigh surface waves."
        ),
    )
    parser.add_argument("--version", action="version", version=f"optgrade {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    modules, broken = _discover()
    for module in modules.values():
        module.add_parser(subparsers)
    for name, reason in broken.items():
        sub = subparsers.add_parser(name, help=f"(unavailable: {reason})")
        sub.add_argument("rest", nargs=argparse.REMAINDER)
    return parser, modules, broken


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (also used by the console script)."""
    try:
        parser, modules, broken = build_parser()
    except StudyError as exc:  # pragma: no cover - a subcommand failing at registration
        for line in exc.messages:
            print(line, file=sys.stderr)
        return 2
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors (argparse exits 2)
        return int(exc.code) if isinstance(exc.code, int) else (0 if exc.code is None else 2)
    except StudyError as exc:  # a quantity option's type= converter refused the value
        for line in exc.messages:
            print(f"optgrade: {line}", file=sys.stderr)
        return 2
    if not args.command:
        parser.print_help(sys.stderr)
        return 2
    if args.command in broken:
        print(f"optgrade {args.command}: unavailable ({broken[args.command]})", file=sys.stderr)
        return 1
    run = modules[args.command].run
    try:
        status = run(args)
    except StudyError as exc:
        for line in exc.messages:
            print(line, file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"optgrade {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # e.g. `optgrade check x --json | head`
        return 1
    except Exception as exc:
        if _is_debug():
            traceback.print_exc()
        text = str(exc).splitlines()[0] if str(exc) else ""
        print(
            f"optgrade {args.command}: unexpected error: {type(exc).__name__}: {text} "
            "(set OPTGRADE_DEBUG=1 for details)",
            file=sys.stderr,
        )
        return 1
    return int(status or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
