"""Resume and exports that stay consistent (issue 17, part 2): damaged cache tables, a resumed
search that continues instead of repeating, study identity written before the table build, and
exports written as a unit.

The search checks use the stand-in physics of tests/search_helpers.py (the machinery, not the
physics, is under test here).
"""

from __future__ import annotations

import os
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


# ---------------------------------------------------------------------------------------------
# a resumed search continues; identity before the table build


def _search(study, tmp_path, **kw):
    from search_helpers import fake_pipeline

    from optgrade.search import _owner

    kw.setdefault("n_jobs", 0)
    kw.setdefault("show_progress", False)
    kw.setdefault("pipeline", fake_pipeline)
    url = f"sqlite:///{tmp_path / 'r.db'}"
    return _owner.run_search(study, tmp_path / "r", storage=url, **kw), url


def _params(url, name="fake"):
    import optuna

    from optgrade.search import _owner

    ostudy = optuna.load_study(study_name=name, storage=_owner.open_storage(url))
    return [tuple(sorted(t.params.items())) for t in ostudy.trials if t.params]


@pytest.mark.parametrize("sampler", ["random", "tpe", "nsga2"])
def test_resume_continues_instead_of_repeating(tmp_path, sampler):
    """10 trials, then --resume to 20: the resumed run draws new candidates. Before, the
    sampler was seeded with the study seed again and scored the first run's candidates a second
    time (issue 17: random 20/20, TPE inside its startup trials 10/10, NSGA-II 10/10 repeats).
    TPE's first 10 trials are its random start-up trials, NSGA-II's first generation is random
    (optuna defaults: n_startup_trials=10, population_size=50)."""
    from search_helpers import fake_study

    s = fake_study(search__sampler=sampler)
    _, url = _search(s, tmp_path, n_trials=10, sampler=sampler)
    first = _params(url)
    out, _ = _search(s, tmp_path, n_trials=20, sampler=sampler, is_resume=True)
    both = _params(url)
    second = both[len(first):]
    assert out.n_finished == 20 and len(second) >= 10
    repeated = sum(p in set(first) for p in second)
    assert repeated == 0, f"{repeated} of {len(second)} resumed candidates repeat the first run"


def test_interrupted_table_build_leaves_the_identity(tmp_path):
    """Ctrl-C while the first run builds its tables: the study exists, and a resume with a
    changed study file (other goal weights) is refused. Before, the identity attributes were
    written after the table build, so the interrupted study had none and the changed file was
    adopted (exit 0; the control run refuses with exit 2)."""
    from search_helpers import fake_study

    from optgrade.search import SearchError

    def interrupted(study):
        raise KeyboardInterrupt  # the table build, stopped by Ctrl-C

    s = fake_study()
    with pytest.raises(KeyboardInterrupt):
        _search(s, tmp_path, n_trials=10, pipeline=interrupted)
    changed = fake_study(goal__weights={"channel": 1.0, "worst": 0.5})
    with pytest.raises(SearchError, match="changed"):
        _search(changed, tmp_path, n_trials=10, is_resume=True)
    out, _ = _search(s, tmp_path, n_trials=6, is_resume=True)  # the same file still resumes
    assert out.n_finished == 6


# ---------------------------------------------------------------------------------------------
# exports written as a unit, checked by their readers

BENCH = Path(__file__).resolve().parent.parent / "studies" / "bench_backward_shear.toml"


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    """An export set of a 30-rod layout of the bench example (real tables from the cache)."""
    from optgrade.export import export_layout
    from optgrade.layout import layout_from_cells
    from optgrade.study import load_study

    study = load_study(BENCH)
    n = 30
    heights = np.round(np.linspace(4e-3, 12e-3, n) / 5e-5) * 5e-5  # on the 0.05 mm step
    layout = layout_from_cells(heights, np.full(n, 10e-3), 1e-3, height_tol=2e-5)
    out = tmp_path_factory.mktemp("export")
    export_layout(study, layout, out, trial_number=3)
    return out


def _copy_set(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def _trace_table(table: Path, tmp_path: Path) -> int:
    from optgrade.cli import main

    return main(["trace", str(BENCH), "--layout", str(table), "--out", str(tmp_path / "tr"),
                 "--no-figures"])


def test_export_killed_while_replacing_leaves_a_set_marked_incomplete(exported, tmp_path,
                                                                      monkeypatch):
    """A failure (kill, full disk) after the first file of a new set was moved into place: the
    folder holds the new table and the old report; the set has no manifest, check_export says
    so and the table is not traced. Before, nothing marked the mix."""
    import optgrade.export as ex
    from optgrade.export import ExportError, check_export
    from optgrade.study import load_study

    out = _copy_set(exported, tmp_path / "set")
    assert check_export(out)["trial"] == 3
    real_replace, calls = os.replace, []

    def failing_replace(a, b):
        if Path(b).parent == out:  # moving staged files into place (not the staging writes)
            calls.append(b)
            if len(calls) == 2:
                raise OSError(28, "No space left on device")
        return real_replace(a, b)

    monkeypatch.setattr(ex.os, "replace", failing_replace)
    from optgrade.layout import read_table

    layout = read_table(out / "table.csv")
    with pytest.raises(OSError):
        ex.export_layout(load_study(BENCH), layout, out, trial_number=7)
    monkeypatch.setattr(ex.os, "replace", real_replace)
    assert len(calls) == 2  # the new table is in place, the old report beside it
    with pytest.raises(ExportError, match="incomplete"):
        check_export(out)
    assert _trace_table(out / "table.csv", tmp_path) == 2


def test_trace_refuses_an_exported_table_that_does_not_match_its_manifest(exported, tmp_path,
                                                                        capsys):
    """`optgrade trace --layout DIR/table.csv` checks the export set: a table replaced after
    the export (another trial's, or damaged) does not match export.json: exit 2 naming the
    manifest. Before, the table was traced and the set's report described another layout."""
    out = _copy_set(exported, tmp_path / "set")
    table = out / "table.csv"
    assert _trace_table(table, tmp_path) == 0
    lines = table.read_text().splitlines()
    last = lines[-1].split(",")
    last[2] = f"{float(last[2]) - 0.5:g}"  # another height: another trial's table
    table.write_text("\n".join(lines[:-1] + [",".join(last)]) + "\n")
    capsys.readouterr()
    assert _trace_table(table, tmp_path) == 2
    assert "export.json" in capsys.readouterr().err
    (out / "export.json").unlink()  # a set without its manifest is incomplete
    assert _trace_table(table, tmp_path) == 2
    alone = tmp_path / "alone"
    alone.mkdir()
    (alone / "table.csv").write_text(table.read_text())  # copied out on its own: read
    assert _trace_table(alone / "table.csv", tmp_path) == 0
