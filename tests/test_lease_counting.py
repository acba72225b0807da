"""The shared trial count read while another owner tells a trial (race seen in CI on a real
PostgreSQL server: two owners finished 41 trials for 40 requested).

Reference: the invariant itself (every trial in the study is counted at least once by
``count_state``, whatever the order of the storage reads), simulated deterministically with
optuna's in-memory storage and a proxy that tells a running trial right after the first read,
as a second machine would between two queries."""
from __future__ import annotations

import optuna
from optuna.trial import TrialState

from optgrade.search._lease import admit, count_state


class _TellsAfterFirstRead:
    """Storage proxy: after the first trial read, the running trial is told COMPLETE."""

    def __init__(self, storage, study, trial):
        self._storage, self._study, self._trial, self._n = storage, study, trial, 0

    def _after(self):
        self._n += 1
        if self._n == 1:
            self._study.tell(self._trial, 1.0)

    def get_n_trials(self, *a, **k):
        out = self._storage.get_n_trials(*a, **k)
        self._after()
        return out

    def get_all_trials(self, *a, **k):
        out = self._storage.get_all_trials(*a, **k)
        self._after()
        return out

    def __getattr__(self, name):
        return getattr(self._storage, name)


def _study_with_one_running():
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    st = optuna.create_study()
    other = st.ask()  # another owner's trial, told while we count
    st._storage = _TellsAfterFirstRead(st._storage, st, other)
    return st


def test_a_trial_told_between_the_reads_is_still_counted():
    st = _study_with_one_running()
    n_finished, running = count_state(st)
    assert n_finished + len(running) >= 1


def test_no_trial_admitted_beyond_the_total_when_the_other_owner_tells_meanwhile():
    st = _study_with_one_running()
    inner = st._storage._storage
    mine = optuna.Study(study_name=st.study_name, storage=inner).ask()  # number 1
    assert inner.get_trial(mine._trial_id).state == TrialState.RUNNING
    # total 1: the other owner's trial fills it, so ours must not be admitted
    assert admit(st, [mine.number], 1) == set()
