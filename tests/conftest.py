"""Shared fixtures: the store backends every store, workflow and CLI test runs on.

``store_url`` gives each test an empty database of its own, once on SQLite (a file in
the test's temporary folder) and once on PostgreSQL (a database on a throwaway server
started for the session, see :mod:`tests.pgserver`). PostgreSQL tests are skipped, with
the reason, only when the server programs or the driver are not installed; ``make
install`` installs both.
"""

import atexit
import itertools

import pytest

from tests.pgserver import find_bin_dir, start_server

BACKENDS = ["sqlite", "postgresql"]
_names = itertools.count()


def _postgres_missing() -> str | None:
    if find_bin_dir() is None:
        return (
            "PostgreSQL server programs (initdb, pg_ctl) not found; "
            "'make install' installs the Debian postgresql package"
        )
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return "the psycopg driver is not installed; pip install -e '.[postgres]'"
    return None


@pytest.fixture(scope="session")
def pg_server():
    """A throwaway PostgreSQL server on a free localhost port, stopped after the session."""
    reason = _postgres_missing()
    if reason:
        pytest.skip(reason)
    server = start_server(find_bin_dir())
    atexit.register(server.stop)  # also when the session is interrupted
    yield server
    server.stop()


@pytest.fixture
def pg_url(pg_server):
    """An empty PostgreSQL database for one test; dropped afterwards."""
    name = f"t{next(_names)}"
    url = pg_server.create_database(name)
    yield url
    pg_server.drop_database(name)


@pytest.fixture(params=BACKENDS)
def backend(request):
    """The name of the backend a parametrised test runs on."""
    return request.param


@pytest.fixture
def project_store(request, backend, monkeypatch):
    """Projects made in this test use the test's backend (None: SQLite in the folder).

    On PostgreSQL the environment names an empty database (``LABELER_STORE_URL``, which
    overrides the settings file, subprocesses included); on SQLite each project keeps
    its own ``labeler.db``.
    """
    if backend == "sqlite":
        monkeypatch.delenv("LABELER_STORE_URL", raising=False)
        return None
    url = request.getfixturevalue("pg_url")
    monkeypatch.setenv("LABELER_STORE_URL", url)
    return url


@pytest.fixture
def store_url(request, backend, tmp_path):
    """An empty database of the test's backend (SQLite file or PostgreSQL database)."""
    if backend == "sqlite":
        return f"sqlite:///{tmp_path / 'labeler.db'}"
    return request.getfixturevalue("pg_url")
