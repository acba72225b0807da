"""Disk cache of precomputed complex tables (dispersion and Green's-function tables).

A table is an ``.npy`` file beside a JSON side file holding its key (hash of every input), format
version, shape and sha256 checksum; both are written atomically. A file whose key, format, shape,
dtype or checksum does not match reads as missing, so a stale or damaged table is rebuilt.
"""

from __future__ import annotations

import hashlib
import json
import os
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
    """The memory-mapped table at ``path`` if it matches ``key``, ``version`` and ``shape``."""
    try:
        meta = json.loads(meta_path.read_text())
        if meta.get("key") != key or meta.get("format") != version:
            return None
        table = np.load(path, mmap_mode="r", allow_pickle=False)
        if table.shape != tuple(shape) or table.dtype != np.complex128:
            return None
        if _sha256(table) != meta.get("sha256"):
            return None
        return table
    except (OSError, ValueError, json.JSONDecodeError, TypeError, AttributeError):
        return None


def write_cached(path: Path, meta_path: Path, key: str, table: np.ndarray, version: int) -> None:
    """Write ``table`` and its side file atomically."""
    atomic_write(path, lambda tmp: np.save(tmp, table, allow_pickle=False))
    meta = {"key": key, "format": version, "sha256": _sha256(table), "shape": list(table.shape)}
    atomic_write(meta_path, lambda tmp: tmp.write_text(json.dumps(meta)))
