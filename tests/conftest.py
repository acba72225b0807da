"""Shared fixtures: a real, throw-away PostgreSQL server (tests/pg_server.py).

Outside CI a machine without the server programs or the driver skips the PostgreSQL tests with
the reason; with the environment variable ``CI`` set (as .ci/run runs) it fails them instead: a
skip is not a pass.
"""

from __future__ import annotations

import os
import secrets

import pytest


def _unavailable(reason: str) -> None:
    if os.environ.get("CI"):
        pytest.fail(f"CI: the PostgreSQL tests need a server and the driver: {reason}",
                    pytrace=False)
    pytest.skip(f"no PostgreSQL server here: {reason}")


@pytest.fixture(scope="session")
def pg_server():
    """A PostgreSQL server on 127.0.0.1 for the whole test session, stopped afterwards."""
    try:
        import psycopg  # noqa: F401  the driver of the optgrade[postgres] extra
    except ImportError as exc:
        _unavailable(f"driver psycopg not installed ({exc}); pip install '.[postgres]'")
    from pg_server import PgServer, PgUnavailable

    try:
        server = PgServer.start()
    except PgUnavailable as exc:
        _unavailable(str(exc))
    yield server
    server.stop()


@pytest.fixture
def pg_url(pg_server):
    """URL of a fresh, empty database on the session's server."""
    return pg_server.create_database(f"t_{secrets.token_hex(6)}")
