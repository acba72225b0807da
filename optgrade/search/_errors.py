"""The search stage's input error (private; re-exported by :mod:`optgrade.search`)."""

from __future__ import annotations

__all__ = ["SearchError"]


class SearchError(RuntimeError):
    """A search that cannot start or continue; ``field`` names the option or study field."""

    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason
