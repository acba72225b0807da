"""Messages of the search's storage handling (issue 15 item 8): what a user who typed the
usual mistakes reads. Checked against the accepted URL forms of SQLAlchemy's URL syntax
(dialect://...; sqlite:///relative and sqlite:////absolute, from its documentation)."""

from __future__ import annotations

import pytest
from search_helpers import fake_pipeline, fake_study

from optgrade.search import SearchError
from optgrade.search import _owner as search
from optgrade.search._storage import open_storage


def test_a_file_path_as_storage_gets_the_url_it_means():
    with pytest.raises(SearchError) as err:
        open_storage("runs/x/study.db")
    assert err.value.field == "--storage"
    assert "sqlite:///runs/x/study.db" in err.value.reason
    assert "journal:runs/x/study.db" in err.value.reason


def _run(study, tmp_path, **kw):
    url = f"sqlite:///{tmp_path / 's.db'}"
    search.run_search(study, tmp_path / "out", storage=url, n_trials=2, n_jobs=0,
                      show_progress=False, pipeline=fake_pipeline, **kw)
    return url


def test_existing_study_without_resume_names_the_storage_not_resume(tmp_path):
    """The user did not pass --resume: the message is about the storage, and suggests it."""
    _run(fake_study(), tmp_path)
    with pytest.raises(SearchError) as err:
        _run(fake_study(), tmp_path)
    assert err.value.field == "--storage"
    assert "pass --resume to continue it" in err.value.reason


def test_study_name_not_in_storage_lists_the_stored_studies(tmp_path):
    url = _run(fake_study(), tmp_path)
    other = fake_study(meta__name="renamed")
    with pytest.raises(SearchError) as err:
        search.load_search(other, url)
    assert "'renamed'" in err.value.reason and "studies stored there: 'fake'" in err.value.reason
