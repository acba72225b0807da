"""Resume and exports that stay consistent (issue 17, part 2): damaged cache tables, a resumed
search that continues instead of repeating, study identity written before the table build, and
exports written as a unit.

The search checks use the stand-in physics of tests/search_helpers.py (the machinery, not the
physics, is under test here).
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from optgrade._table_cache import read_cached, write_cached

# ---------------------------------------------------------------------------------------------
# cache tables


def _table(tmp_path: Path, shape=(64, 256)) -> tuple[Path, Path, np.ndarray]:
    rng = np.random.default_rng(3)
    table = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    path, meta = tmp_path / "t.npy", tmp_path / "t.json"
    write_cached(path, meta, "key-1", table, 2)
    return path, meta, table


@pytest.mark.parametrize("damage", ["empty", "truncated", "garbage", "directory"])
def test_unreadable_cache_table_reads_as_stale(tmp_path, damage):
    """A 0-byte, truncated, non-npy or unreadable table file is a miss (rebuilt), never an
    error: a 0-byte file raised EOFError before, which made every trace and search exit 1."""
    path, meta, table = _table(tmp_path)
    assert read_cached(path, meta, "key-1", table.shape, 2) is not None
    if damage == "empty":
        path.write_bytes(b"")
    elif damage == "truncated":
        path.write_bytes(path.read_bytes()[:5000])
    elif damage == "garbage":
        path.write_bytes(b"\x93NUMPY\x01\x00garbage" * 10)
    else:
        path.unlink()
        path.mkdir()
    assert read_cached(path, meta, "key-1", table.shape, 2) is None


def test_table_truncated_while_in_use_does_not_kill_the_reader(tmp_path):
    """The table file is truncated in place after it was loaded (another process rebuilding or
    a full disk): the reader keeps working with its own copy. Before, the table was mapped from
    the cache file and the next access died with SIGBUS (exit -7)."""
    path, meta, table = _table(tmp_path, shape=(256, 512))
    code = textwrap.dedent(f"""
        import os, numpy as np
        from pathlib import Path
        from optgrade._table_cache import read_cached
        t = read_cached(Path({str(path)!r}), Path({str(meta)!r}), "key-1", (256, 512), 2)
        assert t is not None
        before = complex(t[-1, -1])
        os.truncate({str(path)!r}, 128)
        after = complex(np.asarray(t).sum())
        print(before, after)
    """)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, (proc.returncode, proc.stderr[-500:])
    before, total = (complex(v) for v in proc.stdout.split())
    assert before == table[-1, -1]
    assert total == pytest.approx(table.sum(), rel=1e-12)
