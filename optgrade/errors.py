"""Exceptions shared by the package and the command line."""

from __future__ import annotations

__all__ = ["OptgradeError", "StudyError"]


class OptgradeError(Exception):
    """Base class of the package's own errors."""


class StudyError(OptgradeError):
    """Invalid user input: a study file or a command-line value.

    Parameters
    ----------
    messages
        One line per defect, each of the form ``path: field.path: reason`` (with ``(line N)``
        appended where the line in the file is known). The command line prints them to stderr
        and exits with status 2.
    """

    def __init__(self, messages: list[str]):
        self.messages = [str(m) for m in messages] or ["invalid input"]
        super().__init__("\n".join(self.messages))
