"""Search loop: determinism, beating random sampling, crash safety (SIGKILL to a worker, to the
owner, Ctrl-C), resume without duplicates or losses, command-line errors.

Most checks use the stand-in physics of tests/search_helpers.py (a quarter-wave conversion
rule) so that they test the search machinery in seconds; the checks on the real example studies
are marked slow. The planted case with the real pipeline
(`test_search_finds_planted_band_solver_case`) takes its answer from direct band solves.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState
from search_helpers import fake_pipeline, fake_study

from optgrade import export_trial
from optgrade.cli import main
from optgrade.search import _owner as search

HERE = Path(__file__).resolve().parent
REPO = HERE.parent


def _run(study, tmp_path, name="run", **kw):
    kw.setdefault("n_jobs", 0)
    kw.setdefault("show_progress", False)
    kw.setdefault("pipeline", fake_pipeline)
    url = f"sqlite:///{tmp_path / (name + '.db')}"
    return search.run_search(study, tmp_path / name, storage=url, **kw), url


def _load(url, name="fake"):
    return optuna.load_study(study_name=name, storage=search.open_storage(url))


def test_seeded_search_is_reproducible(tmp_path):
    """Same seed, same chunking: the same candidates and the same best score."""
    s = fake_study()
    a, ua = _run(s, tmp_path, "a", n_trials=14, chunk_size=4)
    b, ub = _run(s, tmp_path, "b", n_trials=14, chunk_size=4)
    pa = [t.params for t in _load(ua).trials]
    pb = [t.params for t in _load(ub).trials]
    assert pa == pb and a.best_score == b.best_score


@pytest.mark.slow
def test_search_beats_random_on_planted_case(tmp_path):
    """Planted case: the stand-in converts a frequency f when rods have their quarter-wave
    resonance c / (4 h) within 3 % of f (quarter-wave rod, Blevins 1979, f = c / 4L). The
    planted layout is the linear height profile that covers the band exactly,
    h = c / (4 f_lo) .. c / (4 f_hi), with the most rods that fit; its score is computed here
    independently of the search. Over three seeds TPE must beat random sampling with the same
    trial count and come within 0.06 of the planted layout."""
    from search_helpers import fake_trace

    from optgrade.layout import layout_from_cells

    band = (120e3, 280e3)
    base = fake_study(layout__profile="linear", goal__band=band, layout__height=(2e-3, 12e-3))
    h_planted = np.round(np.linspace(5000 / (4 * band[0]), 5000 / (4 * band[1]), 40) / 1e-4) * 1e-4
    planted = fake_trace(base, layout_from_cells(h_planted, 3e-3, 1e-3))
    planted_score = planted.fractions["backward_shear"].mean()
    best_tpe, best_rnd = [], []
    for seed in (1, 2, 3):
        s = fake_study(meta__seed=seed, layout__profile="linear", goal__band=band,
                       layout__height=(2e-3, 12e-3))
        s.meta.name = f"fake{seed}"
        t, _ = _run(s, tmp_path, f"tpe{seed}", n_trials=50, sampler="tpe")
        r, _ = _run(s, tmp_path, f"rnd{seed}", n_trials=50, sampler="random")
        best_tpe.append(t.best_score)
        best_rnd.append(r.best_score)
    assert np.mean(best_tpe) > np.mean(best_rnd)
    assert np.mean(best_tpe) >= planted_score - 0.06


PLANTED_TOML = """
[study]
name = "planted_linear_block"
seed = 5
description = "Invented test case: aluminium block, one row of 1 mm aluminium pins."
scale = "bench"

[substrate]
material = "aluminium_6061"
loss_factor = 0.0

[resonator]
material = "aluminium_6061"
loss_factor = 0.0
diameter = "1 mm"
row_pitch = "4 mm"

[layout]
count = [40, 40]
height = ["4 mm", "10 mm"]
height_step = "0.05 mm"
spacing = "3 mm"
profile = "linear"
entry = "short"
max_length = "130 mm"

[goal]
band = [{lo}, {hi}]
n_frequencies = 48
channel = "blocking"
required_fraction = 0.9
model = "lattice"

[goal.weights]
channel = 1.0

