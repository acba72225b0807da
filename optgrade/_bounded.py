"""Reading user files with a bound: regular files only, at most a given size (docs/limits.md).

A study or a table named ``/dev/zero``, ``/dev/urandom``, a FIFO or a huge file was read without
limit (the process never ended). :func:`read_regular_file` looks at the path before opening it
(a FIFO would block in ``open``), refuses anything that is not a regular file, and reads at most
``max_bytes + 1`` bytes, so a file that grows or reports a wrong size is still bounded.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

__all__ = ["BoundedReadError", "read_regular_file"]


class BoundedReadError(Exception):
    """The path is not a regular file, or is larger than allowed (the message says which)."""


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a directory"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISFIFO(mode):
        return "a pipe (FIFO)"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def _size_text(n: int) -> str:
    if n >= 1 << 20:
        return f"{n / (1 << 20):.3g} MiB"
    if n >= 1 << 10:
        return f"{n / (1 << 10):.3g} KiB"
    return f"{n} bytes"


def read_regular_file(path: str | os.PathLike, max_bytes: int, what: str) -> bytes:
    """The bytes of ``path`` if it is a regular file of at most ``max_bytes`` bytes.

    ``what`` names the kind of file in the messages (e.g. "a study file"). Raises
    FileNotFoundError, IsADirectoryError and other OSErrors as ``open`` does, and
    :class:`BoundedReadError` for a device, pipe or socket, or a file over the limit.
    """
    p = Path(path)
    st = os.stat(p)  # follows symbolic links, like open(); a FIFO is not opened at all
    if stat.S_ISDIR(st.st_mode):
        raise IsADirectoryError(21, "Is a directory", str(p))
    if not stat.S_ISREG(st.st_mode):
        raise BoundedReadError(f"is {_kind(st.st_mode)}, expected {what} (a regular file)")
    limit = _size_text(max_bytes)
    if st.st_size > max_bytes:
        raise BoundedReadError(f"is {_size_text(st.st_size)}, larger than the {limit} "
                               f"allowed for {what}")
    fd = os.open(p, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    with os.fdopen(fd, "rb") as fh:
        if not stat.S_ISREG(os.fstat(fh.fileno()).st_mode):  # replaced between stat and open
            raise BoundedReadError(f"is not a regular file, expected {what}")
        blob = fh.read(max_bytes + 1)
    if len(blob) > max_bytes:
        raise BoundedReadError(f"is larger than the {limit} allowed for {what}")
    return blob
