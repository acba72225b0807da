"""The search loop's own cost (issue 17 part 5): storage reads per trial, the batch sampler.

The loop's time went to reading the study back from storage (3.7 full trial reads per trial,
measured with optuna's cached RDB storage) and to refitting TPE for every candidate. The owner
now asks candidates a batch at a time from one sampler fit and creates each trial in one write.
"""

from __future__ import annotations

import statistics

import optuna
import pytest
from optuna.storages._cached_storage import _CachedStorage
from optuna.trial import TrialState
from search_helpers import fake_pipeline, fake_study

from optgrade.search import _lease
from optgrade.search import _owner as search
from optgrade.search._samplers import make_sampler


def test_the_owner_reads_the_study_about_once_per_trial(tmp_path, monkeypatch):
    """Whole-study reads (optuna's get_all_trials) per finished trial in a dry search of 120
    trials, batches of 8, SQLite. Before: 3.7 per trial (TPE's search-space inference, its fit,
    the queue check of every ask); after: 1.08 (a few per batch: queue, fit, two counts)."""
    calls = {"n": 0}
    original = _CachedStorage.get_all_trials

    def counting(self, *args, **kwargs):
        calls["n"] += 1
        return original(self, *args, **kwargs)

    monkeypatch.setattr(_CachedStorage, "get_all_trials", counting)
    study = fake_study(search__batch_size=8)
    url = f"sqlite:///{tmp_path / 'loop.db'}"
    out = search.run_search(study, tmp_path / "out", n_trials=120, n_jobs=0, storage=url,
                            pipeline=fake_pipeline, show_progress=False)
    assert out.n_finished == 120
    per_trial = calls["n"] / 120
    assert per_trial < 1.5, per_trial
    st = optuna.load_study(study_name="fake", storage=search.open_storage(url))
    done = _lease.finished_trials(st)
    assert len(done) == 120
    assert all(t.user_attrs.get("owner") for t in st.get_trials(deepcopy=False))
    assert all(t.params for t in done) and all("score" in t.user_attrs for t in done)
    assert not st.get_trials(deepcopy=False, states=(TrialState.RUNNING,))


def _sphere(p: dict) -> float:
    return sum((v - 0.3) ** 2 for v in p.values())


def _best(mode: str, seed: int, n: int = 160) -> float:
    space = {f"x{i}": optuna.distributions.FloatDistribution(-1, 1) for i in range(4)}
    sampler = (optuna.samplers.RandomSampler(seed=seed) if mode == "random"
               else make_sampler("tpe", seed, False))
    st = optuna.create_study(sampler=sampler)
    if mode == "batch":
        while len(st.trials) < n:
            for p in st.sampler.sample_batch(st, space, 8):
                assert set(p) == set(space) and all(-1 <= v <= 1 for v in p.values())
                st.add_trial(optuna.trial.create_trial(params=p, distributions=space,
                                                       value=_sphere(p)))
    else:
        for _ in range(n):
            t = st.ask(space)
            st.tell(t, _sphere(t.params))
    return st.best_value


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_batch_tpe_searches_as_well_as_optuna_tpe(seed):
    """Reference: optuna's own TPE, one fit per candidate, on a 4-D sphere (minimum 0 at
    x = 0.3), 160 trials. Batches of 8 from one fit reach a best within 3x of it (or below
    0.005) and at least 10x better than uniform random candidates (the same seed).
    Measured: 0.0014 / 0.0013 / 0.0015 (batch) against 0.0026 / 0.0019 / 0.0057 (optuna's TPE)
    and 0.054 / 0.153 / 0.080 (random)."""
    batch, plain, rnd = _best("batch", seed), _best("plain", seed), _best("random", seed)
    assert batch <= max(3 * plain, 0.005)
    assert batch <= rnd / 10


def test_batch_tpe_startup_draws_are_uniform_and_seeded():
    """Before the startup count the batch is independent uniform draws (optuna's TPE startup):
    reproducible for a seed, spread over the whole range."""
    space = {"x": optuna.distributions.FloatDistribution(0, 10)}
    draws = []
    for _ in range(2):
        st = optuna.create_study(sampler=make_sampler("tpe", 5, False))
        draws.append([p["x"] for p in st.sampler.sample_batch(st, space, 200)])
    assert draws[0] == draws[1]
    assert 4.0 < statistics.mean(draws[0]) < 6.0
    assert min(draws[0]) < 0.5 and max(draws[0]) > 9.5


def test_an_owner_killed_before_its_first_heartbeat_leaves_an_untagged_trial(tmp_path,
                                                                            monkeypatch):
    """The batch path creates a trial, records its heartbeat, then tags it (optuna's ask
    order). A kill between creation and the first heartbeat must leave an untagged trial, which
    the lost-trial rules take after a few grace periods; a trial tagged at creation and never
    beaten was never taken when its owner was on another host (CI: the surviving owner waited
    for it until the test's 240 s timeout)."""

    class Killed(BaseException):
        pass

    def die(self, trial_id):
        raise Killed

    monkeypatch.setattr(_lease.HeartbeatThread, "beat", die)
    url = f"sqlite:///{tmp_path / 'kill.db'}"
    with pytest.raises(Killed):
        search.run_search(fake_study(search__batch_size=4), tmp_path / "out", n_trials=8,
                          n_jobs=0, storage=url, pipeline=fake_pipeline, show_progress=False)
    st = optuna.load_study(study_name="fake", storage=search.open_storage(url))
    running = st.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    assert len(running) == 1
    assert "owner" not in running[0].user_attrs and running[0].params
