"""Several owners on one stored study: identity, heartbeats, lost-trial recovery, one count.

Rules (docs/search.md, "Several owners"; tests/test_postgres_owners.py, tests/test_search.py):

- **Identity.** Every owner run has an id ``HOST:PID:TOKEN`` (random token: a reused pid is not
  taken for the old owner), written to each trial it asks as user attribute ``owner`` right after
  the ask; on RDB storages its first heartbeat is recorded before that.
- **Heartbeats.** On RDB storages a background thread records optuna heartbeats for the owner's
  running trials every :func:`heartbeat_seconds`; the database server stamps them.
- **A trial is lost** only if it is RUNNING and (a) its heartbeat is older than the grace period
  (server clock), or (b) its owner attribute names a process on this host that no longer runs
  (or an earlier run of this very process). A trial without an owner attribute and without a
  stale heartbeat is never taken: it is in the gap between ask and tag of a live owner (the
  defect of issue 17: such a trial was taken for a dead owner's, and its live owner crashed on
  telling it); only one untagged for several grace periods (optuna's start time, the asking
  machine's clock) is taken. Recovery writes ``lost=True``, then fails the trial (an atomic
  state change: of two owners recovering at once only one wins) and only the winner re-enqueues
  the parameters.
- **One count for the study.** After asking, a trial is scored only if the finished trials plus
  the running trials with smaller numbers leave room below the requested total (the same rule
  in every owner, evaluated on the storage, so several owners never overshoot); a trial beyond
  it is failed with ``surplus=True`` without scoring (a re-enqueued one is enqueued again).
- **No parameter set twice.** A parameter set already scored or running in the study is not
  scored again (``duplicate_of``): the defence behind the per-owner seeds of the sampler.
"""

from __future__ import annotations

import datetime
import hashlib
import os
import secrets
import socket
import threading
from collections.abc import Iterable
from typing import Any

import optuna
from optuna.exceptions import UpdateFinishedTrialError
from optuna.trial import TrialState

from optgrade.search._storage import grace_seconds, heartbeat_seconds, is_heartbeat_storage

__all__ = [
    "HeartbeatThread",
    "admit",
    "finished_trials",
    "is_counted",
    "new_owner_id",
    "owner_is_alive",
    "params_key",
    "recover_lost",
    "session_seed",
]

#: An untagged RUNNING trial (its owner died between ask and tag, milliseconds) is lost after
#: this many grace periods by the asking owner's clock (optuna's trial start time).
UNTAGGED_GRACE_FACTOR = 3
#: user attributes of FAIL trials that do not count as finished
NOT_COUNTED = ("lost", "surplus", "duplicate_of")


def new_owner_id() -> str:
    """``HOST:PID:TOKEN`` of this owner run (``OPTGRADE_OWNER_HOST`` overrides the host name,
    so that tests can play two machines on one)."""
    host = os.environ.get("OPTGRADE_OWNER_HOST") or socket.gethostname()
    return f"{host}:{os.getpid()}:{secrets.token_hex(4)}"


def _this_host() -> str:
    return os.environ.get("OPTGRADE_OWNER_HOST") or socket.gethostname()


def owner_is_alive(owner: str, me: str) -> bool:
    """Can ``owner`` (an owner attribute) still be running? Other hosts: assumed alive (their
    heartbeat decides). ``HOST:PID`` without a token is the format before the token."""
    if owner == me:
        return True
    parts = owner.split(":")
    if len(parts) < 2 or parts[0] != _this_host():
        return True
    try:
        pid = int(parts[1])
    except ValueError:
        return True
    if pid == os.getpid():
        return False  # an earlier run in this process: this run has another token
    try:
        os.kill(pid, 0)  # signal 0: existence check only, nothing is sent
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def is_counted(t: optuna.trial.FrozenTrial) -> bool:
    """Does the trial count towards the requested total (COMPLETE, or FAIL after scoring)?"""
    if t.state == TrialState.COMPLETE:
        return True
    attrs = t.user_attrs
    return t.state == TrialState.FAIL and not any(
        k in attrs and attrs[k] is not False for k in NOT_COUNTED)


def finished_trials(ostudy: optuna.Study) -> list[optuna.trial.FrozenTrial]:
    """Trials that count towards the requested number (COMPLETE, or FAIL after scoring)."""
    return [t for t in ostudy.get_trials(deepcopy=False) if is_counted(t)]


