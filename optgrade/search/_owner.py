"""Inverse-design search: one owner process, optuna ask-and-tell, a pool of scoring workers.

Design (see docs/search.md for the measurements behind it):

- **One owner** talks to the optuna storage (a SQLite file ``DIR/study.db`` by default, any
  optuna database URL, or ``journal:PATH`` for optuna's journal file storage). Workers never
  open the storage, so several workers cannot lock each other out of a SQLite file.
- **Workers only score.** A joblib (loky) process pool; each worker builds the study's
  evaluation context (surrogate tables from the disk cache) once and keeps it in a module-level
  cache keyed by the study hash. The owner asks candidates in chunks of ``chunk_size`` and keeps
  one chunk per worker in flight (two were measured: no faster, and staler fits); chunks are
  told back in the order they were asked (FIFO), so the sequence of asks and tells, and with
  it the whole search, is reproducible for a given seed, worker count and chunk size.
- **A chunk is one sampler fit.** Samplers with a ``sample_batch`` method (TPE, random) give
  the whole chunk from one read of the study and one fit; each trial is then created in one
  storage write with its parameters (then heartbeat, then owner tag, as optuna's ask path), and
  told straight to the storage (no read-back). Queued re-enqueued trials and the other
  samplers go through optuna's ``ask``. Why: the loop, not the physics, set the pace
  (docs/search.md, "Where the loop's time goes").
- **Crash safety.** A told trial is in storage. A worker killed by a signal breaks the pool
  (``TerminatedWorkerError``): the owner survives, starts a fresh pool and re-scores the chunks
  that were in flight, so no finished trial is lost and none is told twice. A chunk that kills
  its worker twice is scored one candidate at a time; a candidate that kills a worker twice is
  told FAIL. If the owner itself dies, its asked-but-untold trials stay RUNNING in storage;
  ``resume`` marks those of this host whose owner process is gone FAIL (user attr
  ``lost=True``) and re-enqueues their parameters, so the sampler's candidates are scored after
  all. Trials of owners on other hosts or still alive are left alone (shared-storage runs).
- **Counting.** ``n_trials`` counts finished trials: COMPLETE ones plus FAIL ones that were
  scored (an error in scoring); lost trials do not count. ``resume`` continues to ``n_trials``.
- **Ctrl-C** (SIGINT) stops asking, waits for the chunks in flight, tells them and returns
  ``is_interrupted=True`` (the command exports the best trial so far and exits 130).

The search never writes exports: ``optgrade search`` calls :func:`run_search` and then
:func:`optgrade.export.export_trial` with the outcome's context.
"""

from __future__ import annotations

import datetime
import functools
import hashlib
import json
import math
import os
import signal
import sys
import time
import warnings
from collections import deque
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import optuna
from optuna.exceptions import UpdateFinishedTrialError
from optuna.trial import FrozenTrial, TrialState

from optgrade import __version__, fabrication, objectives, profiles, propagation
from optgrade.dispersion import RowPath
from optgrade.propagation import PROPAGATION_MODELS, PropagationModel, Trace, WKBMarch
from optgrade.search._errors import SearchError
from optgrade.search._lease import (
    HeartbeatThread,
    admit,
    count_state,
    finished_trials,
    new_owner_id,
    owner_is_alive,
    params_key,
    recover_lost,
    session_seed,
)
from optgrade.search._samplers import DEFAULT_SAMPLER, TPE_STARTUP, make_sampler
from optgrade.search._storage import (
    default_storage,
    heartbeat_seconds,
    is_heartbeat_storage,
    mask_url,
    open_storage,
)

if TYPE_CHECKING:  # pragma: no cover
    from optgrade.layout import Layout
    from optgrade.study import Study

__all__ = [
    "DEFAULT_CHUNK",
    "DEFAULT_SAMPLER",
    "INFEASIBLE_PENALTY",
    "TPE_STARTUP",
    "SearchError",
    "SearchOutcome",
    "best_trial",
    "default_storage",
    "evaluate_params",
    "finished_trials",
    "load_search",
    "make_context",
    "make_sampler",
    "mask_url",
    "open_storage",
    "recover_lost",
    "run_search",
    "study_hash",
]

#: Candidates per worker chunk when the study does not say.
DEFAULT_CHUNK = 4
#: Rounds in a row in which every asked candidate was dropped before the owner gives up.
MAX_EMPTY_ASKS = 50
#: Penalty subtracted from the weighted score of a layout that breaks a fabrication limit.
INFEASIBLE_PENALTY = 10.0

optuna.logging.set_verbosity(optuna.logging.WARNING)


# ---------------------------------------------------------------------------------------------
# identity of a study


