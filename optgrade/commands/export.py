"""``optgrade export STUDY --storage URL --trial N --out DIR``: re-export a stored trial.

Rebuilds the trial's layout from its stored parameters, traces it with the study's surrogate and
writes table.csv, layout.dxf, sheet.png, result.json and report.txt into DIR (atomically).
"""

from __future__ import annotations

import argparse

from optgrade.commands import add_study_argument, clip_text, open_study
from optgrade.errors import StudyError

__all__ = ["add_parser", "run"]


def _trial_number(text: str) -> int:
    digits = text.strip().lstrip("+-")
    if not digits.isdigit() or len(digits) > 18:
        raise StudyError([f"--trial: expected a trial number or 'best', got "
                          f"{clip_text(text)!r}"])
    value = int(text)
    if value < 0:
        raise StudyError([f"--trial: must be >= 0, got {value}"])
    return value


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register ``optgrade export``."""
    parser = subparsers.add_parser(
        "export",
        help="export a stored search trial (machining table, drawing, figures, report)",
        description=(
            "Export one trial of a stored search: table.csv (machining table), layout.dxf (plan "
            "and elevation), sheet.png (figure sheet), result.json and report.txt."
        ),
    )
    add_study_argument(parser)
    parser.add_argument("--storage", required=True, metavar="URL",
                        help="optuna storage URL of the search (e.g. sqlite:///runs/x/study.db)")
    parser.add_argument("--trial", default="best", metavar="N",
                        help="trial number, or 'best' (default)")
    parser.add_argument("--out", required=True, metavar="DIR", help="output directory")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    """Export the trial; 0 done, 2 bad input."""
    from optgrade import export_trial
    from optgrade.commands import open_output_dir
    from optgrade.search import SearchError, best_trial, load_search

    study = open_study(args.study)
    open_output_dir(args.out)  # an existing file, /dev/null or a read-only folder: exit 2
    try:
        ostudy = load_search(study, args.storage)
        if args.trial == "best":
            best = best_trial(ostudy)
            if best is None:
                raise SearchError("--trial", "the stored study has no complete trial")
            number = best.number
        else:
            number = _trial_number(args.trial)
        export_trial(study, ostudy, number, args.out)
    except SearchError as exc:
        raise StudyError([f"{args.study}: {exc}"]) from None
    extra = " far_face.png" if study.substrate.thickness is not None else ""
    print(f"exported trial {number} to {args.out}: table.csv layout.dxf sheet.png{extra} "
          "result.json report.txt")
    return 0