[fabrication]
min_gap = "1 mm"
height_tolerance = "0.02 mm"
slenderness_max = 15

[search]
trials = 60
workers = 2
sampler = "auto"
"""

#: Allowed shortfall of the blocking score (band mean, 48 frequencies) of the planted case.
PLANTED_TOL = 0.1


def _lower_cutoff(study, height, freq):
    """Band solver: (last frequency with, first frequency without) the lower branch of a cell,
    scanning up from the bottom of ``freq``."""
    from optgrade.dispersion import Cell, solve_bands
    from optgrade.ground import Substrate
    from optgrade.resonators import Rod

    sb, rs = study.substrate, study.resonator
    cell = Cell(Substrate(sb.density, sb.cl, sb.ct, sb.loss_factor),
                Rod(rs.youngs_modulus, rs.density, rs.diameter, rs.loss_factor),
                height, study.layout.spacing[0], rs.row_pitch, 0.0)
    has_lower = np.isfinite(solve_bands(cell, freq, model="lattice").branches[0].k)
    assert has_lower[0] and not has_lower.all()
    i = int(np.argmin(has_lower))
    return float(freq[i - 1]), float(freq[i])


def test_search_finds_planted_band_solver_case(tmp_path):
    """Planted case answered by the band solver, not by the search pipeline.

    Invented study: 40 aluminium pins (1 mm) at 3 mm on an aluminium half-space, wave entering
    at the short end, goal: block the surface wave. Direct root solves
    (`optgrade.dispersion._direct.solve_bands`, no tables, 29 frequencies 100-300 kHz) give
    where the lower (surface) branch of the 5 mm and of the 8 mm cell ends. Each cut-off must
    lie below that pin's quarter-wave resonance c_bar / (4 h) of a fixed-free rod (R. D.
    Blevins, *Formulas for Natural Frequency and Mode Shape*, 1979, axial modes of a fixed-free
    bar -- from memory): the surface branch bends over below the resonance. Between the two
    cut-offs every frequency enters the 5 mm end on the lower branch and meets a cell without
    one before the 8 mm end, so the linear row 5 -> 8 mm turns it back: blocking 1. The goal
    band is that interval, shrunk by 2 % of its width at each end and kept inside the grid
    points that bracket the cut-offs.

    Tolerance 0.1 (PLANTED_TOL) of the band-mean blocking: the pipeline uses the tabulated
    surrogate, whose cut-offs differ slightly from the direct solve, and places turning points at
    cell resolution, so a few of the 48 frequencies next to the band ends may leak; 0.1 allows
    about five. Asserted: the planted row scores >= 1 - 0.1 through the real pipeline, and the
    seeded TPE search (60 trials, 2 workers) finds a layout scoring at least the planted
    score - 0.1."""
    from optgrade import objectives
    from optgrade.layout import layout_from_cells
    from optgrade.propagation import trace_study
    from optgrade.study import study_from_text

    probe = study_from_text(PLANTED_TOML.format(lo='"150 kHz"', hi='"250 kHz"'))
    freq = np.linspace(100e3, 300e3, 29)
    h_short, h_tall = 5e-3, 8e-3
    short = _lower_cutoff(probe, h_short, freq)
    tall = _lower_cutoff(probe, h_tall, freq)
    c_bar = np.sqrt(probe.resonator.youngs_modulus / probe.resonator.density)
    assert short[1] <= c_bar / (4 * h_short) and tall[1] <= c_bar / (4 * h_tall)
    lo, hi = tall[1], short[0]  # surely past the tall cut-off, surely below the short one
    assert hi > lo
    lo, hi = lo + 0.02 * (hi - lo), hi - 0.02 * (hi - lo)
    study = study_from_text(PLANTED_TOML.format(lo=f'"{lo / 1e3:.4f} kHz"',
                                                hi=f'"{hi / 1e3:.4f} kHz"'))

    n = study.layout.count[0]
    h = np.round(np.linspace(h_short, h_tall, n) / study.layout.height_step) * \
        study.layout.height_step
    planted_layout = layout_from_cells(h, study.layout.spacing[0], study.resonator.diameter, 0.0,
                                       study.fabrication.height_tolerance)
    tr = trace_study(study, planted_layout)
    planted = objectives.get("channel").evaluate(tr, planted_layout, study,
                                                 objectives.EvalContext()).score
    assert planted >= 1.0 - PLANTED_TOL

    out = search.run_search(study, tmp_path / "out", n_trials=60, n_jobs=2,
                            storage=f"sqlite:///{tmp_path / 'p.db'}", show_progress=False)
    assert out.best_score >= planted - PLANTED_TOL


def test_existing_study_needs_resume_and_resume_tops_up(tmp_path):
    s = fake_study()
    _, url = _run(s, tmp_path, "r", n_trials=10)
    with pytest.raises(search.SearchError, match="--resume"):
        _run(s, tmp_path, "r", n_trials=20)
    out, _ = _run(s, tmp_path, "r", n_trials=20, is_resume=True)
    assert out.n_told_now == 10 and out.n_finished == 20
    assert len(search.finished_trials(_load(url))) == 20
    attrs = _load(url).user_attrs
    assert attrs["study_hash"] == search.study_hash(s) and attrs["package_version"]
    changed = fake_study(goal__band=(100e3, 250e3))  # same name, different study
    with pytest.raises(search.SearchError, match="changed"):
        _run(changed, tmp_path, "r", n_trials=30, is_resume=True)


def test_framework_ceiling_dry_run(tmp_path):
    """Scoring switched off: the storage and sampler alone (figure in docs/search.md)."""
    out, url = _run(fake_study(), tmp_path, "dry", n_trials=20, is_dry=True)
    assert out.n_finished == 20 and out.trials_per_second > 1.0


def test_pool_workers_score_like_owner(tmp_path):
    """Two worker processes score exactly as the owner does (random sampler, so that both runs
    see the same candidates whatever the number of chunks in flight)."""
    s = fake_study()
    a, ua = _run(s, tmp_path, "own", n_trials=10, chunk_size=2, n_jobs=0, sampler="random")
    b, ub = _run(s, tmp_path, "pool", n_trials=10, chunk_size=2, n_jobs=2, sampler="random")
    va = [t.values for t in _load(ua).trials]
    vb = [t.values for t in _load(ub).trials]
    assert va == vb


SCRIPT = textwrap.dedent("""
    import json, sys
    sys.path.insert(0, {here!r})
    from search_helpers import fake_study, slow_pipeline
    from optgrade.search import _owner as search
    s = fake_study()
    out = search.run_search(s, {out!r}, n_trials={n}, n_jobs=2, storage={url!r},
                            pipeline=slow_pipeline, show_progress=False, chunk_size=2,
                            is_resume={resume})
    if {export} and out.best_number is not None:  # what `optgrade search` does after the run
        from optgrade import export_trial
        export_trial(s, {url!r}, out.best_number, {out!r}, context=out.context)
    print(json.dumps({{"restarts": out.n_pool_restarts, "told": out.n_told_now,
                      "recovered": out.n_recovered, "interrupted": out.is_interrupted}}))
    sys.exit(130 if out.is_interrupted else 0)