def study_hash(study: Study) -> str:
    """sha256 of the study's resolved SI content (what the scores depend on)."""
    try:
        data = study.to_si_dict()
        data.pop("source_path", None)
        data.pop("source_sha256", None)
        text = json.dumps(data, sort_keys=True, default=str)
    except AttributeError:  # a stand-in study built from plain namespaces (tests)
        text = repr(study)
    return hashlib.sha256(text.encode()).hexdigest()


def file_hash(study: Study) -> str | None:
    """sha256 of the study file, if the study came from one."""
    sha = getattr(study, "source_sha256", None)
    if sha:
        return sha
    path = getattr(study, "source_path", None)
    if path and Path(path).is_file():
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    return None


# ---------------------------------------------------------------------------------------------
# evaluation


class _LastModes:
    """Surrogate proxy that remembers the last ``local_modes`` call (the nominal trace and the
    robustness goal ask for the same cells).

    A row request (``path``, the points the march reads) is served from a remembered full call
    of the same cells; a full call is never served from a row request. With ``is_full`` every
    call is a full one (a study with the robustness goal, which reads the nominal cells' full
    modes right after the nominal trace)."""

    def __init__(self, surrogate: Any, *, is_full: bool = False) -> None:
        self.surrogate = surrogate
        self.is_full = is_full
        self._last: tuple[bytes, RowPath | None, Any] | None = None

    @property
    def cr(self) -> float:
        """Rayleigh speed of the bare ground (m/s)."""
        return self.surrogate.cr

    def local_modes(self, height, spacing, head_mass, freq, *, path: RowPath | None = None):
        arrays = [np.ascontiguousarray(v, dtype=float) for v in (height, spacing, head_mass,
                                                                  freq)]
        key = b"|".join(a.tobytes() for a in arrays)
        path = None if self.is_full else path
        last = self._last
        if last is not None and last[0] == key and (last[1] is None or last[1] == path):
            return last[2]
        modes = self.surrogate.local_modes(height, spacing, head_mass, freq, path=path)
        self._last = (key, path, modes)
        return modes


def _real_pipeline(study: Study) -> tuple[PropagationModel, Callable[[Layout], Trace]]:
    """The study's propagation model (``goal.propagation``) and its trace function.

    A WKB march gets the study's surrogate (disk-cached tables) behind a :class:`_LastModes`
    proxy, so the robustness goal's nominal cells are not solved twice."""
    if issubclass(PROPAGATION_MODELS.get(study.goal.propagation), WKBMarch):
        from optgrade.dispersion import surrogate_for_study

        is_full = "robustness" in goal_names(study)
        proxy = _LastModes(surrogate_for_study(study), is_full=is_full)
        model = propagation.propagation_model(study, dispersion=proxy)
    else:
        model = propagation.propagation_model(study)
    model.far_face_detail = False  # the search scores the far-face zone only
    return model, model.trace


def make_context(study: Study, pipeline: Callable | None = None) -> objectives.EvalContext:
    """Evaluation context: propagation model and trace functions built once for ``study``.

    ``pipeline(study) -> (model or None, trace_fn)`` replaces the real dispersion/propagation
    stages (tests use a stand-in); it must be a picklable module-level function. Perturbed
    layouts (robustness) are traced with the model's own way
    (:func:`optgrade.propagation.height_error_traces`), or with ``trace_fn`` when the pipeline
    gives no model.
    """
    model, trace_fn = (pipeline or _real_pipeline)(study)
    trace_height_errors = (
        None if model is None else functools.partial(propagation.height_error_traces, model)
    )
    return objectives.EvalContext(trace_fn=trace_fn, trace_height_errors=trace_height_errors,
                                  model=model, seed=int(study.meta.seed))


def goal_names(study: Study) -> list[str]:
    """Goals to evaluate: those with a weight and those named as search objectives."""
    out = [n for n, w in study.goal.weights.items() if w]
    out += [n for n in study.search.objectives if n != "weighted" and n not in out]
    return out


def is_multi_objective(study: Study) -> bool:
    """Does the study optimise a Pareto front (several ``[search] objectives``)?"""
    return len(study.search.objectives) > 1


def directions(study: Study) -> list[str]:
    """Optuna directions: one ``maximize`` for the weighted score, else one per objective."""
    if not is_multi_objective(study):
        name = study.search.objectives[0] if study.search.objectives else "weighted"
        return ["maximize" if name == "weighted" else objectives.get(name).direction]
    return [
        "maximize" if n == "weighted" else objectives.get(n).direction
        for n in study.search.objectives
    ]


