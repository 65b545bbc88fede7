"""A REAL PostgreSQL for the journal tests (never a mock): each test gets a database of
its own, created on the server and dropped afterwards, under a unique name.

The server: HOURWATCH_TEST_PG (a libpq URL of a database to connect to for CREATE
DATABASE), default postgresql://postgres@127.0.0.1:5432/postgres (trust authentication
on our machines and in CI). Where no server answers, or psycopg is not installed, the
test is skipped with the reason.

Use:  `from tests.pg import pg`  (a function-scoped fixture yielding a daemon.journal_api.PgUrl).
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import Iterator
from urllib.parse import urlsplit, urlunsplit

import pytest

from daemon.journal_api import PgUrl

ENV = "HOURWATCH_TEST_PG"
DEFAULT = "postgresql://postgres@127.0.0.1:5432/postgres"
_unreachable: dict[str, str] = {}  # remembered per server for the session


def server_url() -> str:
    return os.environ.get(ENV) or DEFAULT


def database_url(server: str, name: str) -> PgUrl:
    parts = urlsplit(server)
    return PgUrl(urlunsplit(parts._replace(path="/" + name)))


def why_not(server: str) -> str | None:
    """None when a PostgreSQL server answers at `server`, else the reason in one line."""
    if server in _unreachable:
        return _unreachable[server]
    try:
        import psycopg
    except ImportError:
        return "psycopg is not installed (pip install -e '.[postgresql]')"
    try:
        with psycopg.connect(server, connect_timeout=3, autocommit=True) as conn:
            conn.execute("SELECT 1")
    except psycopg.Error as exc:
        reason = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        _unreachable[server] = f"no PostgreSQL server at {server}: {reason}"
        return _unreachable[server]
    return None


@contextlib.contextmanager
def fresh_database(prefix: str = "hw_test") -> Iterator[PgUrl]:
    server = server_url()
    reason = why_not(server)
    if reason is not None:
        pytest.skip(reason)
    import psycopg

    name = f"{prefix}_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(server, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    try:
        yield database_url(server, name)
    finally:
        with psycopg.connect(server, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def pg() -> Iterator[PgUrl]:
    with fresh_database() as url:
        yield url


@pytest.fixture
def pg2() -> Iterator[PgUrl]:
    """A second database (a second group's journal)."""
    with fresh_database("hw_test2") as url:
        yield url