""")


def _start(tmp_path, n, resume=False, export=False):
    url = f"sqlite:///{tmp_path / 'k.db'}"
    code = SCRIPT.format(here=str(HERE), out=str(tmp_path / "out"), n=n, url=url,
                         resume=resume, export=export)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    return proc, url


def _n_complete(url) -> int:
    try:
        st = _load(url)
    except Exception:
        return 0
    return len(st.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)))


def _wait_for(url, n, proc, timeout=120):
    t0 = time.time()
    while _n_complete(url) < n:
        assert proc.poll() is None, proc.stderr.read()
        assert time.time() - t0 < timeout
        time.sleep(0.2)


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        text = (task / "children").read_text().split()
        out += [int(c) for c in text]
    return out


def _loky_workers(pid: int) -> list[int]:
    out = []
    for c in _children(pid):
        try:
            cmd = Path(f"/proc/{c}/cmdline").read_bytes().decode(errors="replace")
        except FileNotFoundError:
            continue
        if "popen_loky" in cmd:
            out.append(c)
    return out


def _check_no_duplicates(url, n):
    st = _load(url)
    trials = st.get_trials(deepcopy=False)
    done = search.finished_trials(st)
    assert len(done) == n
    lost = {t.number for t in trials if t.user_attrs.get("lost")}
    requeued = [t.user_attrs["requeued_from"] for t in done if "requeued_from" in t.user_attrs]
    assert len(requeued) == len(set(requeued)) and set(requeued) <= lost
    assert not [t for t in trials if t.state == TrialState.RUNNING]


@pytest.mark.slow
def test_sigkill_worker_loses_nothing(tmp_path):
    """SIGKILL one worker mid-run: the owner survives, re-scores the chunks in flight in a fresh
    pool, and the storage ends with exactly the requested finished trials."""
    proc, url = _start(tmp_path, n=40)
    _wait_for(url, 6, proc)
    before = _n_complete(url)
    workers = _loky_workers(proc.pid)
    assert workers, "no worker process found"
    os.kill(workers[0], signal.SIGKILL)
    out, err = proc.communicate(timeout=180)
    assert proc.returncode == 0, err
    info = json.loads(out.strip().splitlines()[-1])
    assert info["restarts"] >= 1
    assert _n_complete(url) >= before
    _check_no_duplicates(url, 40)


@pytest.mark.slow
def test_sigkill_owner_then_resume(tmp_path):
    """SIGKILL the owner: every told trial stays; --resume re-queues the lost ones and completes
    the count with no duplicate and no lost trial."""
    proc, url = _start(tmp_path, n=40)
    _wait_for(url, 8, proc)
    workers = _loky_workers(proc.pid)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    for w in workers:  # our own processes, by id
        try:
            os.kill(w, signal.SIGKILL)
        except ProcessLookupError:
            pass
    told = _n_complete(url)
    st = _load(url)
    running = st.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    assert told >= 8
    proc2, _ = _start(tmp_path, n=40, resume=True)
    out, err = proc2.communicate(timeout=180)
    assert proc2.returncode == 0, err
    info = json.loads(out.strip().splitlines()[-1])
    assert info["recovered"] == len(running)
    assert info["told"] == 40 - told
    _check_no_duplicates(url, 40)


@pytest.mark.slow
def test_ctrl_c_finishes_batch_exports_and_exits_130(tmp_path):
    proc, url = _start(tmp_path, n=400, export=True)
    _wait_for(url, 6, proc)
    os.kill(proc.pid, signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    st = _load(url)
    assert not st.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    assert (tmp_path / "out" / "table.csv").is_file()
    assert _n_complete(url) < 400


def test_cli_existing_study_without_resume_exit_2(tmp_path, capsys):
    """The command refuses to overwrite a stored search (exit 2, names --resume) before any
    physics is built."""
    study = REPO / "studies" / "bench_backward_shear.toml"
    url = f"sqlite:///{tmp_path / 'study.db'}"
    optuna.create_study(study_name="bench_backward_shear", storage=search.open_storage(url))
    assert main(["search", str(study), "--out", str(tmp_path), "--quiet"]) == 2
    assert "--resume" in capsys.readouterr().err


def test_cli_bad_input_exit_2(tmp_path, capsys):
    assert main(["search", str(tmp_path / "missing.toml"), "--out", str(tmp_path)]) == 2
    study = REPO / "studies" / "bench_backward_shear.toml"
    assert main(["search", str(study), "--out", str(tmp_path), "--trials", "0"]) == 2
    assert "--trials" in capsys.readouterr().err
    assert main(["search", str(study), "--out", str(tmp_path), "--storage",
                 "nosuchdb://x"]) == 2
    assert "--storage" in capsys.readouterr().err


def _example(name, **changes):
    from optgrade.study import load_study

    s = load_study(REPO / "studies" / name)
    meta = s.meta.model_copy(update=changes)
    return s.model_copy(update={"meta": meta})


#: Seeds per example for the comparison with random sampling (see the test's docstring).
EXAMPLE_SEEDS = {"bench_backward_shear.toml": (3,), "site_ground_barrier.toml": (1, 2, 3, 4, 5, 6)}


@pytest.mark.slow
@pytest.mark.parametrize("name", ["bench_backward_shear.toml", "site_ground_barrier.toml"])
def test_examples_search_beats_random(tmp_path, name):
    """Both example studies, real surrogate and propagation: the default sampler's best score
    after 40 trials beats random sampling's with the same count and seeds (2 workers; the
    search is deterministic for a given seed, worker count and chunk size), by at least 0.02
    on the mean over the seeds.

    Bench example: one seed (3). Site example: mean over seeds 1-6, because with the blocking
    goal measured against the bare damped ground the sampler's edge there is small against the
    seed-to-seed spread (measured: TPE better on 4 of 6 seeds, worse on seed 3; figures in
    docs/search.md)."""
    best = {"auto": [], "random": []}
    for seed in EXAMPLE_SEEDS[name]:
        s = _example(name, seed=seed)
        for sampler in best:
            url = f"sqlite:///{tmp_path / f'{sampler}{seed}.db'}"
            out = search.run_search(s, tmp_path / f"{sampler}{seed}", n_trials=40, n_jobs=2,
                                    storage=url, sampler=sampler, show_progress=False)
            best[sampler].append(out.best_score)
    assert np.mean(best["auto"]) > np.mean(best["random"]) + 0.02


def test_journal_storage_and_resume(tmp_path):
    """optuna's journal file storage (for shared file systems) works through `journal:PATH`."""
    s = fake_study()
    url = f"journal:{tmp_path / 'j.log'}"
    kw = dict(n_jobs=0, storage=url, pipeline=fake_pipeline, show_progress=False)
    search.run_search(s, tmp_path / "j", n_trials=5, **kw)
    out = search.run_search(s, tmp_path / "j", n_trials=9, is_resume=True, **kw)
    assert out.n_told_now == 4 and out.n_finished == 9