def evaluate_params(
    study: Study, params: dict[str, Any], context: objectives.EvalContext
) -> dict[str, Any]:
    """Score one parameter point: layout, fabrication check, trace, goals.

    Returns
    -------
    dict with ``values`` (what optuna is told), ``score`` (weighted, larger is better, with the
    infeasibility penalty), ``objectives`` (name -> {score, details}), ``violations`` (list of
    dicts), ``constraints`` (optuna constraint vector, feasible when <= 0), ``n_non_adiabatic``.
    """
    layout = profiles.layout_from_params(study, params)
    violations = fabrication.check_layout(study, layout)
    trace = context.trace_fn(layout)
    names = goal_names(study)
    vals = objectives.evaluate_many(names, trace, layout, study, context)
    weights = {n: w for n, w in study.goal.weights.items() if w}
    score = objectives.weighted_score(vals, weights)
    constraints = fabrication.constraint_values(violations)
    if violations:
        score -= INFEASIBLE_PENALTY * (1.0 + constraints[0])
    wanted = study.search.objectives or ["weighted"]
    told = [score if n == "weighted" else vals[n].score for n in wanted]
    eps = np.asarray(trace.eps_max, dtype=float)
    return {
        "values": [float(v) if math.isfinite(v) else -1e9 for v in told],
        "score": float(score),
        "objectives": {n: {"score": v.score, "details": v.details} for n, v in vals.items()},
        "violations": [v.to_dict() for v in violations],
        "constraints": constraints,
        "n_non_adiabatic": int(np.sum(eps > 0.1)),
    }


# ---------------------------------------------------------------------------------------------
# worker side

_CONTEXTS: dict[str, objectives.EvalContext] = {}


