"""Disk cache of precomputed complex tables (dispersion and Green's-function tables).

A table is an ``.npy`` file beside a JSON side file holding its key (hash of every input), format
version, shape and sha256 checksum; both are written atomically. A file whose key, format, shape,
dtype or checksum does not match, or that cannot be read at all (0 bytes, truncated, not a table,
unreadable), reads as missing, so a stale or damaged table is rebuilt.

A table is never mapped from the cache file itself: a mapped file truncated by another process
while a search runs kills the reader with SIGBUS on its next access (issue 17, part 2). The reader
copies the file into an anonymous temporary file (no name, so nobody else can truncate it),
checks the copy's checksum and maps the copy read-only (``np.memmap``, pages the OS can drop).
The tables are tens of MiB, copied once per process.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from optgrade._atomic import atomic_write


def default_cache_dir() -> Path:
    """Table cache directory: ``$OPTGRADE_CACHE`` or ``~/.cache/optgrade``."""
    env = os.environ.get("OPTGRADE_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "optgrade"


def _sha256(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).view(np.uint8)).hexdigest()


def read_cached(path: Path, meta_path: Path, key: str, shape, version: int) -> np.ndarray | None:
    """The table at ``path`` if it matches ``key``, ``version``, ``shape`` and its checksum, as a
    read-only map of a private copy; None for anything else, including a file that cannot be
    read (0 bytes, truncated, not an ``.npy`` file)."""
    try:
        meta = json.loads(meta_path.read_text())
        if meta.get("key") != key or meta.get("format") != version:
            return None
        table = _private_map(path)
        if table.shape != tuple(shape) or table.dtype != np.complex128:
            return None
        if _sha256(table) != meta.get("sha256"):
            return None
        return table
    except Exception:  # noqa: BLE001  every unreadable cache file is stale (EOFError on 0 bytes)
        return None


def _private_map(path: Path) -> np.memmap:
    """Copy the ``.npy`` file at ``path`` into an unnamed temporary file and map the copy.

    The copy's size is checked against its header before mapping, so a truncated file raises
    ValueError here instead of a SIGBUS later."""
    copy = tempfile.TemporaryFile()
    try:
        with open(path, "rb") as src:
            shutil.copyfileobj(src, copy, 1 << 20)
        copy.seek(0)
        major, _minor = np.lib.format.read_magic(copy)
        read_header = (np.lib.format.read_array_header_1_0 if major == 1
                       else np.lib.format.read_array_header_2_0)
        shape, fortran, dtype = read_header(copy)
        offset = copy.tell()
        n_bytes = int(np.prod(shape, dtype=np.int64)) * np.dtype(dtype).itemsize
        if os.fstat(copy.fileno()).st_size != offset + n_bytes:
            raise ValueError("table file size does not match its header")
        return np.memmap(copy, dtype=dtype, mode="r", shape=tuple(shape), offset=offset,
                         order="F" if fortran else "C")
    finally:
        copy.close()  # the map keeps the unnamed file alive


def write_cached(path: Path, meta_path: Path, key: str, table: np.ndarray, version: int) -> None:
    """Write ``table`` and its side file atomically."""
    atomic_write(path, lambda tmp: np.save(tmp, table, allow_pickle=False))
    meta = {"key": key, "format": version, "sha256": _sha256(table), "shape": list(table.shape)}
    atomic_write(meta_path, lambda tmp: tmp.write_text(json.dumps(meta)))
