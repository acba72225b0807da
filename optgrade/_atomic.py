"""Atomic file output: write next to the target, then move into place (nothing half-written).

Every stage that writes a result file (machining table, JSON, figures, drawings) goes through
``atomic_write`` so that a crash or Ctrl-C leaves either the old file or the new one.
"""

from __future__ import annotations

import json
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

__all__ = ["atomic_write", "save_figure", "write_json", "write_text"]


def atomic_write(path: str | os.PathLike, write: Callable[[Path], None]) -> Path:
    """Call ``write(tmp)`` on a temporary file beside ``path`` and move it into place.

    The parent folder is created if missing; the file gets the usual mode (0666 less the umask)
    rather than mkstemp's 0600. On any error the temporary file is removed and the error raised.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=path.suffix or ".tmp",
                               dir=path.parent)
    os.close(fd)
    try:
        write(Path(tmp))
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def write_text(path: str | os.PathLike, text: str) -> Path:
    """Write a UTF-8 text file atomically (Unix line ends)."""

    def _write(p: Path) -> None:
        with open(p, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)

    return atomic_write(path, _write)


def write_json(path: str | os.PathLike, payload: Any) -> Path:
    """Write ``payload`` as indented JSON atomically; NaN/inf are refused (use null)."""
    return write_text(path, json.dumps(payload, indent=1, allow_nan=False) + "\n")


def save_figure(fig: Any, path: str | os.PathLike, dpi: int = 130) -> Path:
    """Save a matplotlib figure atomically (format from the file suffix)."""
    return atomic_write(path, lambda p: fig.savefig(p, dpi=dpi))