def test_multi_objective_pareto_and_export(tmp_path):
    """Two goals with opposite directions: NSGA-II by default, one direction per goal, the
    exported trial lies on the Pareto front and the sheet gets its Pareto panel."""
    s = fake_study()
    s.search.objectives = ["channel", "compactness"]
    out, url = _run(s, tmp_path, "mo", n_trials=16)
    export_trial(s, url, out.best_number, tmp_path / "mo", context=out.context)
    st = _load(url)
    assert [d.name for d in st.directions] == ["MAXIMIZE", "MINIMIZE"]
    assert isinstance(search.make_sampler("auto", 1, multi=True), optuna.samplers.NSGAIISampler)
    front = {t.number for t in st.best_trials}
    assert out.best_number in front
    res = json.loads((tmp_path / "mo" / "result.json").read_text())
    assert res["trial"] == out.best_number
    assert set(res["objectives"]) >= {"channel", "compactness"}


def test_remembered_modes_serve_path_only_calls_but_not_the_reverse():
    """The search's surrogate proxy: a full ``local_modes`` call of the same cells serves a
    later row request (``path``, the nominal trace of a study with the robustness goal), a row
    result never serves a full call, other cells are solved anew, and with ``is_full`` (the
    robustness goal) every call is a full one."""
    from optgrade.dispersion import RowPath

    calls = []
    row = RowPath(entry_order=(0, 1))

    class Counting:
        cr = 2900.0

        def local_modes(self, height, spacing, head_mass, freq, *, path=None):
            calls.append(path)
            return ("path" if path is not None else "full", float(np.sum(height)))

    proxy = search._LastModes(Counting())
    h, a, m, f = np.array([1.0, 2.0]), np.array([0.1, 0.1]), np.zeros(2), np.array([5.0])
    assert proxy.local_modes(h, a, m, f) == ("full", 3.0)
    assert proxy.local_modes(h, a, m, f, path=row) == ("full", 3.0)
    assert calls == [None]
    assert proxy.local_modes(h + 1, a, m, f, path=row) == ("path", 5.0)
    assert proxy.local_modes(h + 1, a, m, f) == ("full", 5.0)
    assert calls == [None, row, None]
    calls.clear()
    full = search._LastModes(Counting(), is_full=True)
    assert full.local_modes(h, a, m, f, path=row) == ("full", 3.0)
    assert full.local_modes(h, a, m, f) == ("full", 3.0)
    assert calls == [None]