def _worker_init() -> None:
    """Workers ignore Ctrl-C: the owner decides when to stop and waits for their chunk."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _score_chunk(
    study: Study, key: str, pipeline: Callable | None, chunk: list[tuple[int, dict]],
    is_dry: bool
) -> list[dict[str, Any]]:
    """Score a chunk of (trial number, params) in a worker; context cached per study hash."""
    out = []
    if is_dry:  # framework ceiling: no physics at all
        n = max(len(study.search.objectives), 1)
        return [{"number": num, "values": [0.0] * n, "score": 0.0, "objectives": {},
                 "violations": [], "constraints": [0.0], "n_non_adiabatic": 0}
                for num, _ in chunk]
    ctx = _CONTEXTS.get(key)
    if ctx is None:
        ctx = _CONTEXTS[key] = make_context(study, pipeline)
    for number, params in chunk:
        t0 = time.perf_counter()
        try:
            res = evaluate_params(study, params, ctx)
        except Exception as exc:  # a scoring error fails this trial, not the search
            res = {"error": f"{type(exc).__name__}: {exc}"}
        res["number"] = number
        res["seconds"] = time.perf_counter() - t0
        out.append(res)
    return out


# ---------------------------------------------------------------------------------------------
# storage and sampler


def load_search(study: Study, storage: str) -> optuna.Study:
    """The stored optuna study of ``study`` (by ``study.meta.name``) in ``storage`` (a URL).

    Raises
    ------
    SearchError
        The storage cannot be opened, holds no study of that name, or holds one run with a
        different study file (the stored trials would not match its layouts).
    """
    store = open_storage(storage)
    names = optuna.study.get_all_study_names(store)
    if study.meta.name not in names:
        present = ", ".join(repr(n) for n in sorted(names)[:20]) or "none"
        more = f" and {len(names) - 20} more" if len(names) > 20 else ""
        raise SearchError("--storage", f"no study named {study.meta.name!r} in "
                          f"{mask_url(storage)} (the study file's [study] name); studies "
                          f"stored there: {present}{more}")
    ostudy = optuna.load_study(study_name=study.meta.name, storage=store)
    stored_hash = ostudy.user_attrs.get("study_hash")
    if stored_hash and stored_hash != study_hash(study):
        raise SearchError("STUDY", "this study file differs from the one the search ran with; "
                          "the layout would not match the stored trial")
    return ostudy


def best_trial(ostudy: optuna.Study) -> optuna.trial.FrozenTrial | None:
    """Complete trial with the largest weighted score (on the Pareto front if multi-objective)."""
    complete = [t for t in ostudy.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))]
    if not complete:
        return None
    if len(ostudy.directions) > 1:
        complete = ostudy.best_trials or complete
    return max(complete, key=lambda t: (t.user_attrs.get("score", -math.inf), -t.number))


# ---------------------------------------------------------------------------------------------
# the owner loop


@dataclass
class SearchOutcome:
    """What a search run did."""

    storage: str
    study_name: str
    n_finished: int
    n_told_now: int
    n_recovered: int
    n_pool_restarts: int
    seconds: float
    best_number: int | None
    best_score: float | None
    is_interrupted: bool = False
    history: list[tuple[float, float]] = field(default_factory=list)  # (seconds, best score)
    #: the evaluation context the search scored with (for exporting without rebuilding it)
    context: objectives.EvalContext | None = field(default=None, repr=False)

    @property
    def trials_per_second(self) -> float:
        return self.n_told_now / self.seconds if self.seconds > 0 else 0.0


@contextmanager
def _sigint_flag() -> Iterator[dict[str, bool]]:
    """Turn the first Ctrl-C into a stop flag; a second one interrupts at once."""
    flag = {"stop": False}
    try:
        previous = signal.getsignal(signal.SIGINT)
    except ValueError:  # pragma: no cover
        previous = None

    def handler(signum, frame):  # noqa: ARG001
        if flag["stop"]:
            raise KeyboardInterrupt
        flag["stop"] = True

    try:
        signal.signal(signal.SIGINT, handler)
        is_installed = True
    except ValueError:  # not the main thread
        is_installed = False
    try:
        yield flag
    finally:
        if is_installed:
            signal.signal(signal.SIGINT, previous)


def _executor(n_jobs: int):
    from joblib.externals.loky import get_reusable_executor

    return get_reusable_executor(max_workers=n_jobs, initializer=_worker_init, timeout=60)


def _progress(enabled: bool, total: int, done: int):
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    is_live = enabled and sys.stderr.isatty()
    prog = Progress(
        TextColumn("[bold]search[/]"), BarColumn(), MofNCompleteColumn(),
        TextColumn("{task.fields[rate]:.1f} trials/s"), TextColumn("best {task.fields[best]}"),
        TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
        disable=not is_live, transient=False, console=Console(stderr=True),
    )
    task = prog.add_task("search", total=total, completed=done, rate=0.0, best="-")
    plain = _PlainProgress(total, done) if enabled and not is_live else None
    return prog, task, plain


class _PlainProgress:
    """Progress as plain lines on stderr when it is not a terminal (a log, a pipe): one line
    at every further tenth of the trials, or every PLAIN_EVERY seconds, with the time left."""

    PLAIN_EVERY = 30.0

    def __init__(self, total: int, done: int) -> None:
        self.total = max(int(total), 1)
        self.t0 = self.t_last = time.monotonic()
        self.next_tenth = (10 * int(done)) // self.total + 1

    def update(self, n: int, rate: float, best: float | None) -> None:
        n = min(int(n), self.total)  # the count may run past the total by the trials in flight
        now = time.monotonic()
        tenth = (10 * int(n)) // self.total
        if tenth < self.next_tenth and now - self.t_last < self.PLAIN_EVERY and n < self.total:
            return
        self.next_tenth = tenth + 1
        self.t_last = now
        left = ""
        if rate > 0 and n < self.total:
            left = f", about {_duration((self.total - n) / rate)} left"
        best_text = f"{best:.4f}" if best is not None else "-"
        print(f"search: {n} of {self.total} trials ({rate:.1f} trials/s, best {best_text}, "
              f"{_duration(now - self.t0)} spent{left})", file=sys.stderr, flush=True)


def _duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _write_identity(ostudy: optuna.Study, study: Study, key: str) -> None:
    """Identity attributes, written right after the study is created and before anything slow
    (a run interrupted while building tables must not leave a study that accepts any file)."""
    ostudy.set_user_attr("study_hash", key)  # first: what a resume checks
    ostudy.set_user_attr("package_version", __version__)
    ostudy.set_user_attr("study_file_sha256", file_hash(study))
    ostudy.set_user_attr("search_space", sorted(profiles.search_space(study)))


def _check_identity(ostudy: optuna.Study, study: Study, key: str) -> None:
    """Refuse a stored study of another study file; adopt an empty one without identity."""
    deadline = time.monotonic() + 2.0  # an owner that created it a moment ago is writing it
    while True:
        stored = ostudy.user_attrs.get("study_hash")
        n_stored = ostudy._storage.get_n_trials(ostudy._study_id)
        if stored is not None or n_stored > 0 or time.monotonic() > deadline:
            break
        time.sleep(0.1)
    if stored is None:
        if n_stored:
            raise SearchError("STUDY", "the stored study has trials but no record of the study "
                              "file it ran with, so this file cannot be checked against it; "
                              "use a new --out or --storage")
        _write_identity(ostudy, study, key)
    elif stored != key:
        raise SearchError("STUDY", "the study file changed since this search started "
                          f"(stored hash {stored[:12]}, now {key[:12]}); use a new --out")


def _open_study(store: Any, study: Study, url: str, *, is_resume: bool,
                key: str) -> tuple[optuna.Study, bool, bool]:
    """(optuna study, existed before, created by this run); identity written or checked."""
    name = study.meta.name
    exists = name in optuna.study.get_all_study_names(store)
    refuse = SearchError("--storage", f"study {name!r} already exists in {mask_url(url)}; "
                         "pass --resume to continue it, or choose another --out or --storage")
    if exists and not is_resume:
        raise refuse
    is_first = False
    if not exists:
        try:
            optuna.create_study(storage=store, study_name=name, directions=directions(study))
            is_first = True
        except optuna.exceptions.DuplicatedStudyError:  # another owner created it just now
            if not is_resume:
                raise refuse from None
            exists = True
    ostudy = optuna.load_study(study_name=name, storage=store)
    if is_first:
        _write_identity(ostudy, study, key)
    else:
        _check_identity(ostudy, study, key)
    return ostudy, exists, is_first


def _seen_params(ostudy: optuna.Study) -> dict[tuple, int]:
    """Parameter sets already scored or being scored in the study -> trial number."""
    from optgrade.search._lease import is_counted

    out = {}
    for t in ostudy.get_trials(deepcopy=False):
        if t.params and (is_counted(t) or t.state == TrialState.RUNNING):
            out.setdefault(params_key(t.params), t.number)
    return out


def _worth_waiting(running: list, me: str, is_hb: bool) -> bool:
    """Are other owners' running trials worth waiting for (they may still finish, or will be
    found lost)? Trials of other hosts without heartbeats cannot be judged: not waited for."""
    for t in running:
        owner = t.user_attrs.get("owner", "")
        if owner == me:
            continue
        if is_hb or (owner and owner.split(":")[0] == me.split(":")[0]
                     and owner_is_alive(owner, me)):
            return True
    return False


def run_search(
    study: Study,
    out_dir: str | os.PathLike,
    *,
    n_trials: int | None = None,
    n_jobs: int | None = None,
    storage: str | None = None,
    is_resume: bool = False,
    sampler: str | None = None,
    chunk_size: int | None = None,
    pipeline: Callable | None = None,
    is_dry: bool = False,
    show_progress: bool = True,
    on_told: Callable[[int], None] | None = None,
    time_budget: float | None = None,
) -> SearchOutcome:
    """Run (or resume, or join) the search of ``study``; results in ``storage`` (default in
    ``out_dir``).

    Exports are not written here: pass the outcome to :func:`optgrade.export.export_trial`
    (``optgrade search`` does). Several owners (processes, machines) may run on one storage
    URL at once with ``is_resume=True``: together they finish exactly ``n_trials`` trials
    (optgrade/search/_lease.py).

    Parameters
    ----------
    n_trials : finished trials wanted in total, for the whole study (default
        ``study.search.trials``).
    n_jobs : worker processes (default ``study.search.workers``); 0 scores in the owner process.
    storage : optuna URL (default SQLite ``DIR/study.db``; ``journal:PATH`` for a journal file).
    is_resume : continue or join an existing study of the same name (refused otherwise if it
        exists); creates it if missing.
    sampler : sampler name (default ``study.search.sampler``); seeded with the study seed in the
        run that creates the study, with a seed derived from it and the owner id otherwise.
    chunk_size : candidates per worker task (default from ``study.search.batch_size``).
    pipeline : stand-in for the physics ``(study) -> (model or None, trace_fn)`` (tests).
    is_dry : skip all scoring (framework-ceiling measurement).
    on_told : callback with the number of trials told so far in this run (tests).
    time_budget : stop asking after this many seconds (benchmarks); the chunks in flight are
        still told.
    """
    t_start = time.perf_counter()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    n_trials = int(n_trials if n_trials is not None else study.search.trials)
    n_jobs = int(n_jobs if n_jobs is not None else study.search.workers)
    url = storage or study.search.storage or default_storage(out_dir)
    store = open_storage(url)
    key = study_hash(study)
    owner = new_owner_id()
    ostudy, exists, is_first = _open_study(store, study, url, is_resume=is_resume, key=key)
    ostudy.sampler = make_sampler(sampler or study.search.sampler,
                                  session_seed(int(study.meta.seed), owner, is_first),
                                  is_multi_objective(study))
    def say(message: str) -> None:
        if show_progress:
            print(f"search: {message}", file=sys.stderr, flush=True)

    context = None
    if not is_dry:
        t_tab = time.perf_counter()
        say("building or loading the dispersion and row-model tables ...")
        context = make_context(study, pipeline)  # builds/loads the tables once, before workers
        say(f"tables ready in {_duration(time.perf_counter() - t_tab)}")
    if "table_hashes" not in ostudy.user_attrs:
        ostudy.set_user_attr("table_hashes", _table_hashes(context))
    n_recovered = recover_lost(ostudy, owner) if exists else 0
    chunk_size = int(chunk_size or max(1, (study.search.batch_size or DEFAULT_CHUNK * n_jobs)
                                       // max(n_jobs, 1)))
    loop = _OwnerLoop(study, ostudy, owner, key, n_trials, n_jobs, chunk_size, pipeline, is_dry,
                      context, t_start, on_told)
    loop.n_recovered = n_recovered
    prog, task, plain = _progress(show_progress, n_trials, len(finished_trials(ostudy)))
    say(f"scoring up to {n_trials} trials in total with "
        + (f"{n_jobs} worker process{'es' if n_jobs != 1 else ''}" if n_jobs > 0
           else "this process") + (f"; {n_recovered} lost trials recovered" if n_recovered
                                   else ""))

    def update(n: int, rate: float, best: float | None) -> None:
        prog.update(task, completed=n, rate=rate,
                    best=f"{best:.4f}" if best is not None else "-")
        if plain is not None:
            plain.update(n, rate, best)

    with _sigint_flag() as flag, prog, HeartbeatThread(store, loop.trial_ids) as beats:
        loop.beats = beats
        loop.run(flag, time_budget, update)
    n_finished = len(finished_trials(ostudy))
    return SearchOutcome(
        storage=url, study_name=study.meta.name, n_finished=n_finished,
        n_told_now=loop.told_now, n_recovered=loop.n_recovered,
        n_pool_restarts=loop.pool_restarts, seconds=time.perf_counter() - t_start,
        best_number=loop.best_number, best_score=loop.best_score,
        is_interrupted=loop.is_interrupted and n_finished < n_trials, history=loop.history,
        context=context,
    )


@dataclass
class _Asked:
    """A trial this owner asked: its number and id in the storage, parameters, the lost trial
    it replaces, and the optuna Trial when it was asked through optuna (else None)."""

    number: int
    trial_id: int
    params: dict[str, Any]
    requeued_from: int | None
    trial: optuna.trial.Trial | None


def _trial_number(storage: Any, trial_id: int) -> int:
    """Number of a trial just created through ``storage`` (optuna's cache knows it)."""
    known = getattr(storage, "_trial_id_to_study_id_and_number", {}).get(trial_id)
    return int(known[1]) if known is not None else int(storage.get_trial_number_from_id(trial_id))


class _OwnerLoop:
    """The ask / score / tell loop of one owner (state shared by its small steps)."""

    def __init__(self, study, ostudy, owner, key, n_trials, n_jobs, chunk_size, pipeline, is_dry,
                 context, t_start, on_told) -> None:
        self.study, self.ostudy, self.owner, self.key = study, ostudy, owner, key
        self.n_trials, self.n_jobs, self.chunk_size = n_trials, n_jobs, chunk_size
        self.pipeline, self.is_dry, self.context = pipeline, is_dry, context
        self.t_start, self.on_told = t_start, on_told
        self.space = profiles.search_space(study)
        self.multi = is_multi_objective(study)
        self.is_hb = is_heartbeat_storage(ostudy._storage)
        self.pending: dict[int, optuna.trial.Trial] = {}
        self.trial_ids: dict[int, int] = {}  # number -> trial id (the heartbeat thread reads it)
        self.seen = _seen_params(ostudy)
        self.told_now = self.pool_restarts = self.n_recovered = self.n_taken = 0
        self.n_surplus = self.n_duplicates = 0
        best = best_trial(ostudy)
        self.best_score = best.user_attrs.get("score") if best else None
        self.best_number = best.number if best else None
        self.history: list[tuple[float, float]] = []
        self.is_interrupted = False
        self.beats: HeartbeatThread | None = None
        self.last_recovery = time.monotonic()

    # -- asking ---------------------------------------------------------------------------
    def _drop(self, rec: _Asked, attr: str, value: Any) -> None:
        """Fail an asked trial without scoring it (not counted); a re-enqueued candidate goes
        back into the queue."""
        self.pending.pop(rec.number, None)
        self.trial_ids.pop(rec.number, None)
        self._finish(rec, TrialState.FAIL, None, {attr: value})
        if rec.requeued_from is not None and attr == "surplus":
            self.ostudy.enqueue_trial(dict(rec.params),
                                      user_attrs={"requeued_from": rec.requeued_from},
                                      skip_if_exists=False)

    def _finish(self, rec: _Asked, state: TrialState, values: list | None,
                attrs: dict[str, Any]) -> None:
        """Write the trial's end: its attributes, then state and values (the storage's atomic
        state change last). A trial asked through optuna is told through optuna (the sampler's
        after-trial hook); one created by the fast path is written to the storage directly."""
        if rec.trial is not None:
            for k, v in attrs.items():
                rec.trial.set_user_attr(k, v)
            self.ostudy.tell(rec.trial, values, state=state)
            return
        storage = self.ostudy._storage
        for k, v in attrs.items():
            storage.set_trial_user_attr(rec.trial_id, k, v)
        if not storage.set_trial_state_values(rec.trial_id, state, values):
            raise UpdateFinishedTrialError(f"trial {rec.number} is no longer running")

    def _ask_optuna(self) -> _Asked:
        """One trial through optuna's ask (queued re-enqueued trials, samplers without a batch
        method): created, then tagged with the owner."""
        with warnings.catch_warnings():
            # the owner records heartbeats itself (ask-and-tell, no Study.optimize):
            # optuna's reminder that heartbeats are meant for optimize() does not apply
            warnings.filterwarnings("ignore", message="Heartbeat of storage is supposed")
            trial = self.ostudy.ask(fixed_distributions=self.space)
        if self.beats is not None:
            self.beats.beat(trial._trial_id)  # before the tag: never untagged and unbeaten
        trial.set_user_attr("owner", self.owner)
        return _Asked(trial.number, trial._trial_id, dict(trial.params),
                      trial.user_attrs.get("requeued_from"), trial)

    def _ask_batch(self, n: int) -> list[_Asked]:
        """``n`` fresh trials from the sampler's batch method, each created in one write with
        its parameters, then given a heartbeat, then tagged with the owner: the order of
        optuna's ask path, so a kill between any two steps leaves a trial that the lost-trial
        rules take (untagged and unbeaten: after UNTAGGED_GRACE_FACTOR grace periods; beaten:
        once its heartbeat is stale). Tagged at creation, a trial of an owner killed before its
        first heartbeat would never be taken on another host (seen in CI: the survivor waited
        for it for good)."""
        storage, sid = self.ostudy._storage, self.ostudy._study_id
        out = []
        for params in self.ostudy.sampler.sample_batch(self.ostudy, self.space, n):
            template = FrozenTrial(
                number=-1, state=TrialState.RUNNING, value=None,
                datetime_start=datetime.datetime.now(), datetime_complete=None, params=params,
                distributions=self.space, user_attrs={}, system_attrs={},
                intermediate_values={}, trial_id=-1)
            tid = storage.create_new_trial(sid, template_trial=template)
            if self.beats is not None:
                self.beats.beat(tid)  # before the tag: never tagged and unbeaten
            storage.set_trial_user_attr(tid, "owner", self.owner)
            out.append(_Asked(_trial_number(storage, tid), tid, params, None, None))
        return out

    def _has_waiting(self) -> bool:
        return bool(self.ostudy._storage.get_all_trials(
            self.ostudy._study_id, deepcopy=False, states=(TrialState.WAITING,)))

    def ask_chunk(self, n: int) -> list[tuple[int, dict]]:
        asked: list[_Asked] = []
        if hasattr(self.ostudy.sampler, "sample_batch") and not self._has_waiting():
            asked = self._ask_batch(n)
        else:  # re-enqueued trials first (optuna pops them), or a sampler without a batch
            asked = [self._ask_optuna() for _ in range(n)]
        for rec in asked:
            self.pending[rec.number] = rec
            self.trial_ids[rec.number] = rec.trial_id
        ok = admit(self.ostudy, [t.number for t in asked], self.n_trials)
        chunk = []
        for rec in asked:
            if rec.number not in ok:
                self.n_surplus += 1
                self._drop(rec, "surplus", True)
                continue
            pkey = params_key(rec.params)
            other = self.seen.get(pkey)
            if other is not None and other != rec.requeued_from and other != rec.number:
                self.n_duplicates += 1
                self._drop(rec, "duplicate_of", int(other))
                continue
            self.seen[pkey] = rec.number
            chunk.append((rec.number, dict(rec.params)))
        return chunk

    # -- telling --------------------------------------------------------------------------
    def tell(self, res: dict[str, Any]) -> None:
        rec = self.pending.pop(res["number"])
        self.trial_ids.pop(res["number"], None)
        try:
            if "error" in res:
                self._finish(rec, TrialState.FAIL, None, {"error": res["error"]})
            elif res["violations"] and self.multi:  # off the Pareto front: FAIL, kept
                self._finish(rec, TrialState.FAIL, None,
                             {"error": "breaks a fabrication limit"})
            else:
                # one attribute: the numbers behind the score (the sampler needs the values)
                self._finish(rec, TrialState.COMPLETE, res["values"], {"score": res["score"]})
                if self.best_score is None or res["score"] > self.best_score:
                    self.best_score, self.best_number = res["score"], res["number"]
        except UpdateFinishedTrialError:
            # taken as lost by another owner (our heartbeat missed the grace period): it was
            # re-enqueued there and will be scored again; nothing is counted twice
            self.n_taken += 1
            return
        self.told_now += 1
        self.history.append((time.perf_counter() - self.t_start,
                             self.best_score if self.best_score is not None else math.nan))
        if self.on_told is not None:
            self.on_told(self.told_now)

    # -- the loop -------------------------------------------------------------------------
    def _submit(self, ex, chunk):
        from concurrent.futures import Future
        from concurrent.futures.process import BrokenProcessPool

        try:
            return ex.submit(_score_chunk, self.study, self.key, self.pipeline, chunk,
                             self.is_dry)
        except BrokenProcessPool as exc:  # the pool broke before this chunk got in
            fut = Future()
            fut.set_exception(exc)
            return fut

    def _restart_pool(self, inflight: deque):
        """A fresh pool after a worker died; chunks in flight re-submitted (split or failed
        after repeated deaths)."""
        self.pool_restarts += 1
        ex = _executor(self.n_jobs)
        redo = deque()
        for item in inflight:
            c, f, a = item
            if f is not None and f.done() and f.exception() is None:
                redo.append(item)  # finished before the crash: keep its result
                continue
            a += 1
            if a >= 2 and len(c) > 1:  # split a chunk that kills workers
                for single in c:
                    redo.append([[single], self._submit(ex, [single]), a])
            elif a >= 3:
                for num, _ in c:
                    self.tell({"number": num, "error": "worker process died twice"})
            else:
                redo.append([c, self._submit(ex, c), a])
        return ex, redo

    def _room(self) -> tuple[int, int, list]:
        """(free places in the study's total, finished count, running trials), from storage;
        lost trials of other owners are recovered once per heartbeat interval."""
        if time.monotonic() - self.last_recovery > heartbeat_seconds():
            self.last_recovery = time.monotonic()
            self.n_recovered += recover_lost(self.ostudy, self.owner)
        n_finished, running = count_state(self.ostudy)
        return self.n_trials - n_finished - len(running), n_finished, running

    def run(self, flag: dict, time_budget: float | None, progress: Callable) -> None:
        ex = _executor(self.n_jobs) if self.n_jobs > 0 else None
        inflight: deque = deque()  # (chunk list, future or None, n_attempts)
        n_slots = max(self.n_jobs, 1)
        n_empty = 0
        while True:
            is_over = (time_budget is not None
                       and time.perf_counter() - self.t_start > time_budget)
            is_asking = not flag["stop"] and not is_over
            room, n_finished, running = self._room() if is_asking else (0, 0, [])
            while is_asking and room > 0 and len(inflight) < n_slots:
                chunk = self.ask_chunk(min(self.chunk_size, room))
                room -= self.chunk_size
                if chunk:
                    fut = self._submit(ex, chunk) if ex is not None else None
                    inflight.append([chunk, fut, 0])
            if not inflight:
                if not is_asking:
                    break
                room, n_finished, running = self._room()
                if room > 0:  # every asked candidate was dropped (surplus, duplicate)
                    n_empty += 1
                    if n_empty > MAX_EMPTY_ASKS:
                        break  # the sampler repeats itself: stop rather than spin
                    continue
                if (n_finished < self.n_trials
                        and _worth_waiting(running, self.owner, self.is_hb)):
                    time.sleep(min(1.0, heartbeat_seconds() / 2))  # other owners' trials
                    continue
                break
            n_empty = 0
            chunk, fut, _attempts = inflight[0]
            try:
                if fut is None:  # n_jobs == 0: score in the owner with its own context
                    if self.context is not None:
                        _CONTEXTS.setdefault(self.key, self.context)
                    results = _score_chunk(self.study, self.key, self.pipeline, chunk,
                                           self.is_dry)
                else:
                    results = fut.result()
            except Exception as exc:  # BrokenProcessPool / TerminatedWorkerError
                from concurrent.futures.process import BrokenProcessPool

                if not isinstance(exc, BrokenProcessPool):
                    raise
                ex, inflight = self._restart_pool(inflight)
                continue
            inflight.popleft()
            for res in results:
                self.tell(res)
            rate = self.told_now / max(time.perf_counter() - self.t_start, 1e-9)
            progress(n_finished + self.told_now, rate, self.best_score)
        self.is_interrupted = bool(flag["stop"])


def _table_hashes(context: objectives.EvalContext | None) -> dict[str, str]:
    """Hash of the dispersion tables behind a WKB march's surrogate (empty for other models)."""
    model = None if context is None else context.model
    if isinstance(model, WKBMarch) and isinstance(model.dispersion, _LastModes):
        return {"key": str(model.dispersion.surrogate.key())}
    return {}