def params_key(params: dict[str, Any]) -> tuple:
    """Hashable form of a parameter set (exact values)."""
    return tuple(sorted((k, repr(v)) for k, v in params.items()))


def session_seed(seed: int, owner: str, is_first: bool) -> int:
    """Sampler seed of this owner run: the study seed for the run that created the study
    (reproducible), otherwise one derived from the study seed and the owner id, so that a
    resumed run or a second owner does not draw the first run's candidates again."""
    if is_first:
        return int(seed)
    digest = hashlib.sha256(f"{int(seed)}:{owner}".encode()).digest()
    return int.from_bytes(digest[:4], "little")


def _take(ostudy: optuna.Study, t: optuna.trial.FrozenTrial) -> bool:
    """Mark ``t`` lost, fail it and re-enqueue its parameters; False if someone else was first
    (or its owner told it in the meantime)."""
    storage = ostudy._storage
    try:
        storage.set_trial_user_attr(t._trial_id, "lost", True)
        if not storage.set_trial_state_values(t._trial_id, TrialState.FAIL):
            return False
    except UpdateFinishedTrialError:
        return False
    if t.params:
        ostudy.enqueue_trial(t.params, user_attrs={"requeued_from": t.number},
                             skip_if_exists=False)
    return True


def recover_lost(ostudy: optuna.Study, me: str = "") -> int:
    """Take the lost RUNNING trials of the study (rules in the module docstring); returns how
    many this owner took."""
    storage = ostudy._storage
    stale: set[int] = set()
    if is_heartbeat_storage(storage):
        stale = set(storage._get_stale_trial_ids(ostudy._study_id))
    n = 0
    for t in storage.get_all_trials(ostudy._study_id, deepcopy=False,
                                    states=(TrialState.RUNNING,)):
        owner = t.user_attrs.get("owner", "")
        if owner == me:
            continue
        is_lost = t._trial_id in stale or (bool(owner) and not owner_is_alive(owner, me))
        if not owner and t.datetime_start is not None:  # killed between ask and tag
            age = (datetime.datetime.now() - t.datetime_start).total_seconds()
            is_lost = is_lost or age > UNTAGGED_GRACE_FACTOR * grace_seconds()
        if is_lost and _take(ostudy, t):
            n += 1
    return n


def count_state(ostudy: optuna.Study) -> tuple[int, list[optuna.trial.FrozenTrial]]:
    """(finished count, running trials) read from the storage.

    The reads are separate queries while other owners tell trials, so the RUNNING trials are
    read first: a trial that finishes between the reads is then counted twice (one place
    fewer admitted this round, re-checked on the next), never zero times (one trial too
    many: 41 finished for 40 requested, seen on PostgreSQL in CI)."""
    storage, sid = ostudy._storage, ostudy._study_id
    running = storage.get_all_trials(sid, deepcopy=False, states=(TrialState.RUNNING,))
    n_complete = storage.get_n_trials(sid, TrialState.COMPLETE)
    n_fail = sum(is_counted(t) for t in storage.get_all_trials(sid, deepcopy=False,
                                                              states=(TrialState.FAIL,)))
    return n_complete + n_fail, running


def admit(ostudy: optuna.Study, numbers: Iterable[int], n_trials: int) -> set[int]:
    """Of the just-asked trials ``numbers``, those within the study's total: finished trials
    plus running trials numbered below it < ``n_trials``."""
    n_finished, running = count_state(ostudy)
    below = sorted(t.number for t in running)
    out = set()
    import bisect

    for num in numbers:
        if n_finished + bisect.bisect_left(below, num) < n_trials:
            out.add(num)
    return out


class HeartbeatThread:
    """Records optuna heartbeats for the owner's running trials every interval (RDB only)."""

    def __init__(self, storage: Any, trial_ids: dict[int, int]) -> None:
        self.storage = storage
        self.trial_ids = trial_ids  # trial number -> trial id, shared with the owner loop
        self.interval = heartbeat_seconds()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.is_enabled = is_heartbeat_storage(storage)

    def beat(self, trial_id: int) -> None:
        if self.is_enabled:
            self.storage.record_heartbeat(trial_id)

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            for tid in list(self.trial_ids.values()):
                try:
                    self.storage.record_heartbeat(tid)
                except Exception:  # noqa: BLE001  a missed beat is retried next interval
                    pass

    def __enter__(self) -> HeartbeatThread:
        if self.is_enabled:
            self._thread = threading.Thread(target=self._run, name="optgrade-heartbeat",
                                            daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
